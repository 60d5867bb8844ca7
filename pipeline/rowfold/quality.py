"""Out-of-core quality metrics and gates.

One verification pass reads each row block once more and, in the same task, forms the
block of Q (when wanted), the residual ``r = b - A x``, and the additive sums of
:mod:`rowfold.kernels.metrics`. The totals become the report figures; the gates compare
them with the job's limits.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from rowfold import __version__, summaries
from rowfold.blocks import BlockPlan, load_block, load_weights
from rowfold.errors import EXIT_GATE_FAILED, EXIT_OK
from rowfold.kernels import metrics, norms
from rowfold.methods._graph import sum_tree, task
from rowfold.methods.base import Engine, Factorization
from rowfold.solve import Solution, Statistics, numerical_rank, rank_tolerance
from rowfold.spec import GateSpec, Job

ROW_OUTPUTS = ("Q", "residuals", "leverage")


def verify_block(
    plan: BlockPlan,
    index: int,
    R: np.ndarray,
    x: np.ndarray | None,
    q_kernel: Callable[[np.ndarray, Any], np.ndarray] | None,
    recipe: Any,
    outputs: tuple[str, ...],
    basis: np.ndarray | None = None,
) -> tuple[metrics.Sums, dict[str, np.ndarray]]:
    """Read one block; return its verification sums and the per-row outputs asked for.

    Per-row outputs: ``Q`` (the block of Q), ``residuals`` (weighted residuals
    ``sqrt(w) (b - A x)``) and ``leverage`` (the diagonal of the hat matrix: ``h_i =
    ||q_i||^2`` at full rank, ``||q_i U_r||^2`` with the rank-r range basis ``basis``
    below it, so the leverages sum to the rank).

    Q is rounded to the plan's dtype (the dtype it is stored in) before anything is
    measured, so the figures and leverages are those of the Q that is written.
    """
    if plan.sparse and q_kernel is None:
        # residual sums need only products with A: keep a CSR block sparse
        block, rhs = plan.load_sparse(index)
    else:
        block, rhs = load_block(plan, index, "C")
    q = None if q_kernel is None else stored_q(q_kernel(block, recipe), plan)
    sums = metrics.block_sums(block, rhs, x, R, q)
    if plan.weights is not None:
        sums["rows_used"] = int(np.count_nonzero(load_weights(plan, index)))
    rows: dict[str, np.ndarray] = {}
    if "Q" in outputs and q is not None:
        rows["Q"] = q
    if "residuals" in outputs and rhs is not None and x is not None:
        rows["residuals"] = rhs - block @ x
    if "leverage" in outputs and q is not None:
        rows["leverage"] = leverages(q, basis)
    return sums, rows


def stored_q(q: np.ndarray, plan: BlockPlan) -> np.ndarray:
    """A block of Q in the dtype the store holds it in (the plan's working dtype)."""
    return np.asarray(q, dtype=np.dtype(plan.dtype))


def leverages(q: np.ndarray, basis: np.ndarray | None) -> np.ndarray:
    """Squared row norms of ``Q`` (or of ``Q U_r``), accumulated in at least float64."""
    wide = np.asarray(q, dtype=np.promote_types(q.dtype, np.float64))
    if basis is not None:
        wide = wide @ basis.astype(wide.dtype, copy=False)
    return np.asarray(np.sum(np.abs(wide) ** 2, axis=1))


def first_of(pair: tuple[Any, Any]) -> Any:
    """Return the first item of a pair (the sums of a verify task)."""
    return pair[0]


@dataclass(frozen=True)
class Verification:
    """Totals of a verification pass.

    Attributes
    ----------
    sums : dict
        The added block sums (see :func:`rowfold.kernels.metrics.block_sums`); empty when
        there was nothing to verify (no rhs and no Q), and then no pass was made.
    formed_q : bool
        Whether Q was formed (so orthogonality figures exist).
    """

    sums: metrics.Sums
    formed_q: bool

    @property
    def passes(self) -> int:
        """Passes over A that the verification made (0 or 1)."""
        return 1 if self.sums else 0


RowSink = Callable[[int, dict[str, np.ndarray]], None]


def verify(
    plan: BlockPlan,
    fact: Factorization,
    x: np.ndarray | None,
    engine: Engine,
    form_q: bool,
    outputs: tuple[str, ...] = (),
    sink: RowSink | None = None,
    basis: np.ndarray | None = None,
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
    outputs : tuple of str
        Per-row outputs to hand to ``sink`` (any of :data:`ROW_OUTPUTS`).
    sink : callable or None
        Called with (start row, {name: rows}) for every block, in order; blocks are
        streamed so only a few are in memory at once.
    basis : ndarray (n, r) or None
        The solution's range basis ``U_r`` below full rank (leverages ``||q_i U_r||^2``).
    """
    needs_q = form_q or "Q" in outputs or "leverage" in outputs
    q_kernel = fact.q_kernel if needs_q else None
    if q_kernel is None and x is None:
        return Verification({}, False)
    tasks = [
        task(
            verify_block,
            plan,
            i,
            fact.R,
            x,
            q_kernel,
            fact.q_recipes[i] if q_kernel else None,
            outputs if sink else (),
            basis,
        )
        for i in range(plan.blocks)
    ]
    if sink is None or not outputs:
        (total,) = engine.compute(
            [sum_tree([task(first_of, t) for t in tasks], metrics.add_sums)], "verify"
        )
        return Verification(total, q_kernel is not None)
    total_sums: metrics.Sums | None = None
    for index, (sums, rows) in enumerate(engine.stream(tasks, "verify and write rows")):
        sink(plan.bound(index)[0], rows)
        total_sums = sums if total_sums is None else metrics.add_sums(total_sums, sums)
    assert total_sums is not None
    return Verification(total_sums, q_kernel is not None)


def column_norm_block(plan: BlockPlan, index: int) -> norms.RootSumSquares:
    """Column norms of one (weighted) block, free of overflow and underflow."""
    block, _ = load_block(plan, index, "C")
    return norms.column_norm_sums(block)


def column_norms(plan: BlockPlan, engine: Engine) -> np.ndarray:
    """Column norms of the (weighted) matrix, in one pass (for ``solve.scale_columns``).

    Block norms are combined with ``hypot``, so the norms are right at any scaling that
    float64 can hold (a sum of squares would overflow above about 1e154 and lose its
    digits below about 1e-154).
    """
    tasks = [task(column_norm_block, plan, i) for i in range(plan.blocks)]
    (total,) = engine.compute([sum_tree(tasks, norms.add_norms)], "column norms")
    return np.asarray(total.value)


def equilibration(norms_: np.ndarray) -> np.ndarray:
    """Column multipliers that bring each column norm into [2^-0.5, 2^0.5).

    Powers of two, so scaling A is exact and adds no rounding error (the same reason
    LAPACK's equilibration offers radix-power scaling); zero columns keep multiplier 1.
    """
    return np.asarray(1.0 / norms.power_of_two_scale(norms_))


WORST_ROWS = 20
# The histogram of standardized residuals covers +-HISTOGRAM_LIMIT; values beyond are
# counted apart (``below``, ``above``), never folded into the outer bins.
HISTOGRAM_LIMIT = 6.0


@dataclass(frozen=True)
class Screening:
    """Standardized-residual screening (survey practice: data snooping).

    Attributes
    ----------
    flag_above : float
        Threshold on |standardized residual|.
    flagged : list of int
        Count of flagged rows per right-hand side.
    worst : list of dict
        The largest |standardized residuals|: row, rhs column, residual, leverage, value.
    histogram : dict
        ``edges`` and ``counts`` over +-HISTOGRAM_LIMIT; ``below`` and ``above`` count the
        values beyond, ``largest`` is the largest |value|, ``not_finite`` counts values that
        are not finite (leverage 1), ``rows_left_out`` the rows of zero weight.
    plots_data : dict
        Bounded-size summaries for the plots (:mod:`rowfold.summaries`): ``row_bins``,
        ``sample`` and ``high_leverage``.
    """

    flag_above: float
    flagged: list[int]
    worst: list[dict[str, Any]]
    histogram: dict[str, Any]
    plots_data: dict[str, Any]


def standardized(residuals: np.ndarray, leverage: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """``r_i / (sigma sqrt(1 - h_i))``; NaN where ``1 - h_i`` is not positive."""
    spare = 1.0 - leverage
    safe = np.where(spare > 0, spare, np.nan)
    return residuals / (np.sqrt(safe)[:, None] * np.where(sigma > 0, sigma, np.nan)[None, :])


def screen_residuals(
    read: Callable[[str, int, int], np.ndarray],
    write: Callable[[int, np.ndarray], None],
    plan: BlockPlan,
    sigma: np.ndarray,
    flag_above: float,
) -> Screening:
    """Compute standardized residuals block by block from stored residuals and leverages.

    ``read(name, start, stop)`` reads rows of a stored array; ``write(start, rows)``
    stores the standardized residuals. Memory holds one block at a time, and the summaries
    for the plots have a fixed size (:mod:`rowfold.summaries`), whatever the rows.
    """
    flagged = np.zeros(plan.rhs_cols, dtype=int)
    edges = np.linspace(-HISTOGRAM_LIMIT, HISTOGRAM_LIMIT, 49)
    counts = np.zeros(edges.size - 1, dtype=int)
    tails = {"below": 0, "above": 0, "not_finite": 0, "rows_left_out": 0}
    largest = 0.0
    bins = summaries.RowBins(plan.rows, plan.rhs_cols)
    sample = summaries.Reservoir()
    leverage_top = summaries.Extremes()
    worst: list[tuple[float, int, int, float, float]] = []
    for start, stop in plan.bounds:
        r = read("residuals", start, stop).reshape(stop - start, plan.rhs_cols)
        h = read("leverage", start, stop)
        z = standardized(r, h, sigma)
        write(start, z)
        size = np.abs(z)
        flagged += np.sum(size > flag_above, axis=0)
        used = summaries.informative(r, h)
        tails["rows_left_out"] += int(np.count_nonzero(~used))
        shown = np.where(used[:, None], np.real(z), np.nan)
        finite = shown[np.isfinite(shown)]
        tails["not_finite"] += int(np.count_nonzero(used)) * plan.rhs_cols - finite.size
        tails["below"] += int(np.count_nonzero(finite < edges[0]))
        tails["above"] += int(np.count_nonzero(finite > edges[-1]))
        largest = max(largest, float(np.max(np.abs(finite), initial=0.0)))
        counts += np.histogram(finite, bins=edges)[0]
        bins.add(start, shown)
        rows = np.arange(start, stop)[used]
        sample.offer(rows, shown[used], h[used])
        leverage_top.offer(rows, shown[used], h[used])
        top = np.argsort(np.nan_to_num(size, nan=-1.0), axis=None)[::-1][:WORST_ROWS]
        for flat in top:
            row, col = divmod(int(flat), plan.rhs_cols)
            if np.isfinite(size[row, col]):
                worst.append((float(size[row, col]), start + row, col, r[row, col], h[row]))
        worst = sorted(worst, reverse=True)[:WORST_ROWS]
    return Screening(
        flag_above,
        [int(v) for v in flagged],
        [
            {
                "row": row,
                "rhs": col,
                "residual": float(np.real(res)),
                "leverage": float(lev),
                "standardized": value,
            }
            for value, row, col, res, lev in worst
        ],
        {
            "edges": [float(e) for e in edges],
            "counts": [int(c) for c in counts],
            **tails,
            "largest": largest,
        },
        {
            "row_bins": bins.as_dict(plan.rhs_1d),
            "sample": sample.as_dict(plan.rhs_1d),
            "high_leverage": leverage_top.as_list(plan.rhs_1d),
        },
    )


# Published loss-of-orthogonality bounds, as (formula, source); see CHECKS.md. "10 n u"
# stands for a bound of order u, with a constant that is common practice, not published.
# Where the constant of a published bound was recalled rather than read again at its
# source, the source text says so.
RECALLED = "constant recalled from the literature, not re-checked"
BOUNDS: dict[str, tuple[str, str]] = {
    "tsqr": (
        "10 n u",
        "O(u) for any tree: Higham 2002 ch. 19; Demmel, Grigori, Hoemmen, Langou, SISC 34(1) 2012",
    ),
    "cholqr2": (
        "6 (m n u + n (n+1) u)",
        "Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44 (2015), for kappa below ~1e8; "
        + RECALLED,
    ),
    "scholqr3": (
        "6 (m n u + n (n+1) u)",
        "O(u): Fukaya, Kannan, Nakatsukasa, Yamamoto, Yanagisawa, SISC 42(1) 2020; " + RECALLED,
    ),
    "rcholqr": ("10 n u", "O(u): Higgins, Szyld, Boman, Yamazaki 2023 (arXiv 2309.05868)"),
    "bcgs2": ("10 n u", "O(u): Barlow & Smoktunowicz, Numer. Math. 123 (2013)"),
    "bmgs+reorthogonalize": (
        "10 n u",
        "O(u) with a second projection: Barlow & Smoktunowicz, Numer. Math. 123 (2013)",
    ),
    "bmgs": (
        "10 n u kappa",
        "O(u kappa): Jalby & Philippe, SISC 12(5) 1991; " + RECALLED,
    ),
}


def published_bound(
    method: str, reorthogonalize: bool, rows: int, cols: int, kappa: float, dtype: np.dtype
) -> dict[str, Any]:
    """The published loss-of-orthogonality bound of a method at condition ``kappa``."""
    key = "bmgs+reorthogonalize" if method == "bmgs" and reorthogonalize else method
    formula, source = BOUNDS.get(key, BOUNDS["tsqr"])
    u = float(np.finfo(dtype).eps) / 2
    values = {
        "10 n u": 10 * cols * u,
        "6 (m n u + n (n+1) u)": 6 * (rows * cols * u + cols * (cols + 1) * u),
        "10 n u kappa": 10 * cols * u * kappa,
    }
    return {"method": key, "formula": formula, "value": values[formula], "source": source}


@dataclass(frozen=True)
class GateResult:
    """One gate: its limit, the measured value and whether it held.

    A gate whose figure was not measured is not evaluated: ``value`` and ``held`` are None,
    ``evaluated`` is False and ``reason`` says why. It is never dropped, and it counts as a
    gate that did not hold (exit status 3): nobody may read it as passed.
    """

    limit: float
    value: float | None
    held: bool | None
    evaluated: bool = True
    reason: str | None = None

    def as_dict(self) -> dict[str, Any]:
        """The report's form of the gate."""
        return {
            "limit": self.limit,
            "value": self.value,
            "held": self.held,
            "evaluated": self.evaluated,
            "reason": self.reason,
        }


GATE_FIGURES = {
    "orthogonality": "orthogonality_loss",
    "residual": "factorization_residual",
    "gram": "gram_residual",
}


def check_gates(
    gates: GateSpec, figures: dict[str, Any], unmeasured: dict[str, str] | None = None
) -> dict[str, GateResult]:
    """Compare report figures with the job's gates.

    Parameters
    ----------
    gates : GateSpec
        The job's limits; a gate without a limit is not set and not reported.
    figures : dict
        The measured figures (see :data:`GATE_FIGURES`); None where not measured.
    unmeasured : dict, optional
        Why a figure was not measured, by figure name (e.g. Q was not formed).

    Returns
    -------
    dict
        One :class:`GateResult` per gate set: held or failed when its figure was measured
        (a non-finite value fails), not evaluated (held None) when it was not.
    """
    reasons = unmeasured or {}
    results: dict[str, GateResult] = {}
    for name, figure in GATE_FIGURES.items():
        limit = getattr(gates, name)
        if limit is None:
            continue
        value = figures.get(figure)
        if value is None:
            reason = reasons.get(figure, f"{figure} was not measured in this run")
            results[name] = GateResult(limit, None, None, evaluated=False, reason=reason)
            continue
        held = bool(np.isfinite(value)) and value <= limit
        results[name] = GateResult(limit=limit, value=value, held=held)
    return results


def gates_status(gates: dict[str, dict[str, Any]]) -> str:
    """``held`` when every gate held, else ``failed`` or ``not evaluated`` (failed first)."""
    if any(g["held"] is False for g in gates.values()):
        return "failed"
    if any(g["held"] is None for g in gates.values()):
        return "not evaluated"
    return "held"


def _clean(value: Any) -> Any:
    """Turn numpy values into JSON data; NaN and infinity become null."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return _clean(value.tolist())
    if isinstance(value, np.generic):
        return _clean(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _per_rhs(plan: BlockPlan, values: np.ndarray) -> Any:
    """A number for a 1-D rhs, a list (one per column) for a 2-D rhs."""
    return float(values[0]) if plan.rhs_1d else [float(v) for v in values]


def assemble_report(
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    stats: Statistics | None,
    sums: metrics.Sums,
    formed_q: bool,
    seconds: dict[str, float],
    peak_memory: int,
    passes: int,
    extra: dict[str, Any],
    unmeasured: dict[str, str] | None = None,
) -> dict[str, Any]:
    """Assemble the report dictionary (the keys SPEC lists, and more).

    The answer comes first (:data:`ANSWER_FIRST`: the parameters, the datum, the
    refinement and the inputs, when ``extra`` holds them), then the quality figures.
    ``unmeasured`` says why a figure was not measured (by figure name); a gate on such a
    figure is reported as not evaluated, and the report's ``exit_status`` is then 3.
    """
    sigma = metrics.singular_values(fact.R)
    norm_a = float(sigma[0]) if sigma.size else 0.0
    figures: dict[str, Any] = {
        "orthogonality_loss": metrics.orthogonality_loss(sums["qhq"]) if formed_q else None,
        "factorization_residual": _factorization_residual(sums) if formed_q else None,
        "gram_residual": metrics.gram_residual(sums["gram"], fact.R, plan.rows),
        "r_condition": metrics.condition_from(sigma),
    }
    used = str(fact.details.get("method_used", job.method.name))
    bound = published_bound(
        used,
        job.method.reorthogonalize,
        plan.rows,
        plan.cols,
        figures["r_condition"],
        np.dtype(plan.dtype),
    )
    loo = figures["orthogonality_loss"]
    bound["measured"] = loo
    bound["within"] = None if loo is None else bool(loo <= bound["value"])
    report: dict[str, Any] = {
        "rowfold_version": __version__,
        "name": job.name,
        "job_file": str(job.source),
        "method": job.method.name,
        "method_used": used,
        "method_details": fact.details,
        "orthogonality_bound": bound,
        "rows": plan.rows,
        "cols": plan.cols,
        "rhs_cols": plan.rhs_cols,
        "dtype": plan.dtype,
        "blocks": plan.blocks,
        "rows_per_block": plan.per_block,
        "passes_over_input": passes,
        "seconds": {k: round(v, 4) for k, v in seconds.items()},
        "peak_memory_bytes": peak_memory,
        **figures,
        "r_singular_values": sigma,
        "r_diagonal": np.real(np.diagonal(fact.R)),
        "rank": solution.rank if solution else _rank_only(fact.R, job),
        "warnings": [],
        "output": str(job.output.path),
    }
    if solution is not None and stats is not None:
        report.update(_solution_figures(plan, solution, stats, sums, norm_a))
    else:
        report.update(
            {
                "solution_residual_norm": None,
                "residual_std": None,
                "normal_equations_residual": None,
            }
        )
    if report["rank"] < plan.cols:
        report["warnings"].append(
            f"rank deficient: numerical rank {report['rank']} of {plan.cols} columns; "
            "x is the least-squares solution of minimum norm in the scaled variables D x "
            "(D: the power of two nearest each column norm); fix a datum "
            "(input.fixed_columns) for a unique solution"
        )
    problem = metrics.gram_range_problem(sums["gram"], plan.rows)
    if problem is not None:
        report["warnings"].append(
            f"A^H A {problem} in float64 at this scaling of A, so gram_residual is not "
            "measured; solve.scale_columns: true brings the columns to norm about 1"
        )
    reasons = _unmeasured_reasons(formed_q, figures["factorization_residual"], unmeasured)
    gates = check_gates(job.gates, figures, reasons)
    report["gates"] = {name: g.as_dict() for name, g in gates.items()}
    report["gates_status"] = gates_status(report["gates"])
    report["exit_status"] = EXIT_OK if report["gates_status"] == "held" else EXIT_GATE_FAILED
    warnings = report["warnings"] + list(extra.get("warnings", []))
    warnings += [
        f"gate {name} not evaluated: {g.reason}" for name, g in gates.items() if not g.evaluated
    ]
    report.update(extra)
    report["warnings"] = warnings
    cleaned: dict[str, Any] = _clean(_answer_first(report))
    return cleaned


def _factorization_residual(sums: metrics.Sums) -> float | None:
    """``||A - QR||_F / ||A||_F`` from the norms the verification pass added."""
    defect, a_norm = sums.get("defect"), sums.get("a_norm")
    if defect is None or a_norm is None:
        return None
    size = float(a_norm.value)
    return float(defect.value) / size if size > 0 else None


# Report keys that come first: who and what, the verdict, then the answer.
ANSWER_FIRST = (
    "rowfold_version",
    "name",
    "job_file",
    "exit_status",
    "gates_status",
    "parameters",
    "datum",
    "refinement",
    "inputs",
)


def _answer_first(report: dict[str, Any]) -> dict[str, Any]:
    """The same report with the keys of :data:`ANSWER_FIRST` in front, in that order."""
    front = {key: report[key] for key in ANSWER_FIRST if key in report}
    return {**front, **{k: v for k, v in report.items() if k not in front}}


def _unmeasured_reasons(
    formed_q: bool, factorization_residual: float | None, given: dict[str, str] | None
) -> dict[str, str]:
    """Why figures were not measured: the caller's reasons, else what this run knows."""
    reasons: dict[str, str] = {}
    if not formed_q:
        reasons["orthogonality_loss"] = "Q was not formed in this run"
        reasons["factorization_residual"] = "Q was not formed in this run"
    elif factorization_residual is None:
        reasons["factorization_residual"] = "||A||_F is 0, so the relative residual is undefined"
    reasons.update(given or {})
    return reasons


def _rank_only(R: np.ndarray, job: Job) -> int:
    rank, _ = numerical_rank(R, rank_tolerance(R.shape[1], R.dtype, job.solve.rank_tolerance))
    return rank


def _solution_figures(
    plan: BlockPlan, solution: Solution, stats: Statistics, sums: metrics.Sums, norm_a: float
) -> dict[str, Any]:
    ne = None
    if "ahr" in sums:
        ne = _per_rhs(
            plan, metrics.normal_equations_residual(sums["ahr"], norm_a, stats.residual_norm)
        )
    return {
        "rank_tolerance": solution.tolerance,
        "rank_deficient_columns": solution.deficient_columns,
        "degrees_of_freedom": stats.degrees_of_freedom,
        "solution_residual_norm": _per_rhs(plan, stats.residual_norm),
        "residual_std": _per_rhs(plan, stats.residual_std),
        "normal_equations_residual": ne,
    }
