"""Randomized CholeskyQR: a random sketch of A preconditions CholeskyQR.

Pass 1 reads every block once and adds its contribution ``Omega_i A_i`` to a small sketch
(``s`` rows, about 3n), with ``Omega`` a sparse sign embedding (each row of A lands in 8
distinct random sketch rows with random signs, drawn directly by Floyd's algorithm) or a
Gaussian matrix, drawn per block from the recorded seed and the block index. The R factor
``R0`` of the sketch makes ``X = A R0^{-1}`` well conditioned whatever A's condition, so
CholeskyQR on X (pass 2) gives an orthogonal Q; when the second factor is not close to
orthogonal-exact (condition above 10) one more CholeskyQR pass is made. Published basis:
Balabanov 2022 (arXiv 2210.09953); Higgins, Szyld, Boman, Yamazaki 2023 (arXiv
2309.05868); Garrison & Ipsen 2024.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse

from rowfold.blocks import BlockPlan, BlockSource, load_for_products
from rowfold.errors import BreakdownError
from rowfold.kernels import householder_r, metrics, positive_diagonal
from rowfold.methods._graph import sum_pass
from rowfold.methods.base import Context, Factorization
from rowfold.methods.cholesky import assemble, condition_estimate, more_passes
from rowfold.spec import MethodSpec

NONZEROS_PER_ROW = 8
# Above this condition of the CholeskyQR factor, one more pass is made (common practice).
RETRY_ABOVE = 10.0


def embedding(
    kind: str, sketch_rows: int, rows: int, seed: int, index: int, dtype: Any = np.float64
) -> Any:
    """Return this block's slice of the embedding, ``sketch_rows x rows``, in ``dtype``.

    The draw depends only on ``(seed, index)``, so every run (and every worker) builds the
    same slice. The sparse sign embedding is built as a CSC matrix straight from its
    nonzeros (``per_row`` of them in every column): memory ~ rows * per_row.
    """
    rng = np.random.default_rng([seed, index])
    if kind == "gaussian":
        gaussian = rng.standard_normal((sketch_rows, rows)) / np.sqrt(sketch_rows)
        return gaussian.astype(dtype, copy=False)
    per_row = min(NONZEROS_PER_ROW, sketch_rows)
    targets = distinct_draws(rng, rows, sketch_rows, per_row)
    value = 1.0 / np.sqrt(per_row)
    signs = rng.integers(0, 2, size=rows * per_row, dtype=np.int8).astype(bool)
    data = np.where(signs, value, -value).astype(dtype, copy=False)
    pointers = np.arange(0, rows * per_row + 1, per_row, dtype=targets.dtype)
    return scipy.sparse.csc_matrix((data, targets.reshape(-1), pointers), shape=(sketch_rows, rows))


def distinct_draws(rng: np.random.Generator, count: int, population: int, size: int) -> Any:
    """``count`` independent uniform draws of ``size`` distinct integers in [0, population).

    Floyd's algorithm (Bentley & Floyd, Commun. ACM 30(9), 1987), vectorised over the
    draws: step j = population - size, ..., population - 1 picks t uniformly in [0, j] and
    keeps t, or j when t was already picked. Every size-subset is equally likely. Memory
    and work are ~ count * size (plus size^2 / 2 comparisons per draw), never
    count * population.
    """
    index_type = np.int32 if population <= np.iinfo(np.int32).max else np.int64
    chosen = np.empty((count, size), dtype=index_type)
    for step, top in enumerate(range(population - size, population)):
        pick = rng.integers(0, top + 1, size=count, dtype=index_type)
        taken = np.any(chosen[:, :step] == pick[:, None], axis=1)
        chosen[:, step] = np.where(taken, top, pick)
    return chosen


def sketch_leaf(
    source: BlockSource, index: int, kind: str, sketch_rows: int, seed: int
) -> dict[str, Any]:
    """First-pass sums of a block plus its sketch contribution ``Omega_i A_i``."""
    block, _ = load_for_products(source, index)
    sums = metrics.gram_sums(block)
    omega = embedding(kind, sketch_rows, block.shape[0], seed, index, block.real.dtype)
    sums["sketch"] = np.asarray(omega @ block)
    return sums


def factor(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run randomized CholeskyQR over the plan's row blocks."""
    engine = ctx.engine
    sketch_rows = spec.sketch_rows or 3 * plan.cols
    calls = [
        (sketch_leaf, plan, i, spec.sketch, sketch_rows, spec.seed) for i in range(plan.blocks)
    ]
    inputs = (sketch_leaf, plan, spec.sketch, sketch_rows, spec.seed)
    root = sum_pass("sketch", calls, metrics.add_sums, inputs)
    (first,) = engine.compute([root], "rcholqr: pass 1 (sketch)")
    sketch_r, _ = householder_r(first["sketch"])
    preconditioner, _ = positive_diagonal(sketch_r)
    if not np.all(np.diagonal(preconditioner) > 0):
        raise BreakdownError(
            "rcholqr: the sketch is rank deficient, so A is numerically rank deficient; "
            "use method.name: tsqr",
            passes=1,
        )
    factors = [preconditioner]
    advice = "use method.name: tsqr"
    last = more_passes(plan, engine, factors, 1, "rcholqr", advice)
    condition = condition_estimate(factors[-1])
    if condition > RETRY_ABOVE:
        last = more_passes(plan, engine, factors, 1, "rcholqr", advice)
    details = {
        "sketch": spec.sketch,
        "sketch_rows": sketch_rows,
        "seed": spec.seed,
        "preconditioned_condition": condition,
        "first_pass_condition_estimate": condition_estimate(preconditioner),
    }
    return assemble(factors, last["cross"], first, len(factors), plan.blocks, details)
