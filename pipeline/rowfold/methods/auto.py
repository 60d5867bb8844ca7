"""``auto``: choose the cheapest method that the data allow, by a ladder.

1. Pass 1 accumulates the Gram ``A^H A``; its Cholesky factor gives a condition estimate.
2. If the estimate is well below 1e8 (100 times below ``u^-1/2``), CholeskyQR2 reuses that
   pass (2 passes in all).
3. Otherwise shifted CholeskyQR3 reuses it (3 passes in all).
4. If that breaks down, Householder TSQR (always stable) runs from scratch.

The report records the method used and why (``method_details``).
"""

from __future__ import annotations

import numpy as np
from numpy.linalg import LinAlgError

from rowfold.blocks import BlockPlan
from rowfold.errors import BreakdownError
from rowfold.kernels import cholesky_upper
from rowfold.methods import tsqr
from rowfold.methods.base import Context, Factorization
from rowfold.methods.cholesky import (
    cholqr2_from,
    cholqr2_limit,
    condition_estimate,
    gram_pass,
    scholqr3_from,
)
from rowfold.spec import MethodSpec

# "Well below" CholeskyQR2's limit: two orders of magnitude of margin (1e6 in float64).
MARGIN = 100.0


def _estimate(gram: np.ndarray) -> float:
    try:
        return condition_estimate(cholesky_upper(gram))
    except LinAlgError:
        return float("inf")


def factor(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run the ladder and return the first factorization that holds."""
    engine, want_q = ctx.engine, ctx.want_q
    first = gram_pass(plan, engine, (), "auto: pass 1 (Gram)")
    estimate = _estimate(first["gram"])
    below = cholqr2_limit(first["gram"].dtype) / MARGIN
    details = {"first_pass_condition_estimate": estimate}
    notes = []
    spent = 0
    if estimate < below:
        try:
            fact = cholqr2_from(plan, engine, first, details)
            return _chosen(fact, "cholqr2", f"condition estimate {estimate:.3g} < {below:.2g}", 0)
        except BreakdownError as exc:
            notes.append(str(exc))
            spent += exc.passes
    try:
        fact = scholqr3_from(plan, engine, first, plan.rows, details)
        return _chosen(fact, "scholqr3", f"condition estimate {estimate:.3g} >= {below:.2g}", spent)
    except BreakdownError as exc:
        notes.append(str(exc))
        spent += 1 + exc.passes
    fact = tsqr.factor_source(plan, "binary", engine, want_q)
    reason = f"condition estimate {estimate:.3g}; shifted CholeskyQR3 broke down: {notes[-1]}"
    return _chosen(fact, "tsqr", reason, spent)


def _chosen(fact: Factorization, used: str, reason: str, extra_passes: int) -> Factorization:
    details = {**fact.details, "method_used": used, "method_reason": reason}
    return Factorization(
        R=fact.R,
        qhb=fact.qhb,
        q_kernel=fact.q_kernel,
        q_recipes=fact.q_recipes,
        passes=fact.passes + extra_passes,
        sums=fact.sums,
        details=details,
    )
