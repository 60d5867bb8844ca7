"""``update``, ``replace`` and ``retire``: pipelines that change an earlier result's segments
over the same stages as a run (factor, solve, report, commit)."""

from __future__ import annotations

import time
from contextlib import ExitStack
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from rowfold import quality, segments, storage
from rowfold.answer import answer_entry, fixed_note
from rowfold.blocks import BlockPlan
from rowfold.cluster import Progress
from rowfold.engines import job_engine
from rowfold.errors import EXIT_OK, InputError, RowfoldError
from rowfold.kernels.metrics import FirstPassSums, VerificationSums
from rowfold.methods import tsqr
from rowfold.methods.base import Engine, Factorization
from rowfold.planning import input_paths, parameter_names, plan_job
from rowfold.solve import solve, statistics
from rowfold.spec import Job
from rowfold.stages import (
    Answer,
    Clock,
    ResultState,
    RunOutcome,
    commit,
    fingerprints,
    run_record,
)
from rowfold.url_results import segments_on_url

STALE_Q_TEXT = "not formed by update; run `rowfold run` to form Q again"


# Why update leaves the Q figures unmeasured (the reason its gates on them give).
UPDATE_NO_Q = "Q not formed by update, so this figure was not measured; run `rowfold run`"


def update_job(
    job: Job, progress: Progress | None = None, inline: bool = False, wait_lock: float = 0.0
) -> RunOutcome:
    """Fold the rows appended since the earlier result into it as a new segment (see
    :mod:`rowfold.update` and :mod:`rowfold.segments`); with ``update.window`` retire the
    segments older than the last ``window``.

    Raises
    ------
    InputError
        When there is no earlier result, a key that changes the answer differs from the
        stored one, the input no longer starts with the rows its live segments consumed, or
        the label is taken (run ``run`` instead).
    """
    if job.output.is_url:
        return segments_on_url(job, "update", lambda local: update_job(local, progress, inline))
    with storage.open_output(job.output.local, True, input_paths(job), wait_lock):
        return _update_held(job, progress, inline)


@dataclass
class _Earlier:
    """An earlier result, read for update, replace or retire (its small arrays only)."""

    state: dict[str, np.ndarray]
    attrs: dict[str, Any]
    plan: BlockPlan
    names: tuple[str, ...]
    rows_done: int
    entries: list[segments.Entry]
    retired: list[dict[str, Any]]


def _earlier(job: Job, verb: str) -> _Earlier:
    """Read the earlier result and check that this job may change it (reads no rows)."""
    out = job.output.local
    if not out.exists():
        raise InputError(f"{out}: no earlier result to {verb}; run `rowfold run` first")
    state, attrs = storage.read_state(out)
    from rowfold import update

    update.check_answer_keys(job, attrs, out)
    plan = plan_job(job)
    names = parameter_names(job, plan)
    rows_done = int(attrs.get("rows_done", -1))
    # replace checks the row count itself (more plainly); retire reads no rows at all
    rows_ok = verb != "update" or 0 <= rows_done <= plan.rows
    if "R" not in state or state["R"].shape[0] != plan.cols or not rows_ok:
        raise InputError(
            f"{out}: the earlier result does not match the input ({plan.rows} x {plan.cols}); "
            f"run `rowfold run` instead of {verb}"
        )
    entries = segments.live_entries(out, state, attrs, plan.rhs is not None)
    return _Earlier(state, attrs, plan, names, rows_done, entries, segments.retired_records(attrs))


def _update_held(job: Job, progress: Progress | None, inline: bool) -> RunOutcome:
    """``update_job`` while it holds the output."""
    from rowfold import update

    out = job.output.local
    started = time.time()
    clock = Clock()
    old = _earlier(job, "update")
    plan, rows_done = old.plan, old.rows_done
    live = [(e.segment.first_row, e.segment.stop_row) for e in old.entries]
    progress = progress or Progress()
    progress.begin_job(job.name, 0)  # stages read old and new rows: no one rate
    with ExitStack() as stack:
        engine = stack.enter_context(job_engine(job, progress, inline, plan))
        with clock.stage("prefix_check"):
            check = update.verify_prefix(plan, old.state, old.attrs, job.update, engine, out, live)
        if rows_done == plan.rows:
            raise NoNewRowsError(
                f"{out}: no rows added since the earlier result ({rows_done} rows)"
            )
        label = job.update.label or segments.default_label(rows_done, plan.rows)
        segments.check_new_label(label, old.entries, old.retired)
        with clock.stage("factor"):
            scale = old.state["column_scale"]
            rows = update.rows_plan(plan, rows_done, plan.rows, scale)
            new = update.factor_rows(rows, engine, "update")
        with clock.stage("fingerprint"):
            added = fingerprints(job, replace(plan, first_row=rows_done), engine)
        inputs = storage.extend_records(check.records, added)
        segment = segments.Segment(
            label=label,
            first_row=rows_done,
            stop_row=plan.rows,
            rows_used=new.rows_used,
            fingerprint=segments.fingerprint(inputs, rows_done, plan.rows),
            added=segments.now(),
            how="update",
        )
        entries = [*old.entries, segments.fresh_entry(segment, new.factor, new.gram)]
        kept, dropped = segments.windowed(entries, job.update.window)
        when = segments.now()
        why = f"update.window: {job.update.window}"
        retired = [*old.retired, *(segments.retire_record(e.segment, when, why) for e in dropped)]
        step = {
            "verb": "update",
            "added": label,
            "retired": [e.segment.label for e in dropped],
            "rows_read": [[rows_done, plan.rows]],
            "rows_read_count": plan.rows - rows_done,
            "rows_checked_by_digest": check.report["rows_checked"],
        }
        extra = {
            "update": {"rows_before": rows_done, "rows_added": plan.rows - rows_done},
            "prefix_check": check.report,
            "warnings": list(check.warnings),
        }
        change = _Change(kept, retired, step, inputs, plan.rows, extra, passes=1)
        return _commit_segments(job, old, change, engine, clock, started)


def replace_job(
    job: Job,
    label: str,
    progress: Progress | None = None,
    inline: bool = False,
    wait_lock: float = 0.0,
) -> RunOutcome:
    """Read the rows of one segment again (changed in place) and refactor only them.

    Raises
    ------
    InputError
        When there is no earlier result, no live segment has the label, a key that changes
        the answer differs, or the input's row count changed (a replacement keeps the
        segment's rows where they were; rows appended since must wait for the next update).
    """
    if job.output.is_url:
        return segments_on_url(
            job, "replace", lambda local: replace_job(local, label, progress, inline)
        )
    with storage.open_output(job.output.local, True, input_paths(job), wait_lock):
        return _replace_held(job, label, progress, inline)


def _replace_held(job: Job, label: str, progress: Progress | None, inline: bool) -> RunOutcome:
    """``replace_job`` while it holds the output."""
    from rowfold import update

    out = job.output.local
    started = time.time()
    clock = Clock()
    old = _earlier(job, "replace")
    plan = old.plan
    (index,) = segments.find(old.entries, [label], out)
    segment = old.entries[index].segment
    first, stop = segment.first_row, segment.stop_row
    if plan.rows != old.rows_done:
        raise InputError(
            f"{plan.matrix.describe()}: holds {plan.rows} rows, the earlier result consumed "
            f"{old.rows_done}; replace reads segment {label!r} (rows {first}..{stop - 1}) "
            f"again in place, so its {segment.rows} rows and every later row must stay where "
            "they were; run `rowfold run` for rows inserted or removed"
        )
    records = storage.stored_records(old.state, old.attrs)
    if records is None:
        raise InputError(
            f"{out}: the earlier result holds no row-block digests; run `rowfold run` instead"
        )
    update.check_replace_records(plan, records, old.rows_done)
    bounds = records["matrix"]["bounds"]
    positions = update.block_range(bounds, first, stop, f"segment {label!r}")
    with ExitStack() as stack:
        engine = stack.enter_context(job_engine(job, progress or Progress(), inline, plan))
        with clock.stage("factor"):
            rows = update.rows_plan(plan, first, stop, old.state["column_scale"])
            new = update.factor_rows(rows, engine, "replace")
        with clock.stage("fingerprint"):
            found = update.digest_blocks(plan, [tuple(bounds[i]) for i in positions], engine)
        inputs = storage.replace_blocks(records, positions, found)
        fingerprint = segments.fingerprint(inputs, first, stop)
        renewed = segments.relabelled(
            segment,
            rows_used=new.rows_used,
            fingerprint=fingerprint,
            added=segments.now(),
            how="replace",
        )
        entry = segments.fresh_entry(renewed, new.factor, new.gram)
        kept = segments.with_segment(old.entries, index, entry)
        step = {
            "verb": "replace",
            "replaced": label,
            "rows_read": [[first, stop]],
            "rows_read_count": stop - first,
            "rows_changed": fingerprint != segment.fingerprint,
            "other_segments_checked": False,
        }
        extra = {
            "warnings": [
                f"replace: only the rows of segment {label!r} were read; the rows of the "
                "other segments were neither read nor checked (the next update checks them)"
            ]
        }
        change = _Change(kept, old.retired, step, inputs, old.rows_done, extra, passes=1)
        return _commit_segments(job, old, change, engine, clock, started)


def retire_job(
    job: Job,
    labels: list[str],
    progress: Progress | None = None,
    wait_lock: float = 0.0,
) -> RunOutcome:
    """Drop segments from the answer, reading no rows: the store's R, x and statistics are
    reduced again from the factors of the segments that remain.

    Raises
    ------
    InputError
        When there is no earlier result, a label names no live segment, or every live
        segment would be retired.
    """
    if job.output.is_url:
        return segments_on_url(job, "retire", lambda local: retire_job(local, labels, progress))
    with storage.open_output(job.output.local, True, input_paths(job), wait_lock):
        return _retire_held(job, labels, progress)


def _retire_held(job: Job, labels: list[str], progress: Progress | None) -> RunOutcome:
    """``retire_job`` while it holds the output."""
    out = job.output.local
    started = time.time()
    clock = Clock()
    old = _earlier(job, "retire")
    indices = set(segments.find(old.entries, labels, out))
    if len(indices) == len(old.entries):
        raise InputError(
            f"{out}: retiring {', '.join(repr(x) for x in labels)} would retire every live "
            "segment and leave no rows; keep one, or run `rowfold run` on new rows"
        )
    kept = [e for i, e in enumerate(old.entries) if i not in indices]
    when = segments.now()
    gone = [segments.retire_record(old.entries[i].segment, when, "retire") for i in indices]
    records = storage.stored_records(old.state, old.attrs) or {}
    step = {
        "verb": "retire",
        "retired": [old.entries[i].segment.label for i in sorted(indices)],
        "rows_read": [],
        "rows_read_count": 0,
    }
    with job_engine(job, progress or Progress(), True) as engine:
        change = _Change(kept, [*old.retired, *gone], step, records, old.rows_done, {}, passes=0)
        return _commit_segments(job, old, change, engine, clock, started)


class NoNewRowsError(RowfoldError):
    """``update`` found no new rows; the earlier result stands (exit 0, not a failure)."""

    exit_status = EXIT_OK


@dataclass
class _Change:
    """What update, replace or retire makes of an earlier result's segments."""

    kept: list[segments.Entry]
    retired: list[dict[str, Any]]
    step: dict[str, Any]
    inputs: dict[str, Any]
    rows_done: int
    extra: dict[str, Any]
    passes: int

    @property
    def verb(self) -> str:
        """The verb making the change."""
        return str(self.step["verb"])


@dataclass(frozen=True)
class _Reduced:
    """The live segments reduced to one factor: the factor stage of a segment verb."""

    fact: Factorization
    residual_sq: np.ndarray | None
    residual_factor: np.ndarray | None
    rows: int
    rows_used: int


def _reduce_stage(plan: BlockPlan, change: _Change) -> _Reduced:
    """Reduce the kept segments' factors of ``[A | b]`` into R, ``Q^H b`` and the residual
    factor, and their Gram sums into ``A^H A``."""
    reduced = segments.reduce(change.kept)
    n = plan.cols
    whole = reduced.factor
    qhb = whole[:n, n:] if plan.rhs is not None else None
    factor = None if qhb is None else whole[n:, n:]
    gram = reduced.gram
    fact = Factorization(
        R=whole[:n, :n],
        qhb=qhb,
        q_kernel=tsqr.q_block,
        q_recipes=[],
        passes=change.passes,
        sums=FirstPassSums(float(np.real(np.trace(gram))), gram),
        details={"segments_reduced": reduced.segments, "reduction": "binary tree of QRs"},
    )
    residual_sq = None if factor is None else np.sum(np.abs(factor) ** 2, axis=0)
    return _Reduced(fact, residual_sq, factor, reduced.rows, reduced.rows_used)


def _solve_reduced(job: Job, old: _Earlier, reduced: _Reduced) -> Answer:
    """The solve stage on the reduced factor: x and statistics without reading rows."""
    fact, residual_sq = reduced.fact, reduced.residual_sq
    solution = stats = None
    if fact.qhb is not None and residual_sq is not None:
        solution = solve(fact.R, fact.qhb, job.solve.rank_tolerance)
        stats = statistics(solution, residual_sq, reduced.rows_used)
    return Answer(old.names, fact, solution, stats, old.state["column_scale"])


def _segments_report(
    job: Job,
    plan: BlockPlan,
    answer: Answer,
    reduced: _Reduced,
    change: _Change,
    engine: Engine,
    timing: tuple[Clock, float],
) -> dict[str, Any]:
    """The report stage of a segment verb (the Q figures are reported as not measured)."""
    clock, started = timing
    coverage = segments.coverage(change.kept, change.retired, change.step, recomputed=False)
    extra = {
        **change.extra,
        "warnings": [*change.extra.get("warnings", []), *_update_warnings(job, change.verb)],
        "segments": coverage,
        "q_state": STALE_Q_TEXT,
        **run_record(change.inputs, engine, started),
        **answer_entry(plan, answer.solution, answer.stats, answer.scale, answer.names),
    }
    if plan.fixed_columns:
        extra["fixed_columns"] = fixed_note(plan)
    return quality.assemble_report(
        job=job,
        plan=replace(plan, first_row=0, rows=reduced.rows),  # the rows the answer covers
        fact=answer.fact,
        solution=answer.solution,
        stats=answer.stats,
        checked=VerificationSums(res2=reduced.residual_sq),
        formed_q=False,
        seconds=clock.seconds,
        peak_memory=engine.peak_memory_bytes(),
        passes=change.passes,
        extra=extra,
        unmeasured={"orthogonality_loss": UPDATE_NO_Q, "factorization_residual": UPDATE_NO_Q},
    )


def _commit_segments(
    job: Job, old: _Earlier, change: _Change, engine: Engine, clock: Clock, started: float
) -> RunOutcome:
    """The segment verbs' pipeline after their own first steps: reduce -> solve -> report
    -> commit (the earlier result stays whole until the commit completes)."""
    plan = old.plan
    with clock.stage("reduce"):
        reduced = _reduce_stage(plan, change)
    answer = _solve_reduced(job, old, reduced)
    report = _segments_report(job, plan, answer, reduced, change, engine, (clock, started))
    factor = reduced.residual_factor
    state = ResultState(
        first=reduced.fact.sums,
        rtr=None if factor is None else factor.conj().T @ factor,
        rows_used=reduced.rows_used,
        rows_done=change.rows_done,
        input_digests=change.inputs,
        segments=change.kept,
        retired_segments=change.retired,
    )
    view = replace(plan, first_row=0, rows=reduced.rows)
    with storage.ResultWriter(job.output.local) as writer:
        writer.set_attrs({"q_state": STALE_Q_TEXT})
        return commit(writer, job, view, answer, report, state)


def _update_warnings(job: Job, verb: str = "update") -> list[str]:
    """What an update, replace or retire leaves out, since it does not read every covered
    row again."""
    notes = [f"{verb}: Q and the orthogonality figures are not formed; see q_state"]
    if job.solve.refine:
        notes.append(f"{verb}: solve.refine skipped (it needs a pass over all rows; use run)")
    if job.solve.residuals:
        notes.append(f"{verb}: residual screening skipped (it needs all rows; use run)")
    return notes
