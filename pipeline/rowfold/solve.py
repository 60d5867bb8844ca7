"""Least squares from R and ``Q^H b``: x, rank, residual statistics and standard errors.

Rank rule (documented in the README): the numerical rank is the number of singular
values of the column-equilibrated factor ``R D^{-1}`` (D = column norms of R, which equal
those of A) above ``tol * sigma_1``, with ``tol = 10 n eps`` unless ``solve.rank_tolerance``
is set. Equilibrating first makes the rank independent of the units of the columns; this
keeps, for example, NIST's Filip (condition 1.8e15 raw, about 5e9 equilibrated) at full
rank. At full rank x solves ``R x = Q^H b`` by back substitution; below full rank x is the
minimum-norm least-squares solution from a truncated SVD of R.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular, svd


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
        A factor W with ``(R^H R)^+ = W W^H``; its row norms give the standard errors.
    """

    x: np.ndarray
    rank: int
    tolerance: float
    deficient_columns: list[int]
    inverse_rows: np.ndarray


def rank_tolerance(n: int, dtype: np.dtype, given: float | None) -> float:
    """Return the relative rank cut-off: ``given`` or ``10 n eps``."""
    return given if given is not None else 10.0 * n * float(np.finfo(dtype).eps)


def equilibrated(R: np.ndarray) -> np.ndarray:
    """Return R with unit-norm columns (zero columns left at zero)."""
    norms = np.linalg.norm(R, axis=0)
    return R / np.where(norms > 0, norms, 1.0)


def numerical_rank(R: np.ndarray, tol: float) -> tuple[int, list[int]]:
    """Return the rank of R by the module's rule, and the columns in its null space."""
    n = R.shape[1]
    _, sigma, vh = svd(equilibrated(R), check_finite=False)
    if sigma.size == 0 or sigma[0] == 0:
        return 0, list(range(n))
    rank = int(np.sum(sigma > tol * sigma[0]))
    if rank == n:
        return rank, []
    weight = np.linalg.norm(vh[rank:].conj().T, axis=1)
    return rank, [int(j) for j in np.flatnonzero(weight > 1e-2)]


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
    rank, deficient = numerical_rank(R, tol)
    if rank == n:
        x = solve_triangular(R, qhb, lower=False, check_finite=False)
        inverse = solve_triangular(R, np.eye(n, dtype=R.dtype), lower=False, check_finite=False)
        return Solution(x, rank, tol, [], inverse)
    u, sigma, vh = svd(R, check_finite=False)
    inverse = vh[:rank].conj().T / sigma[:rank]
    x = inverse @ (u[:, :rank].conj().T @ qhb)
    return Solution(x, rank, tol, deficient, inverse)


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


def statistics(solution: Solution, residual_sq: np.ndarray, rows: int) -> Statistics:
    """Return residual norms, residual SD and standard errors of x."""
    dof = rows - solution.rank
    res2 = np.asarray(residual_sq, dtype=float)
    std = np.sqrt(res2 / dof) if dof > 0 else np.full_like(res2, np.nan)
    scale = np.sqrt(np.sum(np.abs(solution.inverse_rows) ** 2, axis=1))
    return Statistics(np.sqrt(res2), dof, std, scale[:, None] * std[None, :])
