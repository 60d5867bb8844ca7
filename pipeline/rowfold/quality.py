"""Out-of-core quality metrics and gates.

One verification pass reads each row block once more and, in the same task, forms the
block of Q (when wanted), the residual ``r = b - A x``, and the additive sums of
:mod:`rowfold.kernels.metrics`. The totals become the report figures; the gates compare
them with the job's limits.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from rowfold.blocks import BlockPlan, load_block
from rowfold.kernels import metrics
from rowfold.methods._graph import sum_tree, task
from rowfold.methods.base import Engine, Factorization
from rowfold.spec import GateSpec


def verify_block(
    plan: BlockPlan,
    index: int,
    R: np.ndarray,
    x: np.ndarray | None,
    q_kernel: Callable[[np.ndarray, Any], np.ndarray] | None,
    recipe: Any,
    keep_q: bool,
) -> tuple[metrics.Sums, np.ndarray | None]:
    """Read one block, optionally form its Q, and return (sums, Q block or None)."""
    block, rhs = load_block(plan, index)
    q = None if q_kernel is None else q_kernel(block, recipe)
    sums = metrics.block_sums(block, rhs, x, R, q)
    return sums, (q if keep_q else None)


def first_of(pair: tuple[Any, Any]) -> Any:
    """Return the first item of a pair (the sums of a verify task)."""
    return pair[0]


@dataclass(frozen=True)
class Verification:
    """Totals of a verification pass.

    Attributes
    ----------
    sums : dict
        The added block sums (see :func:`rowfold.kernels.metrics.block_sums`).
    formed_q : bool
        Whether Q was formed (so orthogonality figures exist).
    """

    sums: metrics.Sums
    formed_q: bool


def verify(
    plan: BlockPlan,
    fact: Factorization,
    x: np.ndarray | None,
    engine: Engine,
    form_q: bool,
    write_q: Callable[[int, np.ndarray], None] | None,
) -> Verification:
    """Run the verification pass.

    Parameters
    ----------
    plan, fact : the blocks and their factorization.
    x : ndarray (n, k) or None
        Solution whose residual to measure.
    engine : Engine
        Runs the tasks.
    form_q : bool
        Form Q blocks to measure orthogonality and the factorization residual.
    write_q : callable or None
        When given, called with (start row, Q block) for every block, in order; blocks
        are streamed so only a few are in memory at once.
    """
    q_kernel = fact.q_kernel if (form_q or write_q) else None
    tasks = [
        task(
            verify_block,
            plan,
            i,
            fact.R,
            x,
            q_kernel,
            fact.q_recipes[i] if q_kernel else None,
            write_q is not None,
        )
        for i in range(plan.blocks)
    ]
    if write_q is None:
        (total,) = engine.compute(
            [sum_tree([task(first_of, t) for t in tasks], metrics.add_sums)], "verify"
        )
        return Verification(total, q_kernel is not None)
    total_sums: metrics.Sums | None = None
    for index, (sums, q) in enumerate(engine.stream(tasks, "verify and write Q")):
        write_q(plan.bounds[index][0], q)
        total_sums = sums if total_sums is None else metrics.add_sums(total_sums, sums)
    assert total_sums is not None
    return Verification(total_sums, True)


@dataclass(frozen=True)
class GateResult:
    """One gate: its limit, the measured value and whether it held."""

    limit: float
    value: float | None
    held: bool


def check_gates(gates: GateSpec, figures: dict[str, Any]) -> dict[str, GateResult]:
    """Compare report figures with the job's gates; a missing figure fails its gate."""
    pairs = {
        "orthogonality": (gates.orthogonality, figures.get("orthogonality_loss")),
        "residual": (gates.residual, figures.get("factorization_residual")),
        "gram": (gates.gram, figures.get("gram_residual")),
    }
    results: dict[str, GateResult] = {}
    for name, (limit, value) in pairs.items():
        if limit is None:
            continue
        held = value is not None and bool(np.isfinite(value)) and value <= limit
        results[name] = GateResult(limit=limit, value=value, held=held)
    return results
