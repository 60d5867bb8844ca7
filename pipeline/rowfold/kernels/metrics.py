"""Per-block quality sums and the small metrics built from their totals.

The first pass of every method adds :func:`gram_sums` over the row blocks; the
verification pass adds :func:`block_sums`; :func:`add_sums` adds them, and the functions
below turn the totals into report figures.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from scipy.linalg import svdvals

from rowfold.kernels import norms
from rowfold.kernels.householder import as_columns

Sums = dict[str, Any]
"""Per-block sums inside a pass's tasks, keyed by name; the totals leave a stage typed, as
:class:`FirstPassSums` and :class:`VerificationSums`."""


@dataclass(frozen=True, slots=True)
class FirstPassSums:
    """Totals of the first pass over A, which every method adds while it reads the blocks.

    Attributes
    ----------
    a_fro2 : float
        ``||A||_F^2``.
    gram : ndarray (n, n)
        ``A^H A``.
    """

    a_fro2: float
    gram: np.ndarray

    @classmethod
    def of(cls, sums: Sums) -> FirstPassSums:
        """From the added :func:`gram_sums` of the blocks."""
        return cls(float(sums["a_fro2"]), np.asarray(sums["gram"]))


@dataclass(frozen=True, slots=True)
class VerificationSums:
    """Totals of the verification pass (see :func:`block_sums`); a figure that was not
    measured is None.

    Attributes
    ----------
    res2 : ndarray (k,) or None
        ``||r||^2`` per right-hand side.
    res_norm : RootSumSquares or None
        The same as norms, free of overflow and underflow.
    rtr, ahr : ndarray or None
        ``r^H r`` (k x k) and ``A^H r`` (n x k).
    qhq : ndarray (n, n) or None
        ``Q^H Q`` of the Q blocks as stored.
    defect, a_norm : RootSumSquares or None
        ``||A - Q R||_F`` and ``||A||_F``.
    rows_used : int or None
        Rows of nonzero weight (None without weights: every row).
    """

    res2: np.ndarray | None = None
    res_norm: norms.RootSumSquares | None = None
    rtr: np.ndarray | None = None
    ahr: np.ndarray | None = None
    qhq: np.ndarray | None = None
    defect: norms.RootSumSquares | None = None
    a_norm: norms.RootSumSquares | None = None
    rows_used: int | None = None

    @classmethod
    def of(cls, sums: Sums) -> VerificationSums:
        """From the added :func:`block_sums` of the blocks (and ``rows_used``)."""
        known = {f.name for f in fields(cls)}
        unknown = set(sums) - known
        if unknown:
            raise KeyError(f"verification sums with unknown names: {sorted(unknown)}")
        return cls(**sums)

    @property
    def measured(self) -> bool:
        """Whether the pass measured anything (it was made)."""
        return any(getattr(self, f.name) is not None for f in fields(self))

    def rows_counted(self, rows: int) -> int:
        """Rows of nonzero weight, ``rows`` when every row counts (no weights)."""
        return rows if self.rows_used is None else int(self.rows_used)


def gram_sums(block: np.ndarray) -> Sums:
    """Return the first-pass sums of a block: ``a_fro2`` (||A_i||_F^2), ``gram`` (A_i^H A_i)."""
    from rowfold.kernels.gram import block_gram

    gram = block_gram(block)
    return {"a_fro2": float(np.real(np.trace(gram))), "gram": gram}


def block_sums(
    block: np.ndarray,
    rhs: np.ndarray | None,
    x: np.ndarray | None,
    R: np.ndarray,
    Q: np.ndarray | None,
) -> Sums:
    """Return the verification sums of one row block.

    Keys: with rhs and x, ``res2`` (||r_i||^2 per column), ``res_norm`` (the same as norms,
    :class:`~rowfold.kernels.norms.RootSumSquares`, free of overflow and underflow),
    ``rtr`` (r_i^H r_i, k x k) and ``ahr`` (A_i^H r_i); with Q, ``qhq`` (Q_i^H Q_i),
    ``defect`` (||A_i - Q_i R||_F) and ``a_norm`` (||A_i||_F), the last two as
    RootSumSquares.

    Q is measured as given (the caller passes it in the dtype it is stored in); its Gram is
    accumulated in at least float64, so a float32 Q's figure is that of the float32 values
    and not of their float32 rounding errors.
    """
    sums: Sums = {}
    if rhs is not None and x is not None:
        residual = as_columns(rhs) - block @ as_columns(x)
        sums["res2"] = np.sum(np.abs(residual) ** 2, axis=0)
        sums["res_norm"] = norms.column_norm_sums(residual)
        sums["rtr"] = residual.conj().T @ residual
        sums["ahr"] = block.conj().T @ residual
    if Q is not None:
        sums["qhq"] = measured_gram(Q)
        sums["defect"] = norms.norm_sum(block - Q @ R.astype(Q.dtype, copy=False))
        sums["a_norm"] = norms.norm_sum(block)
    return sums


def measured_gram(Q: np.ndarray) -> np.ndarray:
    """``Q^H Q`` accumulated in float64 (complex128) at least, piece by piece."""
    from rowfold.kernels.gram import gram_upper, hermitian_from_upper

    wide = np.promote_types(Q.dtype, np.float64)
    upper = np.zeros((Q.shape[1], Q.shape[1]), dtype=wide)
    for start in range(0, Q.shape[0], MEASURE_ROWS):
        upper += gram_upper(np.asarray(Q[start : start + MEASURE_ROWS], dtype=wide))
    return hermitian_from_upper(upper)


# Rows of Q widened at a time by measured_gram (a cache-sized piece; common practice).
MEASURE_ROWS = 2048


def add_sums(*parts: Sums) -> Sums:
    """Add quality sums key by key.

    A sum that overflows becomes inf or NaN silently here: the figures built from it check
    for that and say so (see :mod:`rowfold.kernels.norms`), so no warning is printed.
    """
    total: Sums = dict(parts[0])
    with np.errstate(over="ignore", invalid="ignore"):
        for part in parts[1:]:
            for key, value in part.items():
                total[key] = total[key] + value
    return total


def add_arrays(*parts: np.ndarray) -> np.ndarray:
    """Add arrays (a tree-sum combiner)."""
    total = np.array(parts[0], copy=True)
    for part in parts[1:]:
        total = total + part
    return total


def orthogonality_loss(qhq: np.ndarray) -> float:
    """Return ``||I - Q^H Q||_F``."""
    return norms.frobenius(np.eye(qhq.shape[0]) - qhq)


def gram_range_problem(gram: np.ndarray, rows: int) -> str | None:
    """Why ``A^H A`` cannot stand for A in its dtype, or None when it can.

    ``"overflows"`` when an entry is not finite; ``"underflows"`` when its largest diagonal
    entry (a squared column norm) is positive but below :func:`underflow_limit`, so the
    squares of the entries fell below the dtype's normal range and lost their digits.
    """
    if not np.all(np.isfinite(gram)):
        return "overflows"
    diagonal = np.real(np.diagonal(gram))
    top = float(np.max(diagonal)) if diagonal.size else 0.0
    if 0 < top < underflow_limit(rows, gram.dtype):
        return "underflows"
    return None


def underflow_limit(rows: int, dtype: Any = np.float64) -> float:
    """Smallest squared column norm of ``rows`` entries whose squares all kept their digits
    (``rows * tiny / eps`` of the dtype: each square errs by at most tiny * eps)."""
    info = np.finfo(np.dtype(dtype))
    return max(rows, 1) * float(info.tiny) / float(info.eps)


def gram_residual(gram: np.ndarray, R: np.ndarray, rows: int) -> float | None:
    """Return ``||A^H A - R^H R||_F / ||A||_F^2`` (0 for a zero matrix), or None when the
    accumulated ``A^H A`` is out of float64's range (see :func:`gram_range_problem`).

    Both terms are scaled by the same power of two before they are subtracted (exact), so
    the figure neither overflows nor underflows while A^H A itself is representable.
    """
    if gram_range_problem(gram, rows) is not None:
        return None
    diagonal = np.real(np.diagonal(gram))
    top = float(np.max(diagonal)) if diagonal.size else 0.0
    if top == 0:
        return 0.0
    half = int(np.frexp(top)[1]) // 2
    scaled_gram = gram * 2.0 ** (-2 * half)
    scaled_r = R * 2.0 ** (-half)
    trace = float(np.sum(np.real(np.diagonal(scaled_gram))))
    return norms.frobenius(scaled_gram - scaled_r.conj().T @ scaled_r) / trace


def singular_values(R: np.ndarray) -> np.ndarray:
    """Singular values of R, descending, by SVD of R itself (never eig(R^H R))."""
    if R.size == 0:
        return np.zeros(0)
    return np.asarray(svdvals(R, check_finite=False))


def condition_from(sigma: np.ndarray) -> float:
    """2-norm condition number from singular values (inf when the smallest is 0)."""
    if sigma.size == 0:
        return 1.0
    return float(sigma[0] / sigma[-1]) if sigma[-1] > 0 else float("inf")


def normal_equations_residual(
    ahr: np.ndarray, norm_a: float, residual_norm: np.ndarray
) -> np.ndarray:
    """Return ``||A^H r_j|| / (||A||_2 ||r_j||)`` per right-hand side (0 where r_j = 0).

    Divided one factor at a time, so the product in the denominator never overflows.
    """
    res = np.asarray(residual_norm, dtype=float).reshape(-1)
    num = norms.column_norms(as_columns(np.asarray(ahr)))
    defined = (res > 0) & (norm_a > 0)
    ratio = num / np.where(defined, res, 1.0) / (norm_a if norm_a > 0 else 1.0)
    return np.where(defined, ratio, 0.0)
