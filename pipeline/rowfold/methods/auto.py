"""``auto``: choose the cheapest method that the data allow, by a ladder.

1. Pass 1 accumulates the Gram ``A^H A``; its Cholesky factor gives the condition estimate
   (the report's ``first_pass_condition_estimate``, the only estimate in the details).
2. If the estimate is below :func:`cholqr2_threshold` (``u^-1/2 / 100``, 9.49e5 in
   float64: two orders of magnitude below CholeskyQR2's limit), CholeskyQR2 reuses that
   pass (2 passes in all).
3. Otherwise shifted CholeskyQR3 reuses it (3 passes in all).
4. If that refuses (or A^H A is out of float64's range, which no CholeskyQR can use),
   Householder TSQR (always stable) runs from scratch.

The report records the method used, the threshold and why (``method_details``).
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
    check_gram_range,
    cholqr2_from,
    cholqr2_limit,
    condition_estimate,
    gram_pass,
    scholqr3_from,
)
from rowfold.spec import MethodSpec

# "Well below" CholeskyQR2's limit u^-1/2: two orders of magnitude of margin (common
# practice, not published).
MARGIN = 100.0


def cholqr2_threshold(dtype: np.dtype) -> float:
    """The condition estimate below which auto uses CholeskyQR2: ``u^-1/2 / MARGIN``."""
    return cholqr2_limit(dtype) / MARGIN


def _estimate(gram: np.ndarray) -> float:
    try:
        return condition_estimate(cholesky_upper(gram))
    except LinAlgError:
        return float("inf")


def factor(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Run the ladder and return the first factorization that holds."""
    engine, want_q = ctx.engine, ctx.want_q
    first = gram_pass(plan, engine, (), "auto: pass 1 (Gram)")
    threshold = cholqr2_threshold(first["gram"].dtype)
    details: dict[str, object] = {"threshold": threshold}
    try:
        check_gram_range(first["gram"], plan.rows, "auto")
    except BreakdownError as exc:
        fact = tsqr.factor_source(plan, "binary", engine, want_q)
        return _chosen(fact, details, "tsqr", f"{exc}; TSQR does not form A^H A", 1)
    estimate = _estimate(first["gram"])
    details["first_pass_condition_estimate"] = estimate
    measured = f"condition estimate {estimate:.3g}"
    notes = []
    spent = 0
    if estimate < threshold:
        try:
            fact = cholqr2_from(plan, engine, first, plan.rows, details)
            reason = f"{measured} below the threshold {threshold:.3g} (u^-1/2 / {MARGIN:.0f})"
            return _chosen(fact, details, "cholqr2", reason, 0)
        except BreakdownError as exc:
            notes.append(f"CholeskyQR2 refused: {exc}")
            spent += exc.passes
    reason = f"{measured} at or above the threshold {threshold:.3g} (u^-1/2 / {MARGIN:.0f})"
    if notes:
        reason = f"{measured} below the threshold {threshold:.3g}, but {notes[-1]}"
    try:
        fact = scholqr3_from(plan, engine, first, plan.rows, details)
        return _chosen(fact, details, "scholqr3", reason, spent)
    except BreakdownError as exc:
        notes.append(str(exc))
        spent += 1 + exc.passes
    fact = tsqr.factor_source(plan, "binary", engine, want_q)
    reason = f"{measured}; shifted CholeskyQR3 refused: {notes[-1]}"
    return _chosen(fact, details, "tsqr", reason, spent)


def _chosen(
    fact: Factorization, ladder: dict[str, object], used: str, reason: str, extra_passes: int
) -> Factorization:
    """The factorization with the ladder's figures, the method used and the reason."""
    details = {**fact.details, **ladder, "method_used": used, "method_reason": reason}
    return Factorization(
        R=fact.R,
        qhb=fact.qhb,
        q_kernel=fact.q_kernel,
        q_recipes=fact.q_recipes,
        passes=fact.passes + extra_passes,
        sums=fact.sums,
        details=details,
    )
