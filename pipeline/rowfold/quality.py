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

from rowfold import __version__, model_tests, summaries
from rowfold.blocks import BlockPlan, load_block, load_weights
from rowfold.errors import EXIT_GATE_FAILED, EXIT_OK, RunError
from rowfold.kernels import metrics, norms
from rowfold.methods import catalog
from rowfold.methods._graph import by_identity, sum_pass, task
from rowfold.methods.base import Engine, Factorization
from rowfold.solve import Solution, Statistics, numerical_rank, rank_tolerance
from rowfold.spec import GateSpec, Job

ROW_OUTPUTS = ("Q", "residuals", "leverage", "redundancy")


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
    ``sqrt(w) (b - A x)``), ``leverage`` (the diagonal of the hat matrix: ``h_i =
    ||q_i||^2`` at full rank, ``||q_i U_r||^2`` with the rank-r range basis ``basis``
    below it, so the leverages sum to the rank) and ``redundancy`` (``1 - h_i`` in
    float64, NaN for rows of weight 0: :func:`rowfold.model_tests.redundancy_numbers`).

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
    weights = None if plan.weights is None else load_weights(plan, index)
    if weights is not None:
        sums["rows_used"] = int(np.count_nonzero(weights))
    rows: dict[str, np.ndarray] = {}
    if "Q" in outputs and q is not None:
        rows["Q"] = q
    if "residuals" in outputs and rhs is not None and x is not None:
        rows["residuals"] = rhs - block @ x
    if q is not None and ("leverage" in outputs or "redundancy" in outputs):
        h = leverages(q, basis)
        if "leverage" in outputs:
            rows["leverage"] = h
        if "redundancy" in outputs:
            rows["redundancy"] = model_tests.redundancy_numbers(h, weights)
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


def verified_sums(
    plan: BlockPlan,
    index: int,
    R: np.ndarray,
    x: np.ndarray | None,
    q_kernel: Callable[[np.ndarray, Any], np.ndarray] | None,
    recipe: Any,
    basis: np.ndarray | None,
) -> metrics.Sums:
    """The verification sums of one block (:func:`verify_block` without per-row outputs)."""
    return verify_block(plan, index, R, x, q_kernel, recipe, (), basis)[0]


@dataclass(frozen=True)
class Verification:
    """Totals of a verification pass.

    Attributes
    ----------
    sums : VerificationSums
        The added block sums (see :func:`rowfold.kernels.metrics.block_sums`); nothing
        measured when there was nothing to verify (no rhs and no Q), and then no pass was
        made.
    formed_q : bool
        Whether Q was formed (so orthogonality figures exist).
    """

    sums: metrics.VerificationSums
    formed_q: bool

    @property
    def passes(self) -> int:
        """Passes over A that the verification made (0 or 1)."""
        return 1 if self.sums.measured else 0


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
    needs_q = form_q or any(name in outputs for name in ("Q", "leverage", "redundancy"))
    q_kernel = fact.q_kernel if needs_q else None
    if q_kernel is None and x is None:
        return Verification(metrics.VerificationSums(), False)
    if sink is None or not outputs:
        recipes = fact.q_recipes if q_kernel else [None] * plan.blocks
        calls = [
            (verified_sums, plan, i, fact.R, x, q_kernel, recipes[i], basis)
            for i in range(plan.blocks)
        ]
        inputs = (verified_sums, plan, fact.R, x, q_kernel, by_identity(recipes), basis)
        shared = [fact.R, x, basis, *by_identity(recipes)[0]]
        root = sum_pass("verify", calls, metrics.add_sums, inputs, shared)
        (total,) = engine.compute([root], "verify")
        return Verification(metrics.VerificationSums.of(total), q_kernel is not None)
    tasks = [
        task(
            verify_block,
            plan,
            i,
            fact.R,
            x,
            q_kernel,
            fact.q_recipes[i] if q_kernel else None,
            outputs,
            basis,
        )
        for i in range(plan.blocks)
    ]
    total_sums: metrics.Sums | None = None
    for index, (sums, rows) in enumerate(engine.stream(tasks, "verify and write rows")):
        sink(plan.bound(index)[0], rows)
        total_sums = sums if total_sums is None else metrics.add_sums(total_sums, sums)
    assert total_sums is not None
    return Verification(metrics.VerificationSums.of(total_sums), q_kernel is not None)


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
    calls = [(column_norm_block, plan, i) for i in range(plan.blocks)]
    root = sum_pass("column-norms", calls, norms.add_norms, (column_norm_block, plan))
    (total,) = engine.compute([root], "column norms")
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
        are not finite (uncontrolled rows: redundancy 0), ``rows_left_out`` the rows of zero
        weight.
    plots_data : dict
        Bounded-size summaries for the plots (:mod:`rowfold.summaries`): ``row_bins``,
        ``sample`` and ``high_leverage``.
    redundancy : dict
        The redundancy numbers' total against the degrees of freedom, and their extremes.
    observation_test : dict
        The per-observation test: which, its critical value, how many rows exceed it and
        the worst rows (or ``evaluated`` false and the reason).
    """

    flag_above: float
    flagged: list[int]
    worst: list[dict[str, Any]]
    histogram: dict[str, Any]
    plots_data: dict[str, Any]
    redundancy: dict[str, Any]
    observation_test: dict[str, Any]


@dataclass(frozen=True)
class ScreeningSetup:
    """What the screening pass needs besides the stored rows.

    Attributes
    ----------
    flag_above : float
        The fixed screening limit on |standardized residual| (``solve.flag_above``).
    s0 : ndarray (k,)
        The a posteriori s0 per rhs (``residual_std``).
    dof : int
        f, the degrees of freedom.
    resolution : float
        Redundancy numbers at or below this are uncontrolled
        (:func:`rowfold.model_tests.redundancy_resolution`).
    test : ObservationTest or None
        The per-observation test; None when it cannot be evaluated.
    redundancy_bound : float
        How far the redundancy numbers' total may lie from f
        (:func:`rowfold.model_tests.redundancy_total_bound`); beyond it the run fails.
    not_tested : dict or None
        The report's ``observation_test`` when ``test`` is None (with the reason).
    """

    flag_above: float
    s0: np.ndarray
    dof: int
    resolution: float
    test: model_tests.ObservationTest | None
    redundancy_bound: float
    not_tested: dict[str, Any] | None = None


def screening_setup(
    job: Job,
    plan: BlockPlan,
    solution: Solution,
    stats: Statistics,
    sums: metrics.VerificationSums,
) -> ScreeningSetup:
    """The critical value, resolution and bound of the screening pass, from the solution
    and the verification sums (the measured ``Q^H Q``)."""
    dof = stats.degrees_of_freedom
    resolution = model_tests.redundancy_resolution(
        plan.cols, solution.scaled_condition(), np.dtype(plan.dtype)
    )
    given = job.solve
    test: model_tests.ObservationTest | str
    if np.dtype(plan.dtype).kind == "c":
        test = "complex data: the per-observation tests here assume real normal errors"
    else:
        test = model_tests.observation_test(
            given.observation_test,
            given.alpha_observation,
            dof,
            given.sigma0,
            stats.residual_std,
            resolution,
        )
    loo = math.inf if sums.qhq is None else metrics.orthogonality_loss(sums.qhq)
    bound = model_tests.redundancy_total_bound(
        plan.rows, plan.cols, solution.rank, dof, loo, plan.per_block
    )
    s0 = np.asarray(stats.residual_std, dtype=float)
    if isinstance(test, str):
        missing = model_tests.unavailable(given.alpha_observation, given.sigma0, test)
        missing["test"] = given.observation_test
        return ScreeningSetup(given.flag_above, s0, dof, resolution, None, bound, missing)
    return ScreeningSetup(given.flag_above, s0, dof, resolution, test, bound)


StoreRows = Callable[[str, int, np.ndarray], None]


def screen_residuals(
    read: Callable[[str, int, int], np.ndarray],
    write: StoreRows,
    plan: BlockPlan,
    setup: ScreeningSetup,
) -> Screening:
    """Standardized and studentized residuals, the redundancy numbers' total and the
    per-observation test, block by block from the stored residuals, leverages and
    redundancy numbers.

    ``read(name, start, stop)`` reads rows of a stored array; ``write(name, start, rows)``
    stores ``standardized_residuals`` (``e_i / (s0 sqrt(r_i))``, Pope's tau) and
    ``studentized_residuals`` (externally studentized). Memory holds one block at a time,
    and the summaries have a fixed size (:mod:`rowfold.summaries`), whatever the rows.

    Raises
    ------
    RunError
        When the redundancy numbers do not sum to the degrees of freedom within
        ``setup.redundancy_bound``: the leverages cannot be trusted (nothing is written).
    """
    tally = model_tests.ObservationTally(plan.rhs_cols, setup.resolution, setup.test)
    plots = _PlotTally(plan)
    for start, stop in plan.bounds:
        e = read("residuals", start, stop).reshape(stop - start, plan.rhs_cols)
        h = read("leverage", start, stop)
        redundancy = read("redundancy", start, stop)
        tau = model_tests.standardized(e, redundancy, setup.s0, setup.resolution)
        studentized = model_tests.externally_studentized(tau, setup.dof)
        write("standardized_residuals", start, tau)
        write("studentized_residuals", start, studentized)
        tally.add(start, e, redundancy, tau, studentized)
        plots.add(start, e, h, redundancy, tau, setup.flag_above)
    _check_redundancy_total(tally.redundancy_total, setup.dof, setup.redundancy_bound)
    observation = tally.test_report(plan.rhs_1d) if setup.test else setup.not_tested
    return plots.screening(
        setup.flag_above,
        tally.redundancy_report(setup.dof, setup.redundancy_bound),
        observation or {},
    )


def _check_redundancy_total(total: float, dof: int, bound: float) -> None:
    """Refuse redundancy numbers whose total is not f: the leverages would be wrong."""
    if not abs(total - dof) <= bound:
        raise RunError(
            f"internal check failed: the redundancy numbers sum to {total!r}, not to the "
            f"{dof} degrees of freedom (allowed difference {bound:.3g}); the leverages "
            "cannot be trusted, nothing was written; please report this"
        )


class _PlotTally:
    """The fixed-size screening summaries: flag counts, the worst rows by |standardized
    residual|, the histogram and the plot summaries (:mod:`rowfold.summaries`)."""

    def __init__(self, plan: BlockPlan) -> None:
        self.plan = plan
        self.flagged = np.zeros(plan.rhs_cols, dtype=int)
        self.edges = np.linspace(-HISTOGRAM_LIMIT, HISTOGRAM_LIMIT, 49)
        self.counts = np.zeros(self.edges.size - 1, dtype=int)
        self.tails = {"below": 0, "above": 0, "not_finite": 0, "rows_left_out": 0}
        self.largest = 0.0
        self.bins = summaries.RowBins(plan.rows, plan.rhs_cols)
        self.sample = summaries.Reservoir()
        self.leverage_top = summaries.Extremes()
        self.worst: list[tuple[float, int, int, float, float]] = []

    def add(
        self,
        start: int,
        r: np.ndarray,
        h: np.ndarray,
        redundancy: np.ndarray,
        z: np.ndarray,
        flag_above: float,
    ) -> None:
        """Add one block: residuals, leverages, redundancy numbers, standardized values."""
        size = np.abs(z)
        self.flagged += np.sum(size > flag_above, axis=0)
        used = summaries.informative(redundancy)
        self.tails["rows_left_out"] += int(np.count_nonzero(~used))
        shown = np.where(used[:, None], np.real(z), np.nan)
        finite = shown[np.isfinite(shown)]
        cols = self.plan.rhs_cols
        self.tails["not_finite"] += int(np.count_nonzero(used)) * cols - finite.size
        self.tails["below"] += int(np.count_nonzero(finite < self.edges[0]))
        self.tails["above"] += int(np.count_nonzero(finite > self.edges[-1]))
        self.largest = max(self.largest, float(np.max(np.abs(finite), initial=0.0)))
        self.counts += np.histogram(finite, bins=self.edges)[0]
        self.bins.add(start, shown)
        rows = np.arange(start, start + r.shape[0])[used]
        self.sample.offer(rows, shown[used], h[used])
        self.leverage_top.offer(rows, shown[used], h[used])
        top = np.argsort(np.nan_to_num(size, nan=-1.0), axis=None)[::-1][:WORST_ROWS]
        for flat in top:
            row, col = divmod(int(flat), cols)
            if np.isfinite(size[row, col]):
                self.worst.append((float(size[row, col]), start + row, col, r[row, col], h[row]))
        self.worst = sorted(self.worst, reverse=True)[:WORST_ROWS]

    def screening(
        self, flag_above: float, redundancy: dict[str, Any], observation: dict[str, Any]
    ) -> Screening:
        """The finished summaries."""
        rhs_1d = self.plan.rhs_1d
        return Screening(
            flag_above,
            [int(v) for v in self.flagged],
            [
                {
                    "row": row,
                    "rhs": col,
                    "residual": float(np.real(res)),
                    "leverage": float(lev),
                    "standardized": value,
                }
                for value, row, col, res, lev in self.worst
            ],
            {
                "edges": [float(e) for e in self.edges],
                "counts": [int(c) for c in self.counts],
                **self.tails,
                "largest": self.largest,
            },
            {
                "row_bins": self.bins.as_dict(rhs_1d),
                "sample": self.sample.as_dict(rhs_1d),
                "high_leverage": self.leverage_top.as_list(rhs_1d),
            },
            redundancy,
            observation,
        )


def published_bound(
    method: str, reorthogonalize: bool, rows: int, cols: int, kappa: float, dtype: np.dtype
) -> dict[str, Any]:
    """The published loss-of-orthogonality bound of a method at condition ``kappa``."""
    key, bound = catalog.bound_of(method, reorthogonalize)
    formula, source = bound.formula, bound.source
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
    rule: str = "value <= limit"

    def as_dict(self) -> dict[str, Any]:
        """The report's form of the gate."""
        return {
            "limit": self.limit,
            "value": self.value,
            "held": self.held,
            "evaluated": self.evaluated,
            "reason": self.reason,
            "rule": self.rule,
        }


# The model_test gate: its value is the smallest p-value over the right-hand sides, its
# limit solve.alpha; it holds when every rhs passes the two-sided test.
MODEL_TEST_RULE = "value >= limit: p-value of the two-sided chi-square test of the model"


GATE_FIGURES = {
    "orthogonality": "orthogonality_loss",
    "residual": "factorization_residual",
    "gram": "gram_residual",
}


def check_gates(
    gates: GateSpec,
    figures: dict[str, Any],
    unmeasured: dict[str, str] | None = None,
    model: model_tests.ModelTest | str | None = None,
    alpha: float = 0.05,
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
    model : ModelTest or str, optional
        The global test of the model for ``gates.model_test``, or why it was not evaluated.
    alpha : float
        Its significance level (``solve.alpha``), the gate's limit.

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
    if gates.model_test:
        results["model_test"] = model_test_gate(model, alpha)
    return results


def model_test_gate(model: model_tests.ModelTest | str | None, alpha: float) -> GateResult:
    """``gates.model_test``: held when the global test passes for every rhs; not evaluated
    (exit 3 all the same) when it could not be computed."""
    if not isinstance(model, model_tests.ModelTest):
        reason = model or "the global test of the model was not computed"
        return GateResult(alpha, None, None, False, reason, MODEL_TEST_RULE)
    p_value = float(np.min(model.p_value))
    held = bool(np.all(model.passed))
    return GateResult(alpha, p_value, held, rule=MODEL_TEST_RULE)


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
    checked: metrics.VerificationSums,
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
    figure is reported as not evaluated, and the report's ``exit_status`` is then 3. The
    figures come from the factorization's first-pass totals and the verification totals
    ``checked``; this is the one place the report is made from them.
    """
    sigma = metrics.singular_values(fact.R)
    figures = _quality_figures(plan, fact, checked, formed_q, sigma)
    used = str(fact.details.get("method_used", job.method.name))
    report: dict[str, Any] = {
        **_run_header(job, fact, used),
        "orthogonality_bound": _bound_entry(job, plan, used, figures),
        **_shape_entries(plan, passes, seconds, peak_memory),
        **figures,
        "r_singular_values": sigma,
        "r_diagonal": np.real(np.diagonal(fact.R)),
        "rank": solution.rank if solution else _rank_only(fact.R, job),
        "warnings": [],
        "output": str(job.resolved.get("output", {}).get("path", job.output.path)),
    }
    norm_a = float(sigma[0]) if sigma.size else 0.0
    report.update(_answer_figures(plan, solution, stats, checked, norm_a))
    report["warnings"].extend(_figure_warnings(plan, fact, report["rank"]))
    model = _global_test(job, plan, solution, stats)
    report.update(_model_figures(job, plan, model))
    reasons = _unmeasured_reasons(formed_q, figures["factorization_residual"], unmeasured)
    gates = check_gates(job.gates, figures, reasons, model, job.solve.alpha)
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


def _quality_figures(
    plan: BlockPlan,
    fact: Factorization,
    checked: metrics.VerificationSums,
    formed_q: bool,
    sigma: np.ndarray,
) -> dict[str, Any]:
    """Loss of orthogonality and factorization residual (None unless Q was formed), the
    Gram residual and the condition of R."""
    return {
        "orthogonality_loss": _orthogonality_loss(checked) if formed_q else None,
        "factorization_residual": _factorization_residual(checked) if formed_q else None,
        "gram_residual": metrics.gram_residual(fact.sums.gram, fact.R, plan.rows),
        "r_condition": metrics.condition_from(sigma),
    }


def _bound_entry(job: Job, plan: BlockPlan, used: str, figures: dict[str, Any]) -> dict[str, Any]:
    """The published bound on the loss of orthogonality of the method used, with the
    measured loss and whether it held."""
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
    return bound


def _run_header(job: Job, fact: Factorization, used: str) -> dict[str, Any]:
    """Version, job name and file, and the method asked for and used."""
    return {
        "rowfold_version": __version__,
        "name": job.name,
        "job_file": str(job.source),
        "method": job.method.name,
        "method_used": used,
        "method_details": fact.details,
    }


def plan_shape(plan: BlockPlan) -> dict[str, Any]:
    """The problem's shape and row blocks, as the report and ``check`` give them."""
    return {
        "rows": plan.rows,
        "cols": plan.cols,
        "rhs_cols": plan.rhs_cols,
        "dtype": plan.dtype,
        "blocks": plan.blocks,
        "rows_per_block": plan.per_block,
    }


def _shape_entries(
    plan: BlockPlan, passes: int, seconds: dict[str, float], peak_memory: int
) -> dict[str, Any]:
    """The problem's shape and blocks, the passes over the input, time and memory."""
    return {
        **plan_shape(plan),
        "passes_over_input": passes,
        "seconds": {k: round(v, 4) for k, v in seconds.items()},
        "peak_memory_bytes": peak_memory,
    }


def _answer_figures(
    plan: BlockPlan,
    solution: Solution | None,
    stats: Statistics | None,
    checked: metrics.VerificationSums,
    norm_a: float,
) -> dict[str, Any]:
    """The solution's figures, or None for each without a solution."""
    if solution is not None and stats is not None:
        return _solution_figures(plan, solution, stats, checked, norm_a)
    return {"solution_residual_norm": None, "residual_std": None, "normal_equations_residual": None}


def _figure_warnings(plan: BlockPlan, fact: Factorization, rank: int) -> list[str]:
    """Warnings about the figures: rank deficiency, and a Gram out of float64's range."""
    found = []
    if rank < plan.cols:
        found.append(
            f"rank deficient: numerical rank {rank} of {plan.cols} columns; "
            "x is the least-squares solution of minimum norm in the scaled variables D x "
            "(D: the power of two nearest each column norm); fix a datum "
            "(input.fixed_columns) for a unique solution"
        )
    problem = metrics.gram_range_problem(fact.sums.gram, plan.rows)
    if problem is not None:
        found.append(
            f"A^H A {problem} in float64 at this scaling of A, so gram_residual is not "
            "measured; solve.scale_columns: true brings the columns to norm about 1"
        )
    return found


def _orthogonality_loss(sums: metrics.VerificationSums) -> float | None:
    """``||I - Q^H Q||_F`` from the Gram the verification pass added."""
    return None if sums.qhq is None else metrics.orthogonality_loss(sums.qhq)


def _factorization_residual(sums: metrics.VerificationSums) -> float | None:
    """``||A - QR||_F / ||A||_F`` from the norms the verification pass added."""
    defect, a_norm = sums.defect, sums.a_norm
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
    plan: BlockPlan,
    solution: Solution,
    stats: Statistics,
    sums: metrics.VerificationSums,
    norm_a: float,
) -> dict[str, Any]:
    ne = None
    if sums.ahr is not None:
        ne = _per_rhs(
            plan, metrics.normal_equations_residual(sums.ahr, norm_a, stats.residual_norm)
        )
    return {
        "rank_tolerance": solution.tolerance,
        "rank_deficient_columns": solution.deficient_columns,
        "degrees_of_freedom": stats.degrees_of_freedom,
        "solution_residual_norm": _per_rhs(plan, stats.residual_norm),
        "residual_std": _per_rhs(plan, stats.residual_std),
        "normal_equations_residual": ne,
    }


def _global_test(
    job: Job, plan: BlockPlan, solution: Solution | None, stats: Statistics | None
) -> model_tests.ModelTest | str:
    """The global chi-square test of the model, or why it cannot be evaluated."""
    dof = stats.degrees_of_freedom if stats is not None else 0
    complex_data = np.dtype(plan.dtype).kind == "c"
    reason = model_tests.global_test_unavailable(stats is not None, dof, complex_data)
    if reason is not None or stats is None:
        return reason or "no solution"
    return model_tests.global_test(stats.residual_norm, dof, job.solve.sigma0, job.solve.alpha)


def _model_figures(job: Job, plan: BlockPlan, model: model_tests.ModelTest | str) -> dict[str, Any]:
    """The report's ``variance_factor`` (s0^2, a posteriori) and ``model_test``."""
    if isinstance(model, str):
        return {
            "variance_factor": None,
            "model_test": model_tests.unavailable(job.solve.alpha, job.solve.sigma0, model),
        }
    return {
        "variance_factor": _per_rhs(plan, model.variance_factor),
        "model_test": model.as_dict(plan.rhs_1d),
    }
