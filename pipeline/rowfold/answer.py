"""The answer in the input's own columns: undoing column scaling, re-inserting fixed
columns, covariance and the report's parameters and datum (pure numpy)."""

from __future__ import annotations

from typing import Any

import numpy as np

from rowfold.blocks import BlockPlan, expand_columns
from rowfold.kernels import metrics
from rowfold.solve import Solution, Statistics


def rhs_shaped(plan: BlockPlan, array: np.ndarray) -> np.ndarray:
    """Give per-rhs results the rhs's own shape (n for a 1-D rhs, n x k otherwise)."""
    return array[:, 0] if plan.rhs_1d else array


def multipliers(plan: BlockPlan, dtype: np.dtype, scale: np.ndarray | None) -> np.ndarray:
    """The column multipliers of an equilibration (ones without one), in the real dtype."""
    real = np.zeros(0, dtype=dtype).real.dtype
    return np.ones(plan.cols, dtype=real) if scale is None else scale.astype(real)


def unscaled(
    plan: BlockPlan, solution: Solution, stats: Statistics, scale: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """x and its standard errors (n x k) in the input's columns: unscaled, and 0 for
    fixed columns."""
    s = multipliers(plan, solution.x.dtype, scale)
    x = expand_columns(plan, solution.x * s[:, None])
    return x, expand_columns(plan, stats.x_stderr * s[:, None])


def answer_entry(
    plan: BlockPlan,
    solution: Solution | None,
    stats: Statistics | None,
    scale: np.ndarray | None,
    names: tuple[str, ...],
) -> dict[str, Any]:
    """The report's answer: ``parameters`` (name, column, x, stderr, fixed; per-rhs values
    as elsewhere) and ``datum`` (what fixes the solution)."""
    datum = datum_entry(plan, solution, names)
    if solution is None or stats is None:
        return {"parameters": None, "datum": datum}
    x, stderr = unscaled(plan, solution, stats, scale)
    fixed = set(plan.fixed_columns)

    def value(v: Any) -> Any:
        v = complex(v) if np.iscomplexobj(v) else float(v)
        return {"re": v.real, "im": v.imag} if isinstance(v, complex) else v

    def per_rhs(row: np.ndarray) -> Any:
        return value(row[0]) if plan.rhs_1d else [value(v) for v in row]

    parameters = [
        {
            "name": names[j],
            "column": j,
            "x": per_rhs(x[j]),
            "stderr": per_rhs(stderr[j]),
            "fixed": j in fixed,
        }
        for j in range(plan.input_cols)
    ]
    return {"parameters": parameters, "datum": datum}


def datum_entry(
    plan: BlockPlan, solution: Solution | None, names: tuple[str, ...]
) -> dict[str, Any]:
    """What the solution is relative to: the fixed columns, or the minimum norm."""
    fixed = list(plan.fixed_columns)
    held = [names[j] for j in fixed]
    if fixed:
        note = (
            f"{', '.join(held)} held fixed at 0 (input.fixed_columns); every other "
            "parameter and its standard error is relative to that datum"
        )
    elif solution is not None and solution.rank < plan.cols:
        note = (
            "no parameter is held fixed and the problem is rank deficient: x is the "
            "minimum-norm solution, so the datum is the one that makes ||x|| least; "
            "differences that the data determine are meaningful, single values are not"
        )
    else:
        note = "no parameter is held fixed; the data determine every parameter (full rank)"
    return {"fixed_columns": fixed, "names": held, "value": 0.0 if fixed else None, "note": note}


def fixed_note(plan: BlockPlan) -> dict[str, Any]:
    """The report's ``fixed_columns`` entry: what was held fixed, and what that means."""
    return {
        "columns": list(plan.fixed_columns),
        "value": 0.0,
        "kept_columns": plan.cols,
        "note": (
            f"columns {', '.join(map(str, plan.fixed_columns))} of the input were held fixed at "
            "0 (a datum) and left out before factoring; x and x_stderr report them as 0, R "
            "and x_covariance as zero rows and columns, and Q (when written) holds only the "
            "kept columns; the report's cols, rank and figures count the kept columns"
        ),
    }


def residual_factor(rtr: np.ndarray) -> np.ndarray:
    """A square root F (k x k) of the residual Gram r^H r, with F^H F = r^H r."""
    values, vectors = np.linalg.eigh(rtr)
    return np.asarray((vectors * np.sqrt(np.clip(values, 0, None))) @ vectors.conj().T)


def covariance_of(
    plan: BlockPlan, solution: Solution, stats: Statistics, scale: np.ndarray
) -> np.ndarray:
    """``sigma_j^2 (R^H R)^+`` per right-hand side: n x n, or k x n x n for a 2-D rhs."""
    w = solution.inverse_rows * scale[:, None]
    unit = w @ w.conj().T
    per_rhs = np.stack([s**2 * unit for s in stats.residual_std])
    return per_rhs[0] if plan.rhs_1d else per_rhs


def scaling_figures(R_scaled: np.ndarray, scale: np.ndarray) -> dict[str, Any]:
    """Condition numbers with and without column equilibration."""
    unscaled = R_scaled / scale[None, :]
    return {
        "column_multipliers": scale,
        "r_condition_equilibrated": metrics.condition_from(metrics.singular_values(R_scaled)),
        "r_condition_unscaled": metrics.condition_from(metrics.singular_values(unscaled)),
    }
