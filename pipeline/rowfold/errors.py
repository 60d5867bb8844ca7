"""The exceptions rowfold raises, and the exit status each one maps to.

::

    RowfoldError                      base; never raised itself
    ├── JobError(ValueError)          the job file is malformed, has an unknown key,
    │                                 a wrong type or a missing key           -> exit 2
    ├── InputError(ValueError)        an input file, dataset or row block is
    │                                 unusable (missing, wrong shape, NaN)    -> exit 2
    │   └── InputMissingError(FileNotFoundError)
    ├── OutputError(ValueError)       the output exists without ``overwrite``
    │                                 or cannot be written                    -> exit 2
    ├── BreakdownError(LinAlgError)   a method broke down (Cholesky failed,
    │                                 or its accuracy cannot be guaranteed)   -> exit 4
    └── RunError(RuntimeError)        anything else that failed while running -> exit 4

A quality gate that fails is not an exception: the result is written and the
CLI exits with status 3 (see :mod:`rowfold.quality`).

Every message is one or two plain lines that name the file, key or row block,
say what was expected and what was found, and suggest the next step.
"""

from __future__ import annotations

from numpy.linalg import LinAlgError

EXIT_OK = 0
EXIT_INVALID = 2
EXIT_GATE_FAILED = 3
EXIT_RUN_FAILED = 4


class RowfoldError(Exception):
    """Base of every error rowfold raises on purpose."""

    exit_status = EXIT_RUN_FAILED


class JobError(RowfoldError, ValueError):
    """The job file or a ``--set`` override is invalid (exit 2)."""

    exit_status = EXIT_INVALID


class InputError(RowfoldError, ValueError):
    """An input file, dataset or row block cannot be used as given (exit 2)."""

    exit_status = EXIT_INVALID


class InputMissingError(InputError, FileNotFoundError):
    """An input file or dataset does not exist (exit 2)."""


class OutputError(RowfoldError, ValueError):
    """The output path cannot be written, or exists without ``overwrite`` (exit 2)."""

    exit_status = EXIT_INVALID


class BreakdownError(RowfoldError, LinAlgError):
    """A factorization method broke down or cannot guarantee its accuracy (exit 4).

    ``passes`` counts the passes over A made before the method gave up (so a caller that
    falls back to another method can report the total honestly).
    """

    exit_status = EXIT_RUN_FAILED

    def __init__(self, message: str, passes: int = 0) -> None:
        super().__init__(message)
        self.passes = passes

    def __reduce__(self) -> tuple[type, tuple[str, int]]:
        return (type(self), (str(self), self.passes))


class RunError(RowfoldError, RuntimeError):
    """The job failed while running for a reason other than breakdown (exit 4)."""

    exit_status = EXIT_RUN_FAILED
