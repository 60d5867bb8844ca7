"""One job end to end, as a straight pipeline of the stages in :mod:`rowfold.stages`:
plan -> scale -> factor -> solve -> refine -> verify -> screen -> report -> commit.

``update``, ``replace`` and ``retire`` are other pipelines over the same stages
(:mod:`rowfold.segment_verbs`); results on object stores go through
:mod:`rowfold.url_results`. The CLI and the Python API call only this module (and
:mod:`rowfold.report` for formatting). Nothing is written until the whole result is ready;
the result store and its reports are committed together.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from contextlib import ExitStack
from pathlib import Path
from typing import Any

from rowfold import storage
from rowfold.blocks import BlockPlan
from rowfold.cluster import Progress
from rowfold.engines import job_engine
from rowfold.errors import EXIT_INVALID, RowfoldError
from rowfold.methods.base import Context
from rowfold.planning import (
    block_warnings,
    hdf5_url_warnings,
    input_paths,
    parameter_names,
    plan_job,
    validate_job,
    wants_q,
)
from rowfold.quality import plan_shape
from rowfold.segment_verbs import NoNewRowsError, replace_job, retire_job, update_job
from rowfold.spec import METHOD_NAMES, Job, load_job
from rowfold.stages import (
    DRAW_HTML,
    Answer,
    Clock,
    RunOutcome,
    RunReportParts,
    checkpoints_for,
    commit,
    factor_stage,
    fingerprints,
    refine_stage,
    run_report,
    run_state,
    scale_stage,
    screen_stage,
    solve_stage,
    verify_stage,
)
from rowfold.storage import locations
from rowfold.storage.checkpoints import close_checkpoints
from rowfold.url_results import compare_to_url, inspect_url, pointer_of, refuse_existing, run_to_url

__all__ = [
    "METHOD_NAMES",
    "NoNewRowsError",
    "RunOutcome",
    "check_job",
    "compare_job",
    "comparison_table",
    "inspect_path",
    "load_job",
    "plan_job",
    "replace_job",
    "retire_job",
    "run_demo",
    "run_job",
    "run_nights",
    "update_job",
    "validate_job",
]


def run_job(
    job: Job,
    progress: Progress | None = None,
    inline: bool = False,
    resume: bool = False,
    wait_lock: float = 0.0,
    html: bool = True,
) -> RunOutcome:
    """Run a job end to end and commit its result store and reports.

    Parameters
    ----------
    job : Job
        A validated job.
    progress : Progress, optional
        Where progress goes (nothing by default).
    inline : bool
        Run the graphs in this thread instead of on a Dask cluster (tests, debugging).
    resume : bool
        Reuse the first-pass checkpoints that an interrupted run of the same job left
        (tsqr); blocks already factored are not read again.
    wait_lock : float
        Seconds to wait while another run holds the output (0: refuse at once).
    html : bool
        Draw the HTML report beside the JSON one; the Python API skips it for the
        temporary store nobody opens (the JSON report is always written).

    Raises
    ------
    RowfoldError
        Subclasses map to exit statuses 2 and 4; nothing is written on error.
    """
    token = DRAW_HTML.set(html)
    try:
        if job.output.is_url:
            return run_to_url(
                job, resume, lambda local: run_job(local, progress, inline, False, wait_lock, html)
            )
        return _run_local(job, progress or Progress(), inline, resume, wait_lock)
    finally:
        DRAW_HTML.reset(token)


def _run_local(
    job: Job, progress: Progress, inline: bool, resume: bool, wait_lock: float
) -> RunOutcome:
    """:func:`run_job` for a local output: plan, then run holding the output."""
    clock = Clock()
    started = time.time()
    with clock.stage("plan"):
        plan = plan_job(job)
        names = parameter_names(job, plan)
    progress.begin_job(job.name, plan.rows)
    for warning in hdf5_url_warnings(plan):
        progress.note(f"warning: {warning}")
    out = job.output.local
    with storage.open_output(out, job.output.overwrite, input_paths(job), wait_lock):
        try:
            outcome = _run_with_engine(job, plan, names, progress, (inline, resume), clock, started)
        except RowfoldError as exc:
            if exc.exit_status == EXIT_INVALID:  # a bad input: no checkpoint is worth resuming
                close_checkpoints(out)
            raise
        close_checkpoints(out)
    return outcome


def _run_with_engine(
    job: Job,
    plan: BlockPlan,
    names: tuple[str, ...],
    progress: Progress,
    how: tuple[bool, bool],
    clock: Clock,
    started: float,
) -> RunOutcome:
    """Start the engine and scratch folder, fingerprint the inputs, run the pipeline, and
    shut them down (before cleanup). ``how`` is (inline, resume)."""
    inline, resume = how
    with ExitStack() as stack:
        scratch = storage.ScratchFolder(
            stack.enter_context(storage.scratch_folder(job.output.local))
        )
        with clock.stage("cluster_start"):
            engine = stack.enter_context(job_engine(job, progress, inline, plan))
        with clock.stage("fingerprint"):
            inputs = fingerprints(job, plan, engine)
        checkpoints = checkpoints_for(job, plan, inputs, resume)
        ctx = Context(engine, wants_q(job), scratch, checkpoints)
        return _pipeline(job, plan, names, ctx, inputs, (clock, started))


def _pipeline(
    job: Job,
    plan: BlockPlan,
    names: tuple[str, ...],
    ctx: Context,
    inputs: dict[str, Any],
    timing: tuple[Clock, float],
) -> RunOutcome:
    """The stages of a run, in order, each handing typed values to the next."""
    clock = timing[0]
    warnings = block_warnings(plan)
    with clock.stage("scale") if job.solve.scale_columns else ExitStack():
        scaled = scale_stage(job, plan, ctx.engine)
    plan = scaled.plan
    with clock.stage("factor"):
        fact = factor_stage(job, plan, ctx)
    warnings.extend(fact.details.get("warnings", []))
    with clock.stage("solve"):
        solution = solve_stage(job, fact)
    with clock.stage("refine") if job.solve.refine and solution is not None else ExitStack():
        refined = refine_stage(job, plan, fact, solution, ctx)
    if refined.skipped is not None:
        warnings.append(refined.skipped)
    answer = Answer(names, fact, refined.solution, scale=scaled.scale)
    with storage.ResultWriter(job.output.local) as writer:
        with clock.stage("verify"):
            verified = verify_stage(job, plan, fact, answer.solution, ctx.engine, writer)
        answer = Answer(names, fact, answer.solution, verified.stats, scaled.scale)
        with clock.stage("screen") if job.solve.residuals and verified.stats else ExitStack():
            screening = screen_stage(job, plan, answer, verified, writer)
        state = run_state(job, plan, fact, verified, inputs)
        passes = fact.passes + verified.passes + refined.passes + (scaled.scale is not None)
        parts = RunReportParts(warnings, refined, screening, int(passes))
        report = run_report(job, plan, answer, verified, parts, state, ctx.engine, timing)
        with clock.stage("write"):
            return commit(writer, job, plan, answer, report, state)


def check_job(job: Job) -> dict[str, Any]:
    """Validate a job's inputs and output path without computing; return a summary."""
    plan = validate_job(job)
    if job.output.is_url:
        refuse_existing(job, pointer_of(job))  # the object store answers; is a result there?
    else:
        with storage.open_output(job.output.local, job.output.overwrite, input_paths(job)):
            pass  # takes the lock and recovers an interrupted commit, like a run would
    return {
        "job": job.name,
        "input": str(job.input.path),
        **plan_shape(plan),
        "method": job.method.name,
        "output": str(job.output.path),
        "warnings": block_warnings(plan),
    }


def comparison_table(records: list[dict[str, Any]]) -> str:
    """The comparison as a terminal table."""
    from rowfold import compare

    return compare.text_table(records)


def compare_job(
    job: Job, methods: list[str], progress: Progress | None = None, inline: bool = False
) -> tuple[list[dict[str, Any]], Path | str, Path | str]:
    """Run one job with several methods on one engine; write and return the comparison.

    Returns the comparison records and the paths (URLs for a URL output) of its JSON and
    HTML files. With ``output.path`` on a URL the comparison is made in a private local
    folder and published by pointer at ``<output stem>.compare``
    (:mod:`rowfold.storage.published`).
    """
    if job.output.is_url:
        return compare_to_url(job, lambda local: compare_job(local, methods, progress, inline))
    from rowfold import compare

    plan = plan_job(job)
    names = parameter_names(job, plan)
    progress = progress or Progress()
    progress.begin_job(job.name, plan.rows)
    with job_engine(job, progress, inline, plan) as engine:
        inputs = fingerprints(job, plan, engine)

        def run(method_job: Job) -> RunOutcome:
            out = method_job.output.local
            with (
                storage.open_output(out, True, input_paths(job)),
                storage.scratch_folder(out) as workdir,
            ):
                ctx = Context(engine, wants_q(method_job), storage.ScratchFolder(workdir))
                return _pipeline(method_job, plan, names, ctx, inputs, (Clock(), time.time()))

        rows = [compare.run_row(job, method, run) for method in methods]
    records = compare.table(rows)
    json_path, html_path = compare.write(job, records)
    return records, json_path, html_path


def inspect_path(path: str | Path) -> dict[str, Any]:
    """Describe an input file or a result store (and its report, when there is one); a URL
    (text with a scheme) names a result published by pointer."""
    if isinstance(path, str) and locations.is_url(path):
        return inspect_url(path)
    target = Path(path).expanduser().resolve()
    storage.recover_if_idle(target)  # finish an interrupted commit before describing it
    info = storage.describe_path(target)
    json_path, _ = storage.report_paths(target)
    if json_path.exists():
        info["report"] = json.loads(json_path.read_text(encoding="utf-8"))
    return info


def run_demo(
    folder: Path, progress: Progress | None = None, rows: int | None = None
) -> Iterator[RunOutcome]:
    """Write the demo scenario into ``folder`` and run each of its jobs in turn; the
    nightly job runs its nights (:data:`rowfold.demo.NIGHT_STEPS`): a run, an added night,
    a replaced night and an added night that the window makes retire the first."""
    from rowfold import demo

    for path in demo.write_scenario(Path(folder), rows):
        if path.name == "zero_points_nightly.yaml":
            yield from run_nights(path, demo.night_rows(rows), progress)
            continue
        yield run_job(load_job(path), progress)


def run_nights(job_path: Path, rows: int, progress: Progress | None = None) -> Iterator[RunOutcome]:
    """The nightly demo's steps, writing each night's rows before the step that reads them."""
    from rowfold import demo

    for verb, label, nights, recalibrated in demo.NIGHT_STEPS:
        demo.write_nights(job_path.parent, nights, rows, recalibrated)
        job = load_job(job_path, (f"update.label={label}",))
        if verb == "run":
            yield run_job(job, progress)
        elif verb == "update":
            yield update_job(job, progress)
        else:
            yield replace_job(job, label, progress)
