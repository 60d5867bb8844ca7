"""The stages of a run, with typed values between them:
plan -> scale -> factor -> solve -> refine -> verify -> screen -> report -> commit."""

from __future__ import annotations

import contextvars
import json
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from rowfold import __version__, quality, segments, storage
from rowfold.answer import (
    answer_entry,
    covariance_of,
    fixed_note,
    multipliers,
    residual_factor,
    rhs_shaped,
    scaling_figures,
    unscaled,
)
from rowfold.blocks import BlockPlan, expand_columns
from rowfold.errors import EXIT_GATE_FAILED, EXIT_OK
from rowfold.kernels.metrics import FirstPassSums, VerificationSums
from rowfold.methods import get_method
from rowfold.methods._graph import map_pass
from rowfold.methods.base import Context, Engine, Factorization
from rowfold.planning import wants_q
from rowfold.provenance import provenance
from rowfold.refine import refine
from rowfold.report import CAUTION, render_html, to_json
from rowfold.solve import Solution, Statistics, solve, statistics
from rowfold.spec import Job
from rowfold.storage.checkpoints import CheckpointFolder, block_stamp, open_checkpoints
from rowfold.storage.checkpoints import job_digest as job_digest_of


@dataclass
class RunOutcome:
    """What a finished run produced.

    Attributes
    ----------
    status : int
        0 when every gate held, 3 when one failed or could not be evaluated.
    report : dict
        The report as written to JSON.
    output : Path or str
        The committed result store (its URL on an object store).
    """

    status: int
    report: dict[str, Any]
    output: Path | str


@dataclass
class Clock:
    """Seconds per stage."""

    seconds: dict[str, float] = field(default_factory=dict)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        started = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = self.seconds.get(name, 0.0) + time.perf_counter() - started


# Whether the run being committed draws its HTML report (run_job's ``html``).
DRAW_HTML: contextvars.ContextVar[bool] = contextvars.ContextVar("draw_html", default=True)


@dataclass(frozen=True)
class ResultState:
    """What a result store keeps so that ``update``, ``replace`` and ``retire`` need not read
    its rows again.

    Attributes
    ----------
    first : FirstPassSums
        ``||A||_F^2`` and ``A^H A`` of the rows the answer covers.
    rtr : ndarray (k, k) or None
        The residual Gram ``r^H r`` (None without right-hand sides).
    rows_used : int
        Rows of nonzero weight.
    rows_done : int
        Rows of the input read so far (the next update starts there).
    input_digests : dict
        The row-block digests of every input (:mod:`rowfold.storage.digests`).
    segments : list of segments.Entry
        The live segments.
    retired_segments : list of dict
        Segments retired so far (their records only).
    """

    first: FirstPassSums
    rtr: np.ndarray | None
    rows_used: int
    rows_done: int
    input_digests: dict[str, Any]
    segments: list[segments.Entry]
    retired_segments: list[dict[str, Any]] = field(default_factory=list)


def checkpoints_for(
    job: Job, plan: BlockPlan, inputs: dict[str, Any], resume: bool
) -> CheckpointFolder | None:
    """The checkpoint folder for methods that checkpoint their first pass (tsqr).

    Each block's checkpoint is stamped with the digest of the job (without its cluster and
    update sections) and of the block's rows in every input; on ``resume`` only those whose
    stamp and content still hold are kept (see :mod:`rowfold.storage.checkpoints`).
    """
    if job.method.name != "tsqr" or job.solve.scale_columns:
        return None
    resolved = {k: v for k, v in job.resolved.items() if k not in ("cluster", "update")}
    job_digest = job_digest_of(resolved)
    names = sorted(inputs)
    blocks = [
        [start, stop, block_stamp(job_digest, start, stop, row_digests)]
        for (start, stop), *row_digests in zip(
            plan.bounds, *(inputs[name]["block_digests"] for name in names), strict=True
        )
    ]
    folder, _, _ = open_checkpoints(job.output.local, {"job": job_digest, "blocks": blocks}, resume)
    return CheckpointFolder(folder)


def fingerprints(job: Job, plan: BlockPlan, engine: Engine) -> dict[str, Any]:
    """Digest every row block of each input on the workers (they are the ones that see the
    files): the records the store keeps for ``update`` and that checkpoints are tied to
    (:mod:`rowfold.storage.digests`). The plan's blocks cover ``[plan.first_row, m)``."""
    refs = {"matrix": plan.matrix, "rhs": plan.rhs, "weights": plan.weights}
    shapes = {
        "matrix": (plan.rows, plan.input_cols),
        "rhs": (plan.rows,) if plan.rhs_1d else (plan.rows, plan.rhs_cols),
        "weights": (plan.rows,),
    }
    present = {name: ref for name, ref in refs.items() if ref is not None}
    sources = tuple((ref, name == "matrix" and plan.sparse) for name, ref in present.items())
    bounds = plan.bounds
    calls = [(storage.block_digests, sources, start, stop) for start, stop in bounds]
    edges = np.asarray(bounds, dtype=np.int64)  # hashed as one array, not 2 numbers a block
    digests = map_pass("digests", calls, (storage.block_digests, sources, edges))
    (per_block,) = engine.compute([digests], "fingerprint inputs")
    return {
        name: storage.input_record(
            ref, csr, shapes[name], bounds, [digests[i] for digests in per_block]
        )
        for i, ((name, ref), (_, csr)) in enumerate(zip(present.items(), sources, strict=True))
    }


@dataclass(frozen=True)
class Answer:
    """What the scale, factor, solve and refine stages produced, for the report and the store.

    Attributes
    ----------
    names : tuple of str
        The parameter names, one per input column.
    fact : Factorization
        R, ``Q^H b`` and the Q recipe (in working coordinates).
    solution : Solution or None
        x and what solving made of R (None without right-hand sides).
    stats : Statistics or None
        Residual statistics and standard errors (None until verified, or without rhs).
    scale : ndarray or None
        The column multipliers of ``solve.scale_columns``.
    """

    names: tuple[str, ...]
    fact: Factorization
    solution: Solution | None
    stats: Statistics | None = None
    scale: np.ndarray | None = None


@dataclass(frozen=True)
class Scaled:
    """The plan as the factor stage sees it, and the column multipliers it applies."""

    plan: BlockPlan
    scale: np.ndarray | None


def scale_stage(job: Job, plan: BlockPlan, engine: Engine) -> Scaled:
    """Column equilibration (``solve.scale_columns``): one pass for the column norms."""
    if not job.solve.scale_columns:
        return Scaled(plan, None)
    scale = quality.equilibration(quality.column_norms(plan, engine))
    return Scaled(replace(plan, column_scale=tuple(scale)), scale)


def factor_stage(job: Job, plan: BlockPlan, ctx: Context) -> Factorization:
    """The job's method (``method.name``) over the row blocks."""
    return get_method(job.method.name)(plan, job.method, ctx)


def solve_stage(job: Job, fact: Factorization) -> Solution | None:
    """x from R and ``Q^H b`` (None without right-hand sides)."""
    return None if fact.qhb is None else solve(fact.R, fact.qhb, job.solve.rank_tolerance)


@dataclass(frozen=True)
class Refinement:
    """What ``solve.refine`` did: the solution it left, its passes, its report entry and
    why it was skipped (None when it ran or was not asked for)."""

    solution: Solution | None
    passes: int = 0
    entry: dict[str, Any] | None = None
    skipped: str | None = None


def refine_stage(
    job: Job, plan: BlockPlan, fact: Factorization, solution: Solution | None, ctx: Context
) -> Refinement:
    """Refine x when asked and the problem has full rank."""
    if not job.solve.refine or solution is None:
        return Refinement(solution)
    if solution.rank < plan.cols:
        return Refinement(solution, skipped="solve.refine skipped: the problem is rank deficient")
    outcome = refine(plan, fact, solution.x, ctx.engine, ctx.scratch, job.solve.refine_iterations)
    entry = {
        "iterations": outcome.iterations,
        "last_correction": outcome.last_correction,
        "corrections": outcome.history,
        "passes": outcome.passes,
    }
    return Refinement(replace(solution, x=outcome.x), outcome.passes, entry)


@dataclass(frozen=True)
class Verified:
    """What the verification pass measured, and the statistics made from it."""

    sums: VerificationSums
    formed_q: bool
    passes: int
    rows_used: int
    stats: Statistics | None


def verify_stage(
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    engine: Engine,
    writer: storage.ResultWriter,
) -> Verified:
    """One pass over the rows: residuals, Q's figures, and the row arrays into the store."""
    outputs = row_outputs(job, plan)
    sink = row_sink(writer, plan, outputs) if outputs else None
    x = None if solution is None else solution.x
    basis = None if solution is None else solution.range_basis
    check = quality.verify(plan, fact, x, engine, wants_q(job), outputs, sink, basis)
    used = check.sums.rows_counted(plan.rows)
    stats = None
    if solution is not None:
        res2, res_norm = check.sums.res2, check.sums.res_norm
        assert res2 is not None and res_norm is not None, "verify measures the residual"
        stats = statistics(solution, res2, used, res_norm.value)
    return Verified(check.sums, check.formed_q, check.passes, used, stats)


def screen_stage(
    job: Job, plan: BlockPlan, answer: Answer, verified: Verified, writer: storage.ResultWriter
) -> dict[str, Any]:
    """Residual screening (``solve.residuals``) into the store; its report entries."""
    if answer.solution is None or verified.stats is None or not job.solve.residuals:
        return {}
    setup = quality.screening_setup(job, plan, answer.solution, verified.stats, verified.sums)
    return screen(writer, plan, setup)


def run_state(
    job: Job, plan: BlockPlan, fact: Factorization, verified: Verified, inputs: dict[str, Any]
) -> ResultState:
    """What a run's store keeps for later verbs: the run's rows as its one segment."""
    rtr = verified.sums.rtr
    entry = run_segment(plan, fact, rtr, verified.rows_used, inputs, job.update.label)
    return ResultState(fact.sums, rtr, verified.rows_used, plan.rows, inputs, [entry])


@dataclass(frozen=True)
class RunReportParts:
    """The report entries the stages of a run produced besides the figures."""

    warnings: list[str]
    refinement: Refinement
    screening: dict[str, Any]
    passes: int


def run_record(inputs: dict[str, Any], engine: Engine, started: float) -> dict[str, Any]:
    """The report entries every verb adds: the inputs' records (digests left out), the
    provenance with the engine that ran, and the caution."""
    return {
        "inputs": storage.public_record(inputs),
        "provenance": {
            **provenance(started, time.time()),
            "scheduler": getattr(engine, "origin", None),
        },
        "caution": CAUTION,
    }


def run_report(
    job: Job,
    plan: BlockPlan,
    answer: Answer,
    verified: Verified,
    parts: RunReportParts,
    state: ResultState,
    engine: Engine,
    timing: tuple[Clock, float],
) -> dict[str, Any]:
    """The report of a run, assembled from the typed values of its stages."""
    clock, started = timing
    extra: dict[str, Any] = {"warnings": parts.warnings}
    if plan.fixed_columns:
        extra["fixed_columns"] = fixed_note(plan)
    if parts.refinement.entry is not None:
        extra["refinement"] = parts.refinement.entry
    extra.update(parts.screening)
    if answer.scale is not None:
        extra["column_scaling"] = scaling_figures(answer.fact.R, answer.scale)
    extra.update(answer_entry(plan, answer.solution, verified.stats, answer.scale, answer.names))
    step = {"verb": "run", "rows_read": [[0, plan.rows]], "rows_read_count": plan.rows}
    extra["segments"] = segments.coverage(state.segments, [], step, recomputed=True)
    extra.update(run_record(state.input_digests, engine, started))
    return quality.assemble_report(
        job=job,
        plan=plan,
        fact=answer.fact,
        solution=answer.solution,
        stats=verified.stats,
        checked=verified.sums,
        formed_q=verified.formed_q,
        passes=parts.passes,
        seconds=clock.seconds,
        peak_memory=engine.peak_memory_bytes(),
        extra=extra,
    )


def row_outputs(job: Job, plan: BlockPlan) -> tuple[str, ...]:
    """Per-row arrays the verification pass must hand over for writing."""
    names: list[str] = []
    if job.output.q:
        names.append("Q")
    if job.solve.residuals and plan.rhs is not None:
        names += ["residuals", "leverage", "redundancy"]
    return tuple(names)


def row_sink(
    writer: storage.ResultWriter, plan: BlockPlan, outputs: tuple[str, ...]
) -> quality.RowSink:
    """Create the per-row arrays in the store; return a function that fills their rows."""
    chunk = plan.per_block
    dtype = np.dtype(plan.dtype)
    real = np.zeros(0, dtype=dtype).real.dtype
    shapes = {
        "Q": (plan.rows, plan.cols),
        "residuals": rows_shape(plan),
        "leverage": (plan.rows,),
        "redundancy": (plan.rows,),
    }
    kinds = {"leverage": real, "redundancy": np.dtype(np.float64)}
    for name in outputs:
        writer.create(name, shapes[name], kinds.get(name, dtype), chunk)

    def sink(start: int, rows: dict[str, np.ndarray]) -> None:
        for name, block in rows.items():
            writer.write_rows(name, start, row_shaped(plan, name, block))

    return sink


PER_RHS_ROWS = ("residuals", "standardized_residuals", "studentized_residuals")


def rows_shape(plan: BlockPlan) -> tuple[int, ...]:
    """The stored shape of a per-rhs row array: (m,) for a 1-D rhs, (m, k) otherwise."""
    return (plan.rows,) if plan.rhs_1d else (plan.rows, plan.rhs_cols)


def row_shaped(plan: BlockPlan, name: str, block: np.ndarray) -> np.ndarray:
    """A block of a row array in its stored shape (a 1-D rhs drops the rhs axis)."""
    return block[:, 0] if plan.rhs_1d and name in PER_RHS_ROWS and block.ndim == 2 else block


def screen(
    writer: storage.ResultWriter, plan: BlockPlan, setup: quality.ScreeningSetup
) -> dict[str, Any]:
    """Standardized and studentized residuals into the store; the report's screening
    summary, the bounded-size summaries its plots are drawn from, the redundancy numbers'
    total and the per-observation test."""
    chunk = plan.per_block
    for name in ("standardized_residuals", "studentized_residuals"):
        writer.create(name, rows_shape(plan), np.float64, chunk)

    def write(name: str, start: int, rows: np.ndarray) -> None:
        writer.write_rows(name, start, row_shaped(plan, name, np.real(rows)))

    def read(name: str, start: int, stop: int) -> np.ndarray:
        rows = writer.read_rows(name, start, stop)
        return rows[:, None] if name in PER_RHS_ROWS and rows.ndim == 1 else rows

    screening = quality.screen_residuals(read, write, plan, setup)
    summary = {
        "flag_above": screening.flag_above,
        "flagged": screening.flagged[0] if plan.rhs_1d else screening.flagged,
        "worst": screening.worst,
        "histogram": screening.histogram,
    }
    return {
        "residual_screening": summary,
        "plots_data": screening.plots_data,
        "redundancy": screening.redundancy,
        "observation_test": screening.observation_test,
    }


def run_segment(
    plan: BlockPlan,
    fact: Factorization,
    rtr: np.ndarray | None,
    rows_used: int,
    inputs: dict[str, Any],
    label: str | None,
) -> segments.Entry:
    """A run's rows as the store's one segment: the factor of ``[A | b]`` from R, ``Q^H b``
    and the residual Gram ``rtr`` the verification pass summed, and the Gram of A."""
    residual = None
    if fact.qhb is not None and rtr is not None:
        residual = residual_factor(rtr)
    factor = segments.augmented(fact.R, fact.qhb, residual)
    segment = segments.Segment(
        label=label or segments.default_label(plan.first_row, plan.rows),
        first_row=plan.first_row,
        stop_row=plan.rows,
        rows_used=rows_used,
        fingerprint=segments.fingerprint(inputs, plan.first_row, plan.rows),
        added=segments.now(),
        how="run",
    )
    return segments.fresh_entry(segment, factor, fact.sums.gram)


def answer_arrays(
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    stats: Statistics | None,
    scale: np.ndarray | None,
) -> storage.AnswerArrays:
    """R, x, x_stderr, qhb and x_covariance in the input's columns, undoing any column
    equilibration.

    With column multipliers s (A_s = A diag(s)): R = R_s diag(1/s), x = diag(s) x_s.
    Fixed columns (``input.fixed_columns``) come back as zeros: in x, x_stderr and qhb,
    and as zero rows and columns of R and x_covariance.
    """
    s = multipliers(plan, fact.R.dtype, scale)
    R = expand_columns(plan, fact.R / s[None, :], (0, 1))
    if solution is None or stats is None or fact.qhb is None:
        return storage.AnswerArrays(R)
    x, stderr = unscaled(plan, solution, stats, scale)
    covariance = None
    if job.solve.covariance:
        covariance = expand_columns(plan, covariance_of(plan, solution, stats, s), (-2, -1))
    return storage.AnswerArrays(
        R=R,
        x=rhs_shaped(plan, x),
        x_stderr=rhs_shaped(plan, stderr),
        qhb=rhs_shaped(plan, expand_columns(plan, fact.qhb)),
        x_covariance=covariance,
    )


def store_attrs(job: Job, plan: BlockPlan, report: dict[str, Any]) -> dict[str, Any]:
    """The result store's own attributes (version, method, shape, job, inputs, provenance)."""
    return {
        "rowfold_version": __version__,
        "method": job.method.name,
        "rows": plan.rows,
        "cols": plan.input_cols,
        "fixed_columns": list(plan.fixed_columns),
        "job": json.loads(job.resolved_json()),
        "inputs": report["inputs"],
        "provenance": report["provenance"],
    }


def state_arrays(
    plan: BlockPlan, fact: Factorization, state: ResultState, scale: np.ndarray | None
) -> storage.StateArrays:
    """What ``update`` needs to fold in later rows without reading these again: R and
    ``Q^H b`` in working coordinates (after any column scaling), F with F^H F = r^H r,
    A^H A and the row-block digests of the inputs."""
    with_rhs = fact.qhb is not None and state.rtr is not None
    return storage.StateArrays(
        R=fact.R,
        qhb=fact.qhb if with_rhs else None,
        gram=state.first.gram,
        residual_factor=residual_factor(state.rtr) if with_rhs and state.rtr is not None else None,
        column_scale=np.ones(plan.cols) if scale is None else scale,
        input_digests=state.input_digests,
        rows_done=state.rows_done,
        rows_used=state.rows_used,
        a_fro2=state.first.a_fro2,
    )


def commit(
    writer: storage.ResultWriter,
    job: Job,
    plan: BlockPlan,
    answer: Answer,
    report: dict[str, Any],
    state: ResultState,
) -> RunOutcome:
    """Write the store, its update state, segments and reports, commit them together, and
    say how it went."""
    fact, scale = answer.fact, answer.scale
    arrays = answer_arrays(job, plan, fact, answer.solution, answer.stats, scale)
    storage.write_answer(writer, arrays, answer.names, store_attrs(job, plan, report))
    storage.write_state(writer, state_arrays(plan, fact, state, scale))
    storage.write_segments(
        writer,
        (entry.load() for entry in state.segments),
        len(state.segments),
        [entry.segment.as_dict() for entry in state.segments],
        state.retired_segments,
    )
    json_path, html_path = storage.report_paths(job.output.local)
    report = {**report, "commit": writer.commit_id}  # the store records the same id
    drawing = time.perf_counter()
    page = render_html(report) if DRAW_HTML.get() else None
    report["seconds"]["report"] = round(time.perf_counter() - drawing, 4)
    writer.add_file(json_path, to_json(report))
    if page is not None:
        writer.add_file(html_path, page)
    writer.commit()
    held = report["exit_status"] == EXIT_OK
    return RunOutcome(EXIT_OK if held else EXIT_GATE_FAILED, report, job.output.local)
