"""rowfold: out-of-core QR factorization and least squares for tall-skinny matrices on disk.

The package follows one data flow, one module per arrow::

    job file -> spec -> row blocks (storage) -> factorization (methods over kernels)
             -> solution (solve) -> quality -> result store (storage) + report

See ``DEVELOPERS.md`` at the repository root for the layout and the import rules.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
