"""The Python API's typed, frozen results, filled from a result store and its JSON report.

:func:`read` is the one reader: it takes the store's small arrays (R, x, standard errors,
covariance) from :func:`rowfold.storage.read_result`, the figures from the report, and the
arrays with one row per input row (Q, residuals, leverages, ...) as dask arrays that read
their row blocks only when computed (:func:`rowfold.storage.arrays.row_arrays`).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

from rowfold import storage
from rowfold.errors import InputError, InputMissingError
from rowfold.storage.arrays import row_arrays

# The arrays with one row per input row that a result may hold (read lazily).
LAZY_ARRAYS = ("Q", "residuals", "standardized_residuals", "studentized_residuals", "leverage")


@dataclass(frozen=True, kw_only=True, slots=True)
class Quality:
    """How good the factorization is, as the report measured it.

    Attributes
    ----------
    orthogonality_loss : float or None
        ``||I - Q^H Q||_F`` (None when Q was not formed).
    factorization_residual : float or None
        ``||A - QR||_F / ||A||_F`` (None when Q was not formed).
    gram_residual : float
        ``||A^H A - R^H R||_F / ||A||_F^2``.
    r_condition : float
        2-norm condition number of R (of the scaled R with ``scale_columns``).
    bound : float
        The published bound on the orthogonality loss for the method used.
    bound_formula, bound_source : str
        The bound as a formula, and where it is published.
    within_bound : bool or None
        Whether the measured loss meets the bound (None when not measured).
    gates_status : str
        ``held``, or how the gates failed (a failed gate is the CLI's exit 3).
    """

    orthogonality_loss: float | None
    factorization_residual: float | None
    gram_residual: float | None
    r_condition: float | None
    bound: float | None
    bound_formula: str | None
    bound_source: str | None
    within_bound: bool | None
    gates_status: str


@dataclass(frozen=True, kw_only=True, slots=True)
class QRResult:
    """A QR factorization ``A = Q R`` (R upper triangular with real diagonal >= 0).

    Attributes
    ----------
    R : numpy.ndarray
        n x n, read-only.
    Q : dask.array.Array or None
        m x n, read from the store block by block when computed; None unless asked
        (``q=True``, or ``output.q`` in a job).
    parameter_names : tuple of str
        One name per column of A.
    rows, cols : int
        The shape of A.
    method, method_used, method_reason : str
        The method asked for, the one that ran, and why (``auto`` says what it measured).
    rank : int or None
        Numerical rank (least squares only; None for R alone).
    quality : Quality
        The report's figures.
    scheduler : dict or None
        Which scheduler ran the job (``how`` and ``address``).
    report : Mapping
        The whole JSON report, read-only.
    path : Path or None
        The result store, or None when it was temporary (``rowfold.qr``/``lstsq``
        without ``output.path``).
    """

    R: np.ndarray
    Q: Any = None
    parameter_names: tuple[str, ...]
    rows: int
    cols: int
    method: str
    method_used: str
    method_reason: str
    rank: int | None
    quality: Quality
    scheduler: Mapping[str, Any] | None
    report: Mapping[str, Any]
    path: Path | None

    def summary(self) -> str:
        """A readable text table: the shape and method, then the key figures."""
        return "\n".join([_heading(self), *_figures(self)])


@dataclass(frozen=True, kw_only=True, slots=True)
class LstsqResult(QRResult):
    """A least-squares solution ``min ||W^(1/2) (A x - b)||_2`` and its statistics.

    Attributes
    ----------
    x, stderr : numpy.ndarray
        The solution and its standard errors, (n,) for a 1-D b, else (n, k); read-only.
    covariance : numpy.ndarray or None
        The covariance of x (n x n, or k x n x n); None with ``covariance=False``.
    residual_sd : float or list of float
        Residual standard deviation ``||r|| / sqrt(dof)`` (one per right-hand side).
    residual_norm : float or list of float
        ``||r||_2`` (one per right-hand side).
    degrees_of_freedom : int
        Rows used minus rank.
    variance_factor : float, list of float or None
        A posteriori variance factor (see the report's model test).
    residuals, standardized_residuals, studentized_residuals, leverage : dask arrays
        Row arrays, read lazily; None unless ``residuals=True``.
    """

    x: np.ndarray
    stderr: np.ndarray
    covariance: np.ndarray | None = None
    residual_sd: Any
    residual_norm: Any
    degrees_of_freedom: int
    variance_factor: Any = None
    residuals: Any = None
    standardized_residuals: Any = None
    studentized_residuals: Any = None
    leverage: Any = None

    def summary(self) -> str:
        """A readable text table: parameters with x and standard error, then figures."""
        solution = [
            ("rank", f"{self.rank} of {self.cols}"),
            ("degrees of freedom", str(self.degrees_of_freedom)),
            ("residual SD", _fmt(self.residual_sd)),
            ("residual norm", _fmt(self.residual_norm)),
        ]
        lines = [_heading(self), "", *_parameter_table(self), ""]
        lines += [f"{name:<23} {value}" for name, value in solution]
        return "\n".join([*lines, *_figures(self)])


def _fmt(value: Any) -> str:
    """A figure (or a list of them) in a short general format."""
    if value is None:
        return "not measured"
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, int):
        return str(value)
    return f"{float(value):.4g}"


def _heading(result: QRResult) -> str:
    kind = "least squares" if isinstance(result, LstsqResult) else "QR"
    how = result.method_used
    if result.method != result.method_used:
        how = f"{result.method} -> {result.method_used}"
    return f"rowfold {kind}: {result.rows} x {result.cols}, method {how} ({result.method_reason})"


def _figures(result: QRResult) -> list[str]:
    """The key figures, one per line."""
    q = result.quality
    where = result.scheduler or {}
    bound = f"{_fmt(q.bound)} ({q.bound_formula})" if q.bound is not None else "none"
    figures = [
        ("R condition", _fmt(q.r_condition)),
        ("gram residual", _fmt(q.gram_residual)),
        ("orthogonality loss", f"{_fmt(q.orthogonality_loss)}, bound {bound}"),
        ("factorization residual", _fmt(q.factorization_residual)),
        ("gates", q.gates_status),
        ("ran on", f"{where.get('how', '?')} at {where.get('address', '?')}"),
    ]
    return [f"{name:<23} {value}" for name, value in figures]


def _parameter_table(result: LstsqResult) -> list[str]:
    """One line per parameter: name, then x and standard error per right-hand side, each
    column as wide as its widest entry (complex x included)."""
    x = result.x.reshape(result.x.shape[0], -1)
    se = result.stderr.reshape(x.shape)
    many = x.shape[1] > 1
    columns = [[f"{'parameter'}", *result.parameter_names]]
    for k in range(x.shape[1]):
        tag = f"[{k}]" if many else ""
        columns.append([f"x{tag}", *(_number(v, 9) for v in x[:, k])])
        columns.append([f"stderr{tag}", *(_number(v, 3) for v in se[:, k])])
    widths = [max(len(cell) for cell in column) for column in columns]
    lines = []
    for i in range(len(columns[0])):
        cells = [f"{columns[0][i]:<{widths[0]}}"]
        cells += [f"{column[i]:>{w}}" for column, w in zip(columns[1:], widths[1:], strict=True)]
        lines.append("  ".join(cells))
    return [lines[0], "-" * len(lines[0]), *lines[1:]]


def _number(value: Any, digits: int) -> str:
    """A real or complex number in ``digits`` significant digits."""
    if np.iscomplexobj(value):
        return f"{value.real:.{digits}g}{value.imag:+.{digits}g}j"
    return f"{float(value):.{digits}g}"


def _frozen(array: np.ndarray | None) -> Any:
    """The array made read-only (a frozen result holds no writable arrays)."""
    if array is None:
        return None
    array = np.asarray(array)
    array.flags.writeable = False
    return array


def read_report(path: Path) -> dict[str, Any]:
    """The JSON report written beside a result store.

    Raises
    ------
    InputMissingError, InputError
        When there is no store or no readable report beside it.
    """
    if not path.exists():
        raise InputMissingError(f"{path}: no result store here")
    json_path, _ = storage.report_paths(path)
    try:
        return dict(json.loads(json_path.read_text(encoding="utf-8")))
    except FileNotFoundError:
        raise InputMissingError(f"{json_path}: the report of {path} is missing") from None
    except (OSError, ValueError) as exc:
        raise InputError(f"{json_path}: cannot read the report ({exc})") from None


def _names(
    path: Path, report: Mapping[str, Any], cols: int, given: tuple[str, ...] | None
) -> tuple[str, ...]:
    """Parameter names: given, else the report's parameters, else the job's list."""
    if given is not None:
        return given
    parameters = report.get("parameters")
    if parameters:
        return tuple(str(p["name"]) for p in parameters)
    names = _job_names(path)
    if names is not None and len(names) == cols:
        return names
    return tuple(f"x{j}" for j in range(cols))


def _job_names(path: Path) -> tuple[str, ...] | None:
    """The ``input.parameter_names`` list of the job the store records, if it has one."""
    job = storage.describe_path(path)["attrs"].get("job")
    if isinstance(job, str):
        job = json.loads(job)
    listed = job.get("input", {}).get("parameter_names") if isinstance(job, Mapping) else None
    return tuple(str(n) for n in listed) if isinstance(listed, list) else None


def _quality(report: Mapping[str, Any]) -> Quality:
    bound = report.get("orthogonality_bound") or {}
    return Quality(
        orthogonality_loss=report.get("orthogonality_loss"),
        factorization_residual=report.get("factorization_residual"),
        gram_residual=report.get("gram_residual"),
        r_condition=report.get("r_condition"),
        bound=bound.get("value"),
        bound_formula=bound.get("formula"),
        bound_source=bound.get("source"),
        within_bound=bound.get("within"),
        gates_status=str(report.get("gates_status", "held")),
    )


def _reason(report: Mapping[str, Any]) -> str:
    details = report.get("method_details") or {}
    reason = details.get("method_reason")
    return str(reason) if reason else f"method.name: {report.get('method')}"


def read(
    path: Path,
    report: Mapping[str, Any] | None = None,
    names: tuple[str, ...] | None = None,
    keep: Any = None,
    temporary: bool = False,
) -> QRResult | LstsqResult:
    """Read a result store (and its report) into a :class:`QRResult` or
    :class:`LstsqResult` (when it holds x).

    Parameters
    ----------
    path : Path
        The result store.
    report : mapping, optional
        Its report when already in hand (else read from beside the store).
    names : tuple of str, optional
        Parameter names known to the caller (else from the report).
    keep : object, optional
        Kept alive by the lazy row arrays (e.g. the temporary folder of the store).
    temporary : bool
        The store goes away with ``keep``: the result's ``path`` is then None.
    """
    report = dict(report) if report is not None else read_report(path)
    arrays = storage.read_result(path)
    R = arrays["R"]
    lazy = row_arrays(path, LAZY_ARRAYS, keep)
    common: dict[str, Any] = {
        "R": _frozen(R),
        "Q": lazy.get("Q"),
        "parameter_names": _names(path, report, R.shape[1], names),
        "rows": int(report.get("rows", 0)),
        "cols": int(R.shape[1]),
        "method": str(report.get("method")),
        "method_used": str(report.get("method_used", report.get("method"))),
        "method_reason": _reason(report),
        "rank": report.get("rank"),
        "quality": _quality(report),
        "scheduler": (report.get("provenance") or {}).get("scheduler"),
        "report": MappingProxyType(report),
        "path": None if temporary else path,
    }
    if "x" not in arrays:
        return QRResult(**common)
    return LstsqResult(
        **common,
        x=_frozen(arrays["x"]),
        stderr=_frozen(arrays["x_stderr"]),
        covariance=_frozen(arrays.get("x_covariance")),
        residual_sd=report.get("residual_std"),
        residual_norm=report.get("solution_residual_norm"),
        degrees_of_freedom=int(report.get("degrees_of_freedom", 0)),
        variance_factor=report.get("variance_factor"),
        residuals=lazy.get("residuals"),
        standardized_residuals=lazy.get("standardized_residuals"),
        studentized_residuals=lazy.get("studentized_residuals"),
        leverage=lazy.get("leverage"),
    )
