"""Per-block quality sums and the small metrics built from their totals.

The first pass of every method adds :func:`gram_sums` over the row blocks; the
verification pass adds :func:`block_sums`; :func:`add_sums` adds them, and the functions
below turn the totals into report figures.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.linalg import svdvals

from rowfold.kernels.householder import as_columns

Sums = dict[str, Any]


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

    Keys: with rhs and x, ``res2`` (||r_i||^2 per column), ``rtr`` (r_i^H r_i, k x k) and
    ``ahr`` (A_i^H r_i); with Q,
    ``qhq`` (Q_i^H Q_i) and ``defect2`` (||A_i - Q_i R||_F^2).
    """
    from rowfold.kernels.gram import block_gram

    sums: Sums = {}
    if rhs is not None and x is not None:
        residual = as_columns(rhs) - block @ as_columns(x)
        sums["res2"] = np.sum(np.abs(residual) ** 2, axis=0)
        sums["rtr"] = residual.conj().T @ residual
        sums["ahr"] = block.conj().T @ residual
    if Q is not None:
        sums["qhq"] = block_gram(Q)
        defect = block - Q @ R
        sums["defect2"] = float(np.vdot(defect, defect).real)
    return sums


def add_sums(*parts: Sums) -> Sums:
    """Add quality sums key by key."""
    total: Sums = dict(parts[0])
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
    return float(np.linalg.norm(np.eye(qhq.shape[0]) - qhq))


def gram_residual(gram: np.ndarray, R: np.ndarray, a_fro2: float) -> float:
    """Return ``||A^H A - R^H R||_F / ||A||_F^2`` (0 for a zero matrix)."""
    if a_fro2 == 0:
        return 0.0
    return float(np.linalg.norm(gram - R.conj().T @ R) / a_fro2)


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


def normal_equations_residual(ahr: np.ndarray, norm_a: float, res2: np.ndarray) -> np.ndarray:
    """Return ``||A^H r_j|| / (||A||_2 ||r_j||)`` per right-hand side (0 where r_j = 0)."""
    res = np.sqrt(res2)
    num = np.linalg.norm(ahr, axis=0)
    den = norm_a * res
    return np.where(den > 0, num / np.where(den > 0, den, 1), 0.0)
