"""``rowfold update``: fold newly appended rows into an earlier result.

The earlier result keeps, under ``state/``, the augmented triangular factor of ``[A | b]``:
R, ``Q^H b`` and a residual factor F (``F^H F = r^H r``), plus ``A^H A``. New rows
``[rows_done, m)`` are factored by Householder TSQR as ``[A_new | b_new]``, and the two
augmented factors are reduced by one more stacked-R step (the TSQR reduction), so the result
equals a full refactorization up to rounding, without reading the old rows again.

Before that, the inputs' first ``rows_done`` rows are checked against the fingerprints the
earlier result recorded (hashes of sampled row windows and of the last window); a mismatch
is refused (exit 2), since the old factor no longer describes the input.

Q is not carried forward: an updated store has no Q (``q_state`` says so); run ``run`` to
form it again.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from rowfold import storage
from rowfold.blocks import BlockPlan
from rowfold.errors import InputError
from rowfold.kernels import positive_diagonal, stacked_r
from rowfold.methods import tsqr
from rowfold.methods._graph import task
from rowfold.methods.base import Engine, Factorization


@dataclass(frozen=True)
class AugmentedSource:
    """Row blocks of ``[A | B]`` for rows of a plan (B as extra columns, no rhs)."""

    plan: BlockPlan

    @property
    def blocks(self) -> int:
        """Number of row blocks."""
        return self.plan.blocks

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Return ``[A_i | B_i]`` and no rhs."""
        block, rhs = self.plan.load(index)
        if rhs is None:
            return block, None
        return np.asfortranarray(np.hstack([block, rhs.astype(block.dtype)])), None


def count_used_rows(plan: BlockPlan, index: int) -> int:
    """Rows of a block with non-zero weight (all rows without weights)."""
    from rowfold.blocks import load_weights

    start, stop = plan.bound(index)
    if plan.weights is None:
        return stop - start
    return int(np.count_nonzero(load_weights(plan, index)))


def check_prefix(plan: BlockPlan, attrs: dict[str, Any], rows_done: int) -> None:
    """Refuse when an input no longer starts with the rows the earlier result consumed."""
    recorded = attrs.get("inputs") or {}
    refs = {"matrix": plan.matrix, "rhs": plan.rhs, "weights": plan.weights}
    for name, ref in refs.items():
        if (ref is None) != (name not in recorded):
            raise InputError(
                f"input.{name}: present in one of the job and the earlier result but not the "
                "other; run `rowfold run` instead of update"
            )
        if ref is None:
            continue
        windows = [w for w in recorded[name].get("windows", []) if int(w[1]) <= rows_done]
        if not storage.same_prefix(ref, {"windows": windows}):
            raise InputError(
                f"{ref.describe()}: the first {rows_done} rows differ from those the earlier "
                "result consumed; run `rowfold run` instead of update"
            )


def new_rows_plan(plan: BlockPlan, rows_done: int, scale: np.ndarray) -> BlockPlan:
    """The plan restricted to rows ``[rows_done, m)``, with the earlier column scaling."""
    column_scale = None if np.all(scale == 1) else tuple(float(v) for v in scale)
    return replace(plan, first_row=rows_done, column_scale=column_scale)


def augmented(state: dict[str, np.ndarray], n: int) -> np.ndarray:
    """The stored augmented factor ``[[R, Q^H b], [0, F]]``."""
    R = state["R"]
    if "qhb" not in state:
        return R
    qhb, factor = state["qhb"], state["residual_factor"]
    k = qhb.shape[1]
    out = np.zeros((n + k, n + k), dtype=np.result_type(R, qhb, factor))
    out[:n, :n], out[:n, n:], out[n:, n:] = R, qhb, factor
    return out


@dataclass(frozen=True)
class Folded:
    """The combined factorization and what the report needs about it."""

    fact: Factorization
    residual_factor: np.ndarray | None
    rows_used: int
    new_rows: int
    column_scale: np.ndarray

    @property
    def residual_sq(self) -> np.ndarray | None:
        """||r_j||^2 per right-hand side, from the residual factor's columns."""
        if self.residual_factor is None:
            return None
        return np.asarray(np.sum(np.abs(self.residual_factor) ** 2, axis=0))


def fold(
    plan: BlockPlan, state: dict[str, np.ndarray], attrs: dict[str, Any], engine: Engine
) -> Folded:
    """Factor the new rows and reduce them with the stored factor."""
    n = plan.cols
    rows_done = int(attrs["rows_done"])
    new_plan = new_rows_plan(plan, rows_done, state["column_scale"])
    new = tsqr.factor_source(AugmentedSource(new_plan), "binary", engine, False, "update")
    used_tasks = [task(count_used_rows, new_plan, i) for i in range(new_plan.blocks)]
    used_new = sum(engine.compute(used_tasks, "update: count rows"))
    combined, _, _ = stacked_r([(augmented(state, n), None), (new.R, None)], keep_q=False)
    whole, _ = positive_diagonal(combined)
    R, qhb = whole[:n, :n], (whole[:n, n:] if plan.rhs is not None else None)
    factor = None if qhb is None else whole[n:, n:]
    gram = state["gram"] + new.sums["gram"][:n, :n]
    sums = {"gram": gram, "a_fro2": float(np.real(np.trace(gram)))}
    fact = Factorization(
        R=R,
        qhb=qhb,
        q_kernel=tsqr.q_block,
        q_recipes=[],
        passes=1,
        sums=sums,
        details={"update": {"rows_before": rows_done, "rows_added": plan.rows - rows_done}},
    )
    used = int(attrs.get("rows_used", rows_done)) + used_new
    return Folded(fact, factor, used, plan.rows - rows_done, state["column_scale"])
