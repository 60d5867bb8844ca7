"""rowfold: out-of-core QR factorization and least squares for tall-skinny matrices on disk.

The package follows one data flow, one module per arrow::

    job file -> spec -> row blocks (storage) -> factorization (methods over kernels)
             -> solution (solve) -> quality -> result store (storage) + report

The Python API (:mod:`rowfold.api`) is one client of that flow and the CLI another:
``rowfold.lstsq``, ``rowfold.qr``, ``rowfold.run``, ``rowfold.open_result`` and the result
and error classes are loaded on first use, so ``import rowfold`` (and ``rowfold --help``)
imports no numpy, dask or scipy.

See ``DEVELOPERS.md`` at the repository root for the layout and the import rules.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# Public name -> the module that defines it (imported on first use).
_LAZY = {
    "lstsq": "rowfold.api",
    "qr": "rowfold.api",
    "run": "rowfold.api",
    "open_result": "rowfold.api",
    "QRResult": "rowfold.api_results",
    "LstsqResult": "rowfold.api_results",
    "Quality": "rowfold.api_results",
    "RowfoldError": "rowfold.errors",
    "JobError": "rowfold.errors",
    "InputError": "rowfold.errors",
    "InputMissingError": "rowfold.errors",
    "OutputError": "rowfold.errors",
    "BreakdownError": "rowfold.errors",
    "RunError": "rowfold.errors",
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str) -> Any:
    """Load a public name of the API from its module on first use."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'rowfold' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_LAZY})
