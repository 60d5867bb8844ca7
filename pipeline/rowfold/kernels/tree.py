"""Reduce many square triangular factors to one: a binary tree of stacked QRs.

Each factor ``T_i`` (p x p, upper triangular, here the factor of one segment's ``[A | b]``)
satisfies ``T_i^H T_i = X_i^H X_i`` for that segment's rows ``X_i``. The factor of all the
segments together is the R of the stacked ``[T_1; T_2; ...]``, found pairwise: two factors
are stacked (2p x p) and factored by Householder QR, as a TSQR reduction node does.

:func:`reduce_factors` consumes an iterable and keeps at most one factor per tree level
(a binary counter), so ``S`` segments need ``ceil(log2 S) + 2`` factors in memory at a
time, never all ``S``: 1000 segments at p = 2000 hold about 12 x 32 MB.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from rowfold.kernels.householder import stacked_r
from rowfold.kernels.signs import positive_diagonal


def triangular(factor: np.ndarray) -> np.ndarray:
    """An upper triangular T with a real non-negative diagonal and ``T^H T = F^H F``.

    ``factor`` may be any square or tall matrix (for example a symmetric square root of a
    Gram matrix); a triangular one comes back with only its signs normalised.
    """
    work = np.asarray(factor)
    if work.size and not np.array_equal(work, np.triu(work)):
        work, _, _ = stacked_r([(work, None)], keep_q=False)
        work = work[: work.shape[1]]
    out, _ = positive_diagonal(np.array(work[: work.shape[1]], copy=True))
    return out


def combine(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """The triangular factor of two stacked triangular factors (one tree node)."""
    reduced, _, _ = stacked_r([(first, None), (second, None)], keep_q=False)
    out, _ = positive_diagonal(reduced)
    return out


def reduce_factors(factors: Iterable[np.ndarray]) -> np.ndarray:
    """Reduce triangular factors to one by a balanced binary tree, streaming.

    Parameters
    ----------
    factors : iterable of ndarray (p, p)
        Upper triangular factors, in row order; read one at a time.

    Returns
    -------
    ndarray (p, p)
        Upper triangular with a real non-negative diagonal.

    Raises
    ------
    ValueError
        When ``factors`` is empty.
    """
    levels: list[tuple[int, np.ndarray]] = []
    for factor in factors:
        level, node = 0, np.asarray(factor)
        while levels and levels[-1][0] == level:
            _, left = levels.pop()
            node, level = combine(left, node), level + 1
        levels.append((level, node))
    if not levels:
        raise ValueError("no factors to reduce")
    _, node = levels.pop()
    while levels:
        _, left = levels.pop()
        node = combine(left, node)
    if len(node):
        node, _ = positive_diagonal(node)
    return node
