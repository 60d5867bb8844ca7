"""The CholeskyQR family: CholeskyQR2 and shifted CholeskyQR3, plus shared Gram passes.

A Gram pass reads every block of A, applies the triangular factors found so far by trsm
(``X = A R1^{-1} R2^{-1} ...``), and accumulates ``X^H X`` and ``X^H B``. The Cholesky
factor of that Gram is the next factor. With factors ``R1..Rk``: ``R = Rk ... R1``,
``Q = A R1^{-1} ... Rk^{-1}`` and ``Q^H B = Rk^{-H} (X_{k-1}^H B)``.

- CholeskyQR2 (Fukaya, Nakatsukasa, Yanagisawa, Yamamoto 2014; Yamamoto et al., ETNA 44,
  2015): two passes; reliable for condition numbers below about 1e8.
- Shifted CholeskyQR3 (Fukaya, Kannan, Nakatsukasa, Yamamoto, Yanagisawa, SIAM J. Sci.
  Comput. 42(1), 2020): the first Gram gets the shift ``s = 11 (m n + n (n+1)) u ||A||_F^2``
  (||A||_F^2 bounds ||A||_2^2), then two CholeskyQR passes; reliable up to about
  ``1 / (c (m n + n (n+1)) u)``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.linalg import LinAlgError
from scipy.linalg import solve_triangular

from rowfold.blocks import BlockPlan, BlockSource
from rowfold.errors import BreakdownError
from rowfold.kernels import block_gram, cholesky_upper, cross_product, metrics, solve_right_upper
from rowfold.methods._graph import sum_tree, task
from rowfold.methods.base import Context, Engine, Factorization
from rowfold.spec import MethodSpec

# Largest condition of the second factor for which CholeskyQR2's Q is trusted: the final
# loss of orthogonality grows like u * cond(R2)^2 (common practice margin, not published).
SECOND_FACTOR_LIMIT = 1.0e2


def unit_roundoff(dtype: np.dtype) -> float:
    """u of a dtype's real part: 2^-53 for float64, 2^-24 for float32."""
    return float(np.finfo(dtype).eps) / 2


def cholqr2_limit(dtype: np.dtype) -> float:
    """Largest first-pass condition estimate CholeskyQR2 accepts: u^(-1/2), about 1e8 in
    float64 (Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44, 2015)."""
    return 1.0 / np.sqrt(unit_roundoff(dtype))


def apply_factors(block: np.ndarray, factors: Sequence[np.ndarray]) -> np.ndarray:
    """Return ``block @ inv(F1) @ inv(F2) ...`` by successive triangular solves."""
    for factor in factors:
        block = solve_right_upper(block, factor)
    return block


def gram_leaf(source: BlockSource, index: int, factors: tuple[np.ndarray, ...]) -> dict[str, Any]:
    """Gram sums of one block of ``X = A F1^{-1} F2^{-1} ...``.

    Keys ``gram`` and ``cross`` (X^H B or None); on the first pass (no factors) also the
    first-pass sums ``a_fro2`` and ``gram`` of A itself, which are the same numbers.
    """
    block, rhs = source.load(index)
    x = apply_factors(block, factors)
    sums: dict[str, Any] = metrics.gram_sums(x) if not factors else {"gram": block_gram(x)}
    sums["cross"] = None if rhs is None else cross_product(x, rhs)
    return sums


def add_gram_sums(*parts: dict[str, Any]) -> dict[str, Any]:
    """Add Gram sums (``cross`` may be None)."""
    total = dict(parts[0])
    for part in parts[1:]:
        for key, value in part.items():
            total[key] = None if value is None else total[key] + value
    return total


def q_block(block: np.ndarray, factors: tuple[np.ndarray, ...]) -> np.ndarray:
    """Form a block of Q as ``A F1^{-1} F2^{-1} ...``."""
    return apply_factors(block, factors)


def gram_pass(
    source: BlockSource, engine: Engine, factors: tuple[np.ndarray, ...], label: str
) -> dict[str, Any]:
    """One pass over the blocks; returns the summed Gram sums of ``X``."""
    leaves = [task(gram_leaf, source, i, factors) for i in range(source.blocks)]
    (total,) = engine.compute([sum_tree(leaves, add_gram_sums)], label)
    result: dict[str, Any] = total
    return result


def cholesky_or_refuse(gram: np.ndarray, method: str, stage: str, advice: str) -> np.ndarray:
    """Cholesky factor of a Gram, or BreakdownError naming the stage and the advice."""
    try:
        return cholesky_upper(gram)
    except LinAlgError as exc:
        raise BreakdownError(
            f"{method}: {stage} Cholesky broke down ({exc}); the matrix is too "
            f"ill-conditioned for {method}; {advice}"
        ) from None


def condition_estimate(R: np.ndarray) -> float:
    """2-norm condition number of a triangular factor, from its singular values."""
    return metrics.condition_from(metrics.singular_values(R))


def shift_for(gram: np.ndarray, rows: int) -> float:
    """The published shift ``11 (m n + n (n+1)) u ||A||_F^2`` (SISC 42(1), 2020)."""
    n = gram.shape[0]
    u = unit_roundoff(gram.dtype)
    return 11.0 * (rows * n + n * (n + 1)) * u * float(np.real(np.trace(gram)))


def more_passes(
    source: BlockSource,
    engine: Engine,
    factors: list[np.ndarray],
    count: int,
    method: str,
    advice: str,
) -> dict[str, Any]:
    """Run ``count`` further CholeskyQR passes, appending factors; return the last sums."""
    last: dict[str, Any] = {}
    for done in range(1, count + 1):
        stage = f"pass {len(factors) + 1}"
        last = gram_pass(source, engine, tuple(factors), f"{method}: {stage} (Gram)")
        try:
            factors.append(cholesky_or_refuse(last["gram"], method, stage, advice))
        except BreakdownError as exc:
            raise BreakdownError(str(exc), passes=done) from None
    return last


def assemble(
    factors: list[np.ndarray],
    last_cross: np.ndarray | None,
    first_sums: dict[str, Any],
    passes: int,
    blocks: int,
    details: dict[str, Any],
) -> Factorization:
    """Combine the factors into R, ``Q^H B`` and the Q recipe."""
    R = factors[0]
    for factor in factors[1:]:
        R = factor @ R
    R = np.triu(R)
    np.fill_diagonal(R, np.abs(np.real(np.diagonal(R))))
    qhb = None
    if last_cross is not None:
        qhb = solve_triangular(factors[-1], last_cross, trans="C", lower=False)
    return Factorization(
        R=R,
        qhb=qhb,
        q_kernel=q_block,
        q_recipes=[tuple(factors)] * blocks,
        passes=passes,
        sums={"a_fro2": first_sums["a_fro2"], "gram": first_sums["gram"]},
        details=details,
    )


def cholqr2_from(
    source: BlockSource, engine: Engine, first: dict[str, Any], details: dict[str, Any]
) -> Factorization:
    """CholeskyQR2 given the first pass's Gram sums (reused by ``auto``)."""
    advice = "use method.name: scholqr3 or tsqr"
    factor = cholesky_or_refuse(first["gram"], "cholqr2", "first", advice)
    estimate = condition_estimate(factor)
    details = {**details, "first_pass_condition_estimate": estimate}
    limit = cholqr2_limit(factor.dtype)
    if not estimate < limit:
        raise BreakdownError(
            f"cholqr2: first-pass condition estimate {estimate:.3g} exceeds {limit:.2g}; "
            f"CholeskyQR2 cannot guarantee an orthogonal Q here; {advice}"
        )
    factors = [factor]
    last = more_passes(source, engine, factors, 1, "cholqr2", advice)
    second = condition_estimate(factors[1])
    if second > SECOND_FACTOR_LIMIT:
        raise BreakdownError(
            f"cholqr2: the second pass still has condition {second:.3g}, so Q would not be "
            f"orthogonal to working accuracy; {advice}",
            passes=1,
        )
    details["second_pass_condition"] = second
    return assemble(factors, last["cross"], first, 2, source.blocks, details)


def scholqr3_from(
    source: BlockSource, engine: Engine, first: dict[str, Any], rows: int, details: dict[str, Any]
) -> Factorization:
    """Shifted CholeskyQR3 given the first pass's Gram sums (reused by ``auto``)."""
    advice = "use method.name: tsqr"
    shift = shift_for(first["gram"], rows)
    shifted = first["gram"] + shift * np.eye(first["gram"].shape[0])
    factor = cholesky_or_refuse(shifted, "scholqr3", "shifted first", advice)
    details = {
        **details,
        "shift": shift,
        "first_pass_condition_estimate": condition_estimate(factor),
    }
    factors = [factor]
    last = more_passes(source, engine, factors, 2, "scholqr3", advice)
    return assemble(factors, last["cross"], first, 3, source.blocks, details)


def cholqr2(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run CholeskyQR2 over the plan's row blocks."""
    engine = ctx.engine
    first = gram_pass(plan, engine, (), "cholqr2: pass 1 (Gram)")
    return cholqr2_from(plan, engine, first, {})


def scholqr3(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run shifted CholeskyQR3 over the plan's row blocks."""
    engine = ctx.engine
    first = gram_pass(plan, engine, (), "scholqr3: pass 1 (Gram)")
    return scholqr3_from(plan, engine, first, plan.rows, {})
