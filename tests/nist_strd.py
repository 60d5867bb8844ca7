"""Reader for the NIST StRD linear least-squares reference datasets.

The files in ``tests/data/nist-strd/`` are the NIST/ITL Statistical Reference Datasets
(StRD) for linear regression, unchanged (see ``SOURCE.md`` there). Each holds a header with
the model, a block of certified values (15 significant digits, computed by NIST in 500-digit
arithmetic) and the data. :func:`load_dataset` turns one file into a :class:`NistCase` with the
design matrix the model line describes; :func:`lre` is the log relative error of McCullough,
"Assessing the reliability of statistical software: Part I", The American Statistician 52(4),
1998, the usual score for these datasets.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

import bounds

DATA_DIR = Path(__file__).parent / "data" / "nist-strd"
"""Folder holding the ``.dat`` files."""

DATASET_NAMES: tuple[str, ...] = (
    "Norris",
    "Pontius",
    "NoInt1",
    "NoInt2",
    "Filip",
    "Longley",
    "Wampler1",
    "Wampler2",
    "Wampler3",
    "Wampler4",
    "Wampler5",
)
"""The 11 linear-regression datasets of NIST StRD, lower to higher difficulty."""

LRE_CAP = 15.0
"""Highest LRE reported: the certified values carry 15 significant digits."""

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_LINE_RANGE = re.compile(r"^\s*(Certified Values|Data)\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", re.M)
_PARAM_LINE = re.compile(rf"^\s*B(\d+)\s+({_NUMBER})\s+({_NUMBER})\s*$")
_RESIDUAL_SD = re.compile(rf"^\s*Standard Deviation\s+({_NUMBER})\s*$", re.M)
_OBSERVATIONS = re.compile(r"^\s*(\d+)\s+Observations\s*$", re.M)
_MODEL = re.compile(r"^\s*y\s*=\s*(.+?)\s*$", re.M)
_RESIDUAL_ANOVA = re.compile(rf"^Residual\s+(\d+)\s+({_NUMBER})\s+({_NUMBER})\s*$", re.M)
_POWER_TERM = re.compile(r"B(\d+)\*\(x\*\*(\d+)\)")
_PREDICTOR_TERM = re.compile(r"B(\d+)\*x(\d+)")


@dataclass(frozen=True, slots=True, eq=False)
class NistCase:
    """One NIST StRD linear-regression problem with its certified answers."""

    name: str
    """Dataset name, e.g. ``"Longley"`` (the file stem)."""
    y: NDArray[np.float64]
    """Response, shape (m,)."""
    X: NDArray[np.float64]
    """Design matrix, shape (m, p): one column per certified parameter, in the order B0, B1, ..."""
    params: tuple[int, ...]
    """Indices k of the certified parameters Bk, one per column of ``X``."""
    certified_estimates: NDArray[np.float64]
    """Certified parameter estimates, shape (p,)."""
    certified_stderr: NDArray[np.float64]
    """Certified standard deviations of the estimates, shape (p,)."""
    certified_residual_sd: float
    """Certified residual standard deviation, sqrt(RSS / (m - p))."""

    @property
    def n_obs(self) -> int:
        """Number of observations m."""
        return int(self.y.shape[0])

    @property
    def n_params(self) -> int:
        """Number of parameters p."""
        return int(self.X.shape[1])


def dataset_path(name: str) -> Path:
    """Return the path of the ``.dat`` file for dataset ``name``.

    Parameters
    ----------
    name : str
        One of :data:`DATASET_NAMES`.

    Returns
    -------
    pathlib.Path
        The file in :data:`DATA_DIR`.

    Raises
    ------
    ValueError
        If ``name`` is not a known dataset.
    """
    if name not in DATASET_NAMES:
        raise ValueError(
            f"unknown NIST StRD dataset name={name!r}; expected one of {DATASET_NAMES}"
        )
    return DATA_DIR / f"{name}.dat"


def _line_ranges(text: str) -> dict[str, tuple[int, int]]:
    """Return the 1-based inclusive line ranges the header announces, by section."""
    ranges = {m.group(1): (int(m.group(2)), int(m.group(3))) for m in _LINE_RANGE.finditer(text)}
    if set(ranges) != {"Certified Values", "Data"}:
        raise ValueError(f"header line ranges not found; found sections {sorted(ranges)}")
    return ranges


def _certified_block(
    lines: list[str], first: int, last: int
) -> tuple[tuple[int, ...], NDArray[np.float64], NDArray[np.float64], float]:
    """Parse the ``Bk estimate stderr`` lines and the residual SD from the certified block."""
    block = lines[first - 1 : last]
    rows = [m for m in map(_PARAM_LINE.match, block) if m is not None]
    if not rows:
        raise ValueError(f"no 'B<k>' lines in certified block (lines {first} to {last})")
    params = tuple(int(m.group(1)) for m in rows)
    estimates = np.array([float(m.group(2)) for m in rows])
    stderr = np.array([float(m.group(3)) for m in rows])
    sd = _RESIDUAL_SD.search("\n".join(block))
    if sd is None:
        raise ValueError(f"no residual standard deviation in lines {first} to {last}")
    return params, estimates, stderr, float(sd.group(1))


def _data_block(lines: list[str], first: int, last: int) -> NDArray[np.float64]:
    """Parse the numeric data rows (y first, then the predictors)."""
    rows = [[float(tok) for tok in line.split()] for line in lines[first - 1 : last]]
    widths = {len(row) for row in rows}
    if len(widths) != 1 or widths == {0}:
        raise ValueError(f"data lines {first} to {last} have ragged widths {sorted(widths)}")
    return np.array(rows, dtype=np.float64)


def _design(
    model: str, params: tuple[int, ...], predictors: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Build the design matrix for ``model`` with one column per parameter index.

    With one predictor column x, parameter Bk multiplies x**k (B0 is the intercept); with
    several predictor columns x1..xq, Bk multiplies xk. Explicit terms in the model line are
    checked against this reading.
    """
    for k, power in _POWER_TERM.findall(model):
        if k != power:
            raise ValueError(f"model term B{k}*(x**{power}) breaks the Bk*x**k pattern")
    for k, column in _PREDICTOR_TERM.findall(model):
        if k != column:
            raise ValueError(f"model term B{k}*x{column} breaks the Bk*xk pattern")
    if ("B0 +" in model) != (0 in params):
        raise ValueError(f"model {model!r} and certified parameters {params} disagree on B0")
    if predictors.shape[1] == 1:
        x = predictors[:, 0]
        columns = [np.ones_like(x) if k == 0 else x**k for k in params]
    else:
        if "x1" not in model:
            raise ValueError(f"{predictors.shape[1]} predictor columns but model {model!r}")
        ones = np.ones(predictors.shape[0])
        columns = [ones if k == 0 else predictors[:, k - 1] for k in params]
    return np.column_stack(columns)


def load_dataset(name: str) -> NistCase:
    """Read one NIST StRD linear-regression dataset.

    Parameters
    ----------
    name : str
        One of :data:`DATASET_NAMES`, e.g. ``"Filip"``.

    Returns
    -------
    NistCase
        Response, design matrix and certified values.

    Raises
    ------
    ValueError
        If the file does not follow the StRD layout (header line ranges, ``B<k>`` lines,
        observation count).
    """
    text = dataset_path(name).read_text(encoding="ascii")
    lines = text.splitlines()
    ranges = _line_ranges(text)
    params, estimates, stderr, residual_sd = _certified_block(lines, *ranges["Certified Values"])
    data = _data_block(lines, *ranges["Data"])
    model = _MODEL.search(text)
    n_obs = _OBSERVATIONS.search(text)
    if model is None or n_obs is None:
        raise ValueError(f"{name}: header lacks the model line or the observation count")
    if data.shape[0] != int(n_obs.group(1)):
        raise ValueError(f"{name}: header says {n_obs.group(1)} observations, read {data.shape[0]}")
    X = _design(model.group(1), params, data[:, 1:])
    return NistCase(
        name=name,
        y=data[:, 0].copy(),
        X=X,
        params=params,
        certified_estimates=estimates,
        certified_stderr=stderr,
        certified_residual_sd=residual_sd,
    )


def lre(computed: float, certified: float) -> float:
    """Log relative error: the number of correct significant digits, capped at 15.

    ``-log10(|x - c| / |c|)``, or ``-log10(|x - c|)`` when ``c == 0`` (McCullough, The
    American Statistician 52(4), 1998). A NaN or infinite ``computed`` scores 0; a value wrong
    by more than its own size scores below 0 (McCullough reports such scores as 0).

    Parameters
    ----------
    computed : float
        The value to score, x.
    certified : float
        The certified value, c.

    Returns
    -------
    float
        The LRE, at most 15.
    """
    x, c = float(computed), float(certified)
    if not math.isfinite(x):
        return 0.0
    err = abs(x - c) if c == 0.0 else abs(x - c) / abs(c)
    if err == 0.0:
        return LRE_CAP
    return min(LRE_CAP, -math.log10(err))


def worst_lre(computed: NDArray[np.float64], certified: NDArray[np.float64]) -> float:
    """Return the smallest :func:`lre` over paired entries of two equal-shape arrays.

    Parameters
    ----------
    computed, certified : numpy.ndarray
        Arrays of the same shape.

    Returns
    -------
    float
        min over i of ``lre(computed[i], certified[i])``.
    """
    a, b = np.ravel(computed), np.ravel(certified)
    if a.shape != b.shape:
        raise ValueError(f"shape mismatch: computed {a.shape}, certified {b.shape}")
    return min(lre(x, c) for x, c in zip(a, b, strict=True))


@dataclass(frozen=True, slots=True, eq=False)
class Floors:
    """Least LRE a backward-stable solver must score on one dataset (see :func:`floors`)."""

    coefficients: NDArray[np.float64]
    """Per certified estimate."""
    stderr: NDArray[np.float64]
    """Per certified standard deviation of an estimate."""
    residual_sd: float
    """For the residual standard deviation."""


def floors(case: NistCase, eta: float | None = None) -> Floors:
    """LRE floors of ``case`` from perturbation theory, not from observed runs.

    A least-squares solver whose backward error is columnwise, as Householder QR's is
    (Higham 2002, Thm 20.3), is within :func:`bounds.lstsq_columnwise` of the exact answer,
    computed here from the design matrix's own singular values (numpy SVD of the
    column-equilibrated matrix) and u. TSQR is Householder QR of the row blocks and then of
    stacked R factors whose column norms are those of A, so its backward error is columnwise
    too (the levels of the tree add up; Demmel, Grigori, Hoemmen, Langou, SISC 34(1) 2012, for
    the normwise form). ``eta`` is the solver's columnwise relative backward error (default:
    that of :func:`bounds.lstsq_columnwise`). Each bound becomes an LRE floor by
    :func:`bounds.lre_floor`, which also allows for the certified values' 15 digits and caps
    the floor at 15 (McCullough 1998). Where the certified value is 0 (the exact fits
    Wampler1/2: residual SD and standard deviations) the LRE is -log10|x|, so the floor is
    the absolute bound: the computed residual is then rounding noise of size at most the
    residual bound.
    """
    errors = bounds.lstsq_columnwise(case.X, case.y, case.certified_estimates, eta)
    coefficients = np.array(
        [
            bounds.lre_floor(float(e / abs(c)))
            for e, c in zip(errors.coefficients, case.certified_estimates, strict=True)
        ]
    )
    dof = case.n_obs - case.n_params
    if case.certified_residual_sd == 0.0:
        sd = errors.residual_norm / math.sqrt(dof)
        stderr = sd * errors.root_diagonal * (1 + errors.inverse_diagonal)
        return Floors(
            coefficients, np.array([bounds.lre_floor(v) for v in stderr]), bounds.lre_floor(sd)
        )
    sd_relative = errors.residual_norm / (case.certified_residual_sd * math.sqrt(dof))
    stderr = np.array([bounds.lre_floor(sd_relative + v) for v in errors.inverse_diagonal])
    return Floors(coefficients, stderr, bounds.lre_floor(sd_relative))


def condition(case: NistCase) -> float:
    """2-norm condition number of the raw design matrix (numpy SVD)."""
    s = np.linalg.svd(case.X, compute_uv=False)
    return float(s[0] / s[-1])


def equilibrated_condition(case: NistCase) -> float:
    """2-norm condition number of the design matrix with unit-norm columns (numpy SVD)."""
    s = np.linalg.svd(case.X / np.linalg.norm(case.X, axis=0), compute_uv=False)
    return float(s[0] / s[-1])


def _relative_rounding(exact: list[Fraction], stored: NDArray[np.float64]) -> float:
    """||stored - exact|| / ||exact|| in rational arithmetic (0 for an all-zero column)."""
    error = sum((Fraction(float(s)) - e) ** 2 for e, s in zip(exact, stored, strict=True))
    size = sum(e**2 for e in exact)
    return math.sqrt(error / size) if size else 0.0


def representation_error(case: NistCase) -> float:
    """Largest columnwise relative error of the binary data against the file's decimals.

    max over y and the columns a_j of ``||fl(a_j) - a_j|| / ||a_j||``, where a_j is built
    exactly (rational arithmetic, powers of the decimal x for the polynomial models) and
    fl(a_j) is :func:`load_dataset`'s float64 column. This is the columnwise backward error
    that storing the problem in binary has already made before any solver runs, so no solver,
    refined or not, can be held closer to the certified values than it allows.
    """
    text = dataset_path(case.name).read_text(encoding="ascii")
    first, last = _line_ranges(text)["Data"]
    rows = [[Fraction(tok) for tok in line.split()] for line in text.splitlines()[first - 1 : last]]
    y = [row[0] for row in rows]
    predictors = [row[1:] for row in rows]
    errors = [_relative_rounding(y, case.y)]
    for j, k in enumerate(case.params):
        if len(predictors[0]) == 1:
            exact = [p[0] ** k for p in predictors]
        else:
            exact = [Fraction(1) if k == 0 else p[k - 1] for p in predictors]
        errors.append(_relative_rounding(exact, case.X[:, j]))
    return max(errors)


def refined_floors(case: NistCase, residual_roundoff: float) -> NDArray[np.float64]:
    """Coefficient LRE floors after augmented-system iterative refinement whose residuals
    are computed with unit roundoff ``residual_roundoff`` (numpy.longdouble's in rowfold).

    Refinement with residuals in a precision u_r converges, while the solver's own forward
    error is below 1 (every :func:`floors` entry above 0), to a limiting accuracy set by the
    errors of the residual computation: a columnwise backward error of (n + 1) u_r (the
    residual b - r - A x and A^H r of n + 1 terms each; Björck, BIT 7 (1967); Higham 2002,
    sec. 20.5, from memory), taken with SAFETY as in :func:`bounds.lstsq_columnwise`. To it
    add the binary data's own error (:func:`representation_error`, exact, no safety factor)
    and the final rounding of x to float64 (SAFETY u relative, common practice).
    """
    n = case.n_params
    c, b, x = case.X, case.y, case.certified_estimates
    limiting = bounds.lstsq_columnwise(c, b, x, bounds.SAFETY * (n + 1) * residual_roundoff)
    data = bounds.lstsq_columnwise(c, b, x, representation_error(case))
    relative = (limiting.coefficients + data.coefficients) / np.abs(x)
    final = bounds.SAFETY * bounds.unit_roundoff()
    return np.array([bounds.lre_floor(float(v + final)) for v in relative])


@dataclass(frozen=True, slots=True)
class ResidualAnova:
    """The "Residual" row of a dataset's certified analysis-of-variance table."""

    degrees_of_freedom: int
    """m - p."""
    sum_of_squares: float
    """The certified residual sum of squares r^T r."""
    mean_square: float
    """r^T r / (m - p): the a posteriori variance factor with unit weights."""


def residual_anova(name: str) -> ResidualAnova:
    """Read the certified residual degrees of freedom, sum of squares and mean square.

    Raises
    ------
    ValueError
        If the file has no ``Residual <dof> <SS> <MS>`` line.
    """
    text = dataset_path(name).read_text(encoding="ascii")
    found = _RESIDUAL_ANOVA.search(text)
    if found is None:
        raise ValueError(f"{name}: no 'Residual' line in the analysis-of-variance table")
    return ResidualAnova(int(found.group(1)), float(found.group(2)), float(found.group(3)))
