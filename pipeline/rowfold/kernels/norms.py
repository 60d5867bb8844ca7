"""Euclidean norms that neither overflow nor underflow, and power-of-two scalings.

A sum of squares overflows once the entries pass about 1e154 and loses its digits once they
fall below about 1e-154, long before the norm itself leaves float64's range. Each function
here first takes the plain sum of squares (one BLAS-speed pass) and, only for the columns
where that sum is not safely inside the normal range, sums again after scaling by a power
of two, which is exact (the approach of LAPACK's ``lassq`` and BLAS ``nrm2``). Norms of
parts combine with ``hypot`` (:class:`RootSumSquares`), which is just as safe.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# A sum of squares of count terms at least count * TINY / EPS has lost nothing to
# underflow (each term errs by at most 2^-1075 absolutely), and a finite one nothing to
# overflow (a term that overflows makes the sum infinite).
_TINY = float(np.finfo(np.float64).tiny)
_EPS = float(np.finfo(np.float64).eps)

# Exponent range of the power-of-two multipliers: 2.0**k is a normal number for these k.
_MIN_EXPONENT, _MAX_EXPONENT = -1022, 1023


def _safe_lower(count: int) -> float:
    """Smallest sum of ``count`` squares that lost nothing to underflow."""
    return max(count, 1) * _TINY / _EPS


def column_norms(matrix: np.ndarray) -> np.ndarray:
    """2-norm of every column of a 2-D array (real, float64), without overflow or underflow.

    Examples
    --------
    >>> column_norms(np.array([[3e200, 1e-200], [4e200, 0.0]]))
    array([5.e+200, 1.e-200])
    """
    values = np.asarray(matrix)
    rows, cols = values.shape
    if rows == 0:
        return np.zeros(cols)
    if np.iscomplexobj(values):
        squares = np.real(np.einsum("ij,ij->j", values.conj(), values))
    else:
        squares = np.einsum("ij,ij->j", values, values, dtype=np.float64)
    norms = np.sqrt(squares)
    unsafe = ~(np.isfinite(squares) & (squares >= _safe_lower(rows)))
    for j in np.flatnonzero(unsafe):
        norms[j] = _scaled_norm(np.abs(values[:, j]).astype(np.float64, copy=False))
    return np.asarray(norms, dtype=np.float64)


def row_norms(matrix: np.ndarray) -> np.ndarray:
    """2-norm of every row of a 2-D array, without overflow or underflow."""
    return column_norms(np.asarray(matrix).T)


def frobenius(matrix: np.ndarray) -> float:
    """Frobenius norm (2-norm of a vector) without overflow or underflow."""
    values = np.ravel(np.asarray(matrix))
    if values.size == 0:
        return 0.0
    square = float(np.real(np.vdot(values, values)))
    if np.isfinite(square) and square >= _safe_lower(values.size):
        return float(np.sqrt(square))
    return _scaled_norm(np.abs(values).astype(np.float64, copy=False))


def _scaled_norm(magnitude: np.ndarray) -> float:
    """2-norm of non-negative values after scaling the largest to [0.5, 1) by 2^-e."""
    largest = float(np.max(magnitude)) if magnitude.size else 0.0
    if largest == 0.0 or not np.isfinite(largest):
        return largest
    exponent = int(np.frexp(largest)[1])
    scaled = np.ldexp(magnitude, -exponent)
    return float(np.ldexp(np.sqrt(np.dot(scaled, scaled)), exponent))


def power_of_two_scale(norms: np.ndarray) -> np.ndarray:
    """The power of two nearest each norm (``2^round(log2 norm)``); 1 for zero norms.

    Dividing a column by it is exact, leaves its norm in [2^-0.5, 2^0.5), and never
    overflows: the exponent is clamped to the normal range of float64 (a column whose norm
    is below 2^-1022 keeps a norm below 1 after division, which is still exact).
    """
    values = np.asarray(norms, dtype=np.float64)
    positive = values > 0
    logs = np.log2(np.where(positive, values, 1.0))
    exponent = np.clip(np.round(logs), _MIN_EXPONENT, _MAX_EXPONENT)
    return np.where(positive, np.ldexp(1.0, exponent.astype(int)), 1.0)


@dataclass(frozen=True)
class RootSumSquares:
    """Norms of parts of a vector (or of each column), added as norms.

    ``a + b`` is ``hypot(a, b)``: the norm of the two parts together, with neither overflow
    nor underflow, so a tree of block sums gives the norm of the whole (relative error of
    order u per level of the tree).

    Attributes
    ----------
    value : ndarray
        The norm (0-d) or one norm per column.
    """

    value: np.ndarray

    def __add__(self, other: RootSumSquares) -> RootSumSquares:
        return RootSumSquares(np.hypot(self.value, other.value))


def add_norms(*parts: RootSumSquares) -> RootSumSquares:
    """Combine norms of parts (a tree-sum combiner)."""
    total = parts[0]
    for part in parts[1:]:
        total = total + part
    return total


def column_norm_sums(matrix: np.ndarray) -> RootSumSquares:
    """Column norms of a block, ready to add over blocks."""
    return RootSumSquares(column_norms(matrix))


def norm_sum(matrix: np.ndarray) -> RootSumSquares:
    """Frobenius norm of a block, ready to add over blocks."""
    return RootSumSquares(np.asarray(frobenius(matrix)))
