"""Least squares from R and ``Q^H b``: x, rank, residual statistics and standard errors.

Rank rule (documented in the README): the numerical rank is the number of singular
values of the column-scaled factor ``R D^{-1}`` above ``tol * sigma_1``, with
``tol = 10 n eps`` unless ``solve.rank_tolerance`` is set. D holds the power of two nearest
each column norm of R (which equal those of A), so ``R D^{-1}`` is exact and its columns
have norms in [2^-0.5, 2^0.5); equilibrating first makes the rank independent of the units
of the columns. This keeps, for example, NIST's Filip (condition 1.8e15 raw, about 5e9
equilibrated) at full rank.

At full rank x solves ``R x = Q^H b`` by back substitution. Below full rank everything
comes from the one truncated SVD ``R D^{-1} = U S V^H`` that decided the rank: the null
space (the trailing columns of V), the solution ``x = D^{-1} V_r S_r^{-1} U_r^H Q^H b``
(the least-squares solution of least norm in the scaled variables ``y = D x``), the factor
``D^{-1} V_r S_r^{-1}`` of the covariance, and the range basis ``U_r`` from which the
leverages are taken (``h_i = ||q_i U_r||^2``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular, svd

from rowfold.kernels.norms import column_norms, power_of_two_scale, row_norms


@dataclass(frozen=True)
class Solution:
    """A least-squares solution and what is needed for its statistics.

    Attributes
    ----------
    x : ndarray (n, k)
    rank : int
    tolerance : float
        Relative singular-value cut-off used for the rank.
    deficient_columns : list of int
        Columns that take part in the numerical null space (empty at full rank).
    inverse_rows : ndarray (n, r)
        A factor W of the covariance of x per unit variance (``(R^H R)^{-1} = W W^H`` at
        full rank; the truncated ``D^{-1} V_r S_r^{-2} V_r^H D^{-1}`` below it); its row
        norms give the standard errors.
    range_basis : ndarray (n, r) or None
        Below full rank, ``U_r``: Q U_r is an orthonormal basis of the rank-r column space
        of A, whose squared row norms are the leverages. None at full rank (then Q itself).
    scaled_singular_values : ndarray (n,) or None
        The singular values of the column-equilibrated ``R D^{-1}`` that decided the rank
        (``sigma_1 / sigma_r`` is the condition that bounds the error of the leverages).
    """

    x: np.ndarray
    rank: int
    tolerance: float
    deficient_columns: list[int]
    inverse_rows: np.ndarray
    range_basis: np.ndarray | None = None
    scaled_singular_values: np.ndarray | None = None

    def scaled_condition(self) -> float:
        """``sigma_1 / sigma_r`` of ``R D^{-1}`` (inf at rank 0, NaN when not recorded)."""
        sigma = self.scaled_singular_values
        if sigma is None:
            return float("nan")
        if self.rank == 0:
            return float("inf")
        return float(sigma[0] / sigma[self.rank - 1])


def rank_tolerance(n: int, dtype: np.dtype, given: float | None) -> float:
    """Return the relative rank cut-off: ``given`` or ``10 n eps``."""
    return given if given is not None else 10.0 * n * float(np.finfo(dtype).eps)


def column_scale(R: np.ndarray) -> np.ndarray:
    """D: the power of two nearest each column norm of R (1 for a zero column)."""
    return power_of_two_scale(column_norms(R))


def equilibrated(R: np.ndarray) -> np.ndarray:
    """Return ``R D^{-1}`` (exact: D holds powers of two; see :func:`column_scale`)."""
    return np.asarray(R / column_scale(R).astype(R.real.dtype))


@dataclass(frozen=True)
class _RankDecision:
    """The SVD of ``R D^{-1}`` and the rank it gives."""

    scale: np.ndarray
    u: np.ndarray
    sigma: np.ndarray
    vh: np.ndarray
    rank: int

    def deficient_columns(self) -> list[int]:
        """Columns taking part in the numerical null space (weight above 1e-2)."""
        if self.rank == self.sigma.size:
            return []
        weight = row_norms(self.vh[self.rank :].conj().T)
        return [int(j) for j in np.flatnonzero(weight > 1e-2)]


def _decide_rank(R: np.ndarray, tol: float) -> _RankDecision:
    """SVD of the column-scaled R, and the number of singular values above tol * sigma_1."""
    scale = column_scale(R)
    u, sigma, vh = svd(R / scale.astype(R.real.dtype), check_finite=False)
    rank = 0 if sigma.size == 0 or sigma[0] == 0 else int(np.sum(sigma > tol * sigma[0]))
    return _RankDecision(scale, u, sigma, vh, rank)


def numerical_rank(R: np.ndarray, tol: float) -> tuple[int, list[int]]:
    """Return the rank of R by the module's rule, and the columns in its null space."""
    decision = _decide_rank(R, tol)
    if decision.rank == 0:
        return 0, list(range(R.shape[1]))
    return decision.rank, decision.deficient_columns()


def solve(R: np.ndarray, qhb: np.ndarray, given_tolerance: float | None = None) -> Solution:
    """Solve ``min ||A x - b||`` from A's thin-QR factor R and ``Q^H b``.

    Parameters
    ----------
    R : ndarray (n, n)
        Upper triangular factor.
    qhb : ndarray (n, k)
        ``Q^H b`` for k right-hand sides.
    given_tolerance : float, optional
        Relative rank cut-off; default ``10 n eps``.
    """
    n = R.shape[1]
    tol = rank_tolerance(n, R.dtype, given_tolerance)
    decision = _decide_rank(R, tol)
    if decision.rank == n:
        x = solve_triangular(R, qhb, lower=False, check_finite=False)
        inverse = solve_triangular(R, np.eye(n, dtype=R.dtype), lower=False, check_finite=False)
        return Solution(x, n, tol, [], inverse, None, decision.sigma)
    r = decision.rank
    unscale = (1.0 / decision.scale).astype(R.real.dtype)[:, None]
    inverse = unscale * (decision.vh[:r].conj().T / decision.sigma[:r])
    x = inverse @ (decision.u[:, :r].conj().T @ qhb)
    deficient = decision.deficient_columns() if r else list(range(n))
    return Solution(x, r, tol, deficient, inverse, decision.u[:, :r], decision.sigma)


@dataclass(frozen=True)
class Statistics:
    """Residual statistics per right-hand side.

    Attributes
    ----------
    residual_norm : ndarray (k,)
    degrees_of_freedom : int
        m - rank.
    residual_std : ndarray (k,)
        ``sqrt(||r||^2 / (m - rank))``; NaN when there are no degrees of freedom.
    x_stderr : ndarray (n, k)
        ``residual_std * sqrt(diag((R^H R)^+))``, from the rows of R's (pseudo-)inverse.
    """

    residual_norm: np.ndarray
    degrees_of_freedom: int
    residual_std: np.ndarray
    x_stderr: np.ndarray


def statistics(
    solution: Solution,
    residual_sq: np.ndarray,
    rows: int,
    residual_norm: np.ndarray | None = None,
) -> Statistics:
    """Return residual norms, residual SD and standard errors of x.

    ``residual_norm`` (the norms themselves, summed without overflow or underflow, see
    :mod:`rowfold.kernels.norms`) is used when given; otherwise ``sqrt(residual_sq)``.
    """
    dof = rows - solution.rank
    if residual_norm is None:
        residual_norm = np.sqrt(np.asarray(residual_sq, dtype=float))
    norms = np.asarray(residual_norm, dtype=float).reshape(-1)
    std = norms / np.sqrt(dof) if dof > 0 else np.full_like(norms, np.nan)
    scale = row_norms(solution.inverse_rows)
    return Statistics(norms, dof, std, scale[:, None] * std[None, :])
