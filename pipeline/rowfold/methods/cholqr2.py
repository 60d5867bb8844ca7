"""CholeskyQR2: two passes of Gram + Cholesky, the second on ``Q1 = A R1^{-1}``.

Pass 1 accumulates ``G = A^H A`` (syrk per block, summed in a tree) and ``A^H B``;
``R1 = chol(G)``. Pass 2 forms each block of ``Q1 = A R1^{-1}`` by trsm and accumulates
``Q1^H Q1`` and ``Q1^H B``; ``R2 = chol(Q1^H Q1)``. Then ``R = R2 R1``, ``Q = Q1 R2^{-1}``
and ``Q^H B = R2^{-H} Q1^H B``.

It is reliable when A's condition number is below about 1e8 (Yamamoto, Nakatsukasa,
Yanagisawa, Fukaya, ETNA 44, 2015). Above that, or when a Cholesky factorization breaks
down, it refuses with :class:`~rowfold.errors.BreakdownError` rather than return a Q it
cannot vouch for.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.linalg import LinAlgError
from scipy.linalg import solve_triangular

from rowfold.blocks import BlockPlan, load_block
from rowfold.errors import BreakdownError
from rowfold.kernels import block_gram, cholesky_upper, cross_product, solve_right_upper
from rowfold.kernels.metrics import condition_from, singular_values
from rowfold.methods._graph import sum_tree, task
from rowfold.methods.base import Engine, Factorization
from rowfold.spec import MethodSpec

# Largest first-pass condition estimate CholeskyQR2 accepts (about u^(-1/2); ETNA 44, 2015).
CONDITION_LIMIT = 1.0e8


def gram_leaf(plan: BlockPlan, index: int, inverse_r: np.ndarray | None) -> tuple[Any, Any]:
    """Return (X^H X, X^H B) for one block, with ``X = A`` or ``X = A inverse_r``."""
    block, rhs = load_block(plan, index)
    if inverse_r is not None:
        block = solve_right_upper(block, inverse_r)
    cross = None if rhs is None else cross_product(block, rhs)
    return block_gram(block), cross


def add_pairs(*parts: tuple[Any, Any]) -> tuple[Any, Any]:
    """Add (gram, cross) pairs."""
    gram = sum(part[0] for part in parts[1:]) + parts[0][0]
    cross = None if parts[0][1] is None else sum(part[1] for part in parts[1:]) + parts[0][1]
    return gram, cross


def q_block(block: np.ndarray, factors: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Form a block of Q as ``(A R1^{-1}) R2^{-1}`` by two triangular solves."""
    first, second = factors
    return solve_right_upper(solve_right_upper(block, first), second)


def _gram_pass(
    plan: BlockPlan, engine: Engine, inverse_r: np.ndarray | None, label: str
) -> tuple[np.ndarray, np.ndarray | None]:
    leaves = [task(gram_leaf, plan, i, inverse_r) for i in range(plan.blocks)]
    (total,) = engine.compute([sum_tree(leaves, add_pairs)], label)
    return total[0], total[1]


def _cholesky(gram: np.ndarray, stage: str) -> np.ndarray:
    try:
        return cholesky_upper(gram)
    except LinAlgError as exc:
        raise BreakdownError(
            f"cholqr2: {stage} Cholesky broke down ({exc}); the matrix is too ill-conditioned "
            "for CholeskyQR2; use method.name: tsqr"
        ) from None


def factor(plan: BlockPlan, spec: MethodSpec, engine: Engine, want_q: bool) -> Factorization:
    """Run CholeskyQR2 over the plan's row blocks."""
    gram, _cross = _gram_pass(plan, engine, None, "cholqr2: pass 1 (Gram)")
    first = _cholesky(gram, "first")
    estimate = condition_from(singular_values(first))
    if not estimate < CONDITION_LIMIT:
        raise BreakdownError(
            f"cholqr2: first-pass condition estimate {estimate:.3g} exceeds {CONDITION_LIMIT:.0e}; "
            "CholeskyQR2 cannot guarantee an orthogonal Q here; use method.name: tsqr"
        )
    gram2, cross2 = _gram_pass(plan, engine, first, "cholqr2: pass 2 (Gram of A R1^-1)")
    second = _cholesky(gram2, "second")
    R = np.triu(second @ first)
    np.fill_diagonal(R, np.abs(np.real(np.diagonal(R))))
    qhb = None
    if cross2 is not None:
        qhb = solve_triangular(second, cross2, trans="C", lower=False)
    return Factorization(
        R=R,
        qhb=qhb,
        q_kernel=q_block,
        q_recipes=[(first, second)] * plan.blocks,
        passes=2,
        sums={"a_fro2": float(np.real(np.trace(gram))), "gram": gram},
        details={"first_pass_condition_estimate": estimate},
    )
