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

Sparse (CSR) input: the first Gram is taken from the CSR blocks (cost ~ nnz per row
squared, per row). Later passes form ``X = A F1^{-1} F2^{-1} ...`` as the sparse product
``A @ inv(F1)`` (``inv(F1)`` formed once by a triangular solve on the identity; cost
nnz * n) followed by triangular solves with the later factors, and take its Gram by syrk.
Q is formed by the same recipe (:func:`q_block_sparse`) so it matches the X whose Gram gave
R bit for bit, which is what keeps CholeskyQR2's orthogonality at O(u). The residual
``||A - QR||`` picks up the rounding of ``inv(F1)``, a relative error of about
``u cond(F1)``: a small multiple of u in our tests (tests/test_sparse.py), where the dense
recipe gives about u. For scholqr3 the shift bounds cond(F1) by about
``1 / sqrt(11 (mn + n(n+1)) u)`` (6.7e4 at m = 300, n = 30), so the inverse is accurate to
about 1e-11 there. What the explicit inverse cannot do is make a numerically rank-deficient
A (a network without datum) factorable: X = A F1^-1 is then singular to working accuracy
with either recipe (condition ~1e11 after trsm, ~1e19 after the inverse, measured), and
pass 2 breaks down or returns a factor of condition ~1e11 depending on the rounding, so
:func:`scholqr3_from` refuses both the same way.

First Grams out of float64's range (entries of A above about 1e154, or a column whose
squared norm lost its digits to underflow) are refused before any Cholesky
(:func:`check_gram_range`): an R from such a Gram would be wrong, not merely inaccurate.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp
from numpy.linalg import LinAlgError
from scipy.linalg import solve_triangular

from rowfold.blocks import BlockPlan, BlockSource, load_for_products
from rowfold.errors import BreakdownError
from rowfold.kernels import cholesky_upper, cross_product, metrics, solve_right_upper
from rowfold.kernels import sparse as sparse_kernels
from rowfold.kernels.fold import FOLD_ROWS
from rowfold.kernels.gram import gram_upper, hermitian_from_upper
from rowfold.kernels.householder import as_columns
from rowfold.methods._graph import PassGraph
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


def apply_factors(
    block: np.ndarray, factors: Sequence[np.ndarray], owned: bool = False
) -> np.ndarray:
    """Return ``block @ inv(F1) @ inv(F2) ...`` by successive triangular solves.

    Each solve after the first works in the previous one's result; the first works in
    ``block`` itself only when the caller ``owned`` it (a temporary nobody reads again).
    """
    for step, factor in enumerate(factors):
        block = solve_right_upper(block, factor, overwrite=owned or step > 0)
    return block


def is_sparse(source: BlockSource) -> bool:
    """True when the source is the input itself and the input is a CSR matrix."""
    return isinstance(source, BlockPlan) and source.sparse


def gram_leaf(source: BlockSource, index: int, factors: tuple[np.ndarray, ...]) -> dict[str, Any]:
    """Gram sums of one block of ``X = A F1^{-1} F2^{-1} ...``.

    Keys ``gram`` and ``cross`` (X^H B or None); on the first pass (no factors) also the
    first-pass sums ``a_fro2`` and ``gram`` of A itself, which are the same numbers. The
    first pass over a CSR input takes them from the CSR block.
    """
    if not factors and isinstance(source, BlockPlan) and source.sparse:
        sparse_block, b = source.load_sparse(index)
        first: dict[str, Any] = sparse_kernels.sparse_gram_sums(sparse_block)
        first["cross"] = None if b is None else sparse_kernels.sparse_cross(sparse_block, b)
        return first
    block, rhs = load_for_products(source, index)
    if not factors:
        sums: dict[str, Any] = metrics.gram_sums(block)
        sums["cross"] = None if rhs is None else cross_product(block, rhs)
        return sums
    n, dtype = block.shape[1], np.result_type(block, *factors)
    upper = np.zeros((n, n), dtype=dtype)
    cross_dtype = dtype if rhs is None else np.result_type(dtype, rhs)
    cross = None if rhs is None else np.zeros((n, as_columns(rhs).shape[1]), dtype=cross_dtype)
    for start in range(0, block.shape[0], FOLD_ROWS):  # each piece of X stays in cache
        x = apply_factors(block[start : start + FOLD_ROWS], factors)
        upper += gram_upper(x)
        if cross is not None and rhs is not None:
            cross += cross_product(x, rhs[start : start + FOLD_ROWS])
    return {"gram": hermitian_from_upper(upper), "cross": cross}


def add_gram_sums(*parts: dict[str, Any]) -> dict[str, Any]:
    """Add Gram sums (``cross`` may be None); a Gram that overflows is refused later by
    name (:func:`cholesky_or_refuse`), so the addition itself warns of nothing."""
    total = dict(parts[0])
    with np.errstate(over="ignore", invalid="ignore"):
        for part in parts[1:]:
            for key, value in part.items():
                total[key] = None if value is None else total[key] + value
    return total


def q_block(block: np.ndarray, factors: tuple[np.ndarray, ...]) -> np.ndarray:
    """Form a block of Q as ``A F1^{-1} F2^{-1} ...``."""
    return apply_factors(block, factors)


SparseRecipe = tuple[np.ndarray, tuple[np.ndarray, ...]]
"""``(inv(F1), (F2, F3, ...))``: how X (or Q) is formed from a CSR block."""


def sparse_recipe(factors: Sequence[np.ndarray]) -> SparseRecipe:
    """The sparse recipe of a list of factors (the inverse of the first one formed once)."""
    return sparse_kernels.upper_inverse(factors[0]), tuple(factors[1:])


def sparse_apply(block: sp.csr_matrix, recipe: SparseRecipe) -> np.ndarray:
    """Return ``block @ inv(F1)`` followed by triangular solves with ``F2, F3, ...``."""
    inverse, rest = recipe
    return apply_factors(sparse_kernels.sparse_times(block, inverse), rest, owned=True)


def sparse_gram_leaf(plan: BlockPlan, index: int, recipe: SparseRecipe) -> dict[str, Any]:
    """Gram sums (``gram``, ``cross``) of one block of X formed from a CSR block.

    X is formed band by band (:func:`rowfold.kernels.sparse.banded_gram`): its values are
    those of :func:`sparse_apply`, but the zeros that the triangular factors keep at the
    start of each row are neither formed nor multiplied.
    """
    block, rhs = plan.load_sparse(index)
    gram, cross = sparse_kernels.banded_gram(block, rhs, *recipe)
    return {"gram": gram, "cross": cross}


def q_block_sparse(block: np.ndarray, recipe: SparseRecipe) -> np.ndarray:
    """Form a block of Q from the densified block of a CSR input, by the sparse recipe.

    The dense block goes back to CSR with the structure :func:`rowfold.blocks.load_sparse_block`
    gave it (canonical form), so the product is the same, bit for bit, as in the passes.
    """
    return sparse_apply(sp.csr_matrix(block), recipe)


def gram_pass(
    source: BlockSource,
    engine: Engine,
    factors: tuple[np.ndarray, ...],
    label: str,
    sparse: bool = False,
) -> dict[str, Any]:
    """One pass over the blocks; returns the summed Gram sums of ``X``.

    With ``sparse`` (a CSR input and at least one factor) X is formed by the sparse recipe;
    the factorization must then form Q by :func:`q_block_sparse` too (``assemble(...,
    sparse=True)``). The first pass (no factors) over a CSR input is always sparse.
    """
    if sparse and factors and isinstance(source, BlockPlan):
        leaf: Any = sparse_gram_leaf
        recipe: Any = sparse_recipe(factors)
    else:
        leaf, recipe = gram_leaf, factors
    graph = PassGraph("gram", leaf, add_gram_sums, source, recipe)
    graph.share(source, "source")
    graph.share(recipe, "factors")
    calls = [(leaf, source, i, recipe) for i in range(source.blocks)]
    root = graph.reduce(calls, 8, add_gram_sums, single_root=False)
    (total,) = engine.compute([graph.output(root)], label)
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


def check_gram_range(gram: np.ndarray, rows: int, method: str) -> None:
    """Refuse a first Gram that float64 cannot hold (BreakdownError naming why).

    CholeskyQR squares the entries of A: above about 1e154 the Gram overflows, and below
    about 1e-154 (per column: a squared column norm below ``rows * tiny / eps``) the squares
    lose their digits or vanish, so any R from that Gram would be wrong, not just
    inaccurate. TSQR never squares A, and ``solve.scale_columns`` brings every column to
    norm about 1 before the Gram is formed.
    """
    problem = metrics.gram_range_problem(gram, rows)
    floor = metrics.underflow_limit(rows, gram.dtype)
    small = np.flatnonzero(np.real(np.diagonal(gram)) < floor)
    if problem is None and small.size == 0:
        return
    kind = np.dtype(gram.real.dtype).name
    if problem == "overflows":
        what = f"A^H A overflows in {kind} (entries of A near or above the square root of "
        what += f"{kind}'s largest number)"
    else:
        columns = ", ".join(str(int(j)) for j in small[:5]) + (", ..." if small.size > 5 else "")
        what = (
            f"A^H A underflows in {kind}: the squared norm of column {columns} is zero or "
            f"below {floor:.3g}, where the squares of the entries lose their digits"
        )
    raise BreakdownError(
        f"{method}: {what}; CholeskyQR squares the entries of A, so it cannot factor this "
        "scaling; set solve.scale_columns: true (or drop an all-zero column), or use "
        "method.name: tsqr"
    )


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
    sparse: bool = False,
) -> dict[str, Any]:
    """Run ``count`` further CholeskyQR passes, appending factors; return the last sums.

    ``sparse`` forms X by the sparse recipe (see :func:`gram_pass`).
    """
    last: dict[str, Any] = {}
    for done in range(1, count + 1):
        stage = f"pass {len(factors) + 1}"
        label = f"{method}: {stage} (Gram)"
        last = gram_pass(source, engine, tuple(factors), label, sparse)
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
    sparse: bool = False,
) -> Factorization:
    """Combine the factors into R, ``Q^H B`` and the Q recipe (the sparse one with
    ``sparse``, matching passes run with ``sparse``)."""
    R = factors[0]
    for factor in factors[1:]:
        R = factor @ R
    R = np.triu(R)
    np.fill_diagonal(R, np.abs(np.real(np.diagonal(R))))
    qhb = None
    if last_cross is not None:
        qhb = solve_triangular(factors[-1], last_cross, trans="C", lower=False)
    recipe: Any = sparse_recipe(factors) if sparse else tuple(factors)
    return Factorization(
        R=R,
        qhb=qhb,
        q_kernel=q_block_sparse if sparse else q_block,
        q_recipes=[recipe] * blocks,
        passes=passes,
        sums=metrics.FirstPassSums.of(first_sums),
        details={**details, "sparse_input": True} if sparse else details,
    )


def cholqr2_from(
    source: BlockSource, engine: Engine, first: dict[str, Any], rows: int, details: dict[str, Any]
) -> Factorization:
    """CholeskyQR2 given the first pass's Gram sums (reused by ``auto``); ``rows`` is m."""
    advice = "use method.name: scholqr3 or tsqr"
    check_gram_range(first["gram"], rows, "cholqr2")
    factor = cholesky_or_refuse(first["gram"], "cholqr2", "first", advice)
    estimate = condition_estimate(factor)
    details = {**details, "first_pass_condition_estimate": estimate}
    limit = cholqr2_limit(factor.dtype)
    if not estimate < limit:
        raise BreakdownError(
            f"cholqr2: first-pass condition estimate {estimate:.3g} exceeds {limit:.3g}; "
            f"CholeskyQR2 cannot guarantee an orthogonal Q here; {advice}"
        )
    factors = [factor]
    sparse = is_sparse(source)
    last = more_passes(source, engine, factors, 1, "cholqr2", advice, sparse)
    second = condition_estimate(factors[1])
    if second > SECOND_FACTOR_LIMIT:
        raise BreakdownError(
            f"cholqr2: the second pass still has condition {second:.3g}, so Q would not be "
            f"orthogonal to working accuracy; {advice}",
            passes=1,
        )
    details["second_pass_condition"] = second
    return assemble(factors, last["cross"], first, 2, source.blocks, details, sparse)


def scholqr3_from(
    source: BlockSource, engine: Engine, first: dict[str, Any], rows: int, details: dict[str, Any]
) -> Factorization:
    """Shifted CholeskyQR3 given the first pass's Gram sums (reused by ``auto``).

    Passes 2 and 3 are CholeskyQR2 on ``X = A F1^-1``, so pass 2's factor must show X
    within CholeskyQR2's range (condition below :func:`cholqr2_limit`), as
    :func:`cholqr2_from` requires of A. An exactly or numerically rank-deficient A leaves X
    singular to working accuracy whatever the shift, and whether pass 2's Cholesky then
    breaks down or returns a factor of condition ~1e11 depends on the rounding (the BLAS
    kernel, dense or sparse storage): both are refused with the same reason.
    """
    advice = "use method.name: tsqr"
    gram = first["gram"]
    check_gram_range(gram, rows, "scholqr3")
    shift = shift_for(gram, rows)
    identity = np.eye(gram.shape[0], dtype=gram.dtype)
    shifted = gram + np.asarray(shift, dtype=gram.real.dtype) * identity
    factor = cholesky_or_refuse(shifted, "scholqr3", "shifted first", advice)
    details = {**details, "shift": shift, "shifted_factor_condition": condition_estimate(factor)}
    factors = [factor]
    sparse = is_sparse(source)
    limit = cholqr2_limit(factor.dtype)
    try:
        more_passes(source, engine, factors, 1, "scholqr3", advice, sparse)
    except BreakdownError:
        raise _beyond_scholqr3(float("inf"), limit) from None
    second = condition_estimate(factors[1])
    if not second < limit:
        raise _beyond_scholqr3(second, limit)
    details["second_pass_condition"] = second
    last = more_passes(source, engine, factors, 1, "scholqr3", advice, sparse)
    final = condition_estimate(factors[-1])
    if final > SECOND_FACTOR_LIMIT:
        raise BreakdownError(
            f"scholqr3: the last pass still has condition {final:.3g}, so Q would not be "
            f"orthogonal to working accuracy; {advice}",
            passes=2,
        )
    details["last_pass_condition"] = final
    return assemble(factors, last["cross"], first, 3, source.blocks, details, sparse)


def _beyond_scholqr3(condition: float, limit: float) -> BreakdownError:
    """The refusal when pass 2 finds A F1^-1 out of CholeskyQR2's range (inf: breakdown)."""
    return BreakdownError(
        f"scholqr3: pass 2 gives A F1^-1 a condition estimate of {condition:.3g} (inf when "
        f"its Cholesky breaks down), and CholeskyQR2 needs it below {limit:.3g}: A is "
        "numerically rank deficient or beyond shifted CholeskyQR3's range; fix a datum "
        "(input.fixed_columns) or use method.name: tsqr",
        passes=1,
    )


def cholqr2(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run CholeskyQR2 over the plan's row blocks."""
    engine = ctx.engine
    first = gram_pass(plan, engine, (), "cholqr2: pass 1 (Gram)")
    return cholqr2_from(plan, engine, first, plan.rows, {})


def scholqr3(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run shifted CholeskyQR3 over the plan's row blocks."""
    engine = ctx.engine
    first = gram_pass(plan, engine, (), "scholqr3: pass 1 (Gram)")
    return scholqr3_from(plan, engine, first, plan.rows, {})
