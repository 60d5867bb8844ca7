"""Iterative refinement of x and r on the augmented system (Björck, BIT 7, 1967).

The least-squares problem is the augmented system ``r + A x = b``, ``A^H r = 0``. Each
iteration computes the residuals of both equations in extended precision
(``numpy.longdouble``) in one pass over A,

    f = b - r - A x,        g = -A^H r,

and solves for the corrections with the stored factorization A = QR (no new factoring):

    h = R^{-H} g,   dx = R^{-1} (Q^H f - h),   dr = f - A dx.

The residual r lives in a scratch array beside the output (m x k, one chunk per row block).
The update of r by ``dr`` is folded into the next iteration's pass, so an iteration costs
one pass over A (plus one pass to start). Iteration stops when the correction no longer
shrinks by half, when it falls below ``u ||x||``, or after ``max_iterations``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import solve_triangular

from rowfold.blocks import BlockPlan, load_block
from rowfold.kernels import metrics
from rowfold.kernels.norms import frobenius
from rowfold.methods._graph import by_identity, sum_pass
from rowfold.methods.base import Engine, Factorization, RowArray, Scratch


def _extended(dtype: np.dtype) -> np.dtype:
    return np.dtype(np.clongdouble if np.dtype(dtype).kind == "c" else np.longdouble)


def refine_block(
    plan: BlockPlan,
    index: int,
    x: np.ndarray,
    dx: np.ndarray | None,
    residual: RowArray,
    q_kernel: Any,
    recipe: Any,
) -> dict[str, Any]:
    """One block of a refinement pass.

    Updates the stored residual by the previous correction (``r += f_old - A dx``, or
    ``r = b - A x`` on the first pass), then returns this block's sums ``g`` (-A^H r) and
    ``u`` (Q^H f) for the current ``x + dx``.
    """
    block, rhs = load_block(plan, index)
    start, _ = plan.bound(index)
    wide = _extended(block.dtype)
    a, b = block.astype(wide), rhs.astype(wide)  # type: ignore[union-attr]
    x_old = x.astype(wide)
    if dx is None:
        r = b - a @ x_old
        x_new = x_old
    else:
        r_old = residual.read(start, start + block.shape[0]).astype(wide)
        r = r_old + (b - r_old - a @ x_old) - a @ dx.astype(wide)
        x_new = x_old + dx.astype(wide)
    r_stored = r.astype(block.dtype)
    residual.write(start, r_stored)
    f = b - r_stored.astype(wide) - a @ x_new
    q = q_kernel(block, recipe)
    return {
        "g": -(a.conj().T @ r_stored.astype(wide)),
        "u": q.conj().T @ f.astype(block.dtype),
    }


@dataclass(frozen=True)
class Refinement:
    """Outcome of iterative refinement.

    Attributes
    ----------
    x : ndarray (n, k)
        The refined solution.
    iterations : int
        Corrections computed.
    last_correction : float
        ``||dx|| / ||x||`` of the last correction computed.
    passes : int
        Passes over A made.
    history : list of float
        Relative size of every correction.
    """

    x: np.ndarray
    iterations: int
    last_correction: float
    passes: int
    history: list[float]


def _correction(R: np.ndarray, sums: dict[str, Any]) -> np.ndarray:
    g = np.asarray(sums["g"], dtype=R.dtype)
    h = solve_triangular(R, g, trans="C", lower=False)
    return np.asarray(solve_triangular(R, np.asarray(sums["u"]) - h, lower=False))


def refine(
    plan: BlockPlan,
    fact: Factorization,
    x: np.ndarray,
    engine: Engine,
    scratch: Scratch,
    max_iterations: int,
) -> Refinement:
    """Refine ``x`` by augmented-system iterative refinement (see the module docstring)."""
    chunk = plan.per_block
    residual = scratch.create("refine_r", plan.rows, plan.rhs_cols, plan.dtype, chunk)
    dx: np.ndarray | None = None
    previous = np.inf
    history: list[float] = []
    passes = 0
    u = float(np.finfo(fact.R.dtype).eps) / 2
    while True:
        calls = [
            (refine_block, plan, i, x, dx, residual, fact.q_kernel, fact.q_recipes[i])
            for i in range(plan.blocks)
        ]
        recipes = by_identity(fact.q_recipes)
        inputs = (refine_block, plan, x, dx, residual, fact.q_kernel, recipes)
        root = sum_pass("refine", calls, metrics.add_sums, inputs, [x, dx, *recipes[0]])
        label = f"refine pass {passes + 1} (at most {max_iterations})"
        (sums,) = engine.compute([root], label)
        passes += 1
        if dx is not None:
            x = x + dx
        dx = _correction(fact.R, sums)
        size = frobenius(dx) / max(frobenius(x), float(np.finfo(float).tiny))
        history.append(size)
        if size > 0.5 * previous:
            break  # no longer shrinking: keep x as it is
        if size <= u or len(history) >= max_iterations:
            x = x + dx
            break
        previous = size
    return Refinement(x, len(history), history[-1], passes, history)
