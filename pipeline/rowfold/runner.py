"""One job end to end: spec -> row blocks -> factorization -> solution -> quality -> store.

The CLI calls only this module (and :mod:`rowfold.report`). Nothing is written until the
whole result is ready; the result store and its reports are committed together.
"""

from __future__ import annotations

import contextvars
import json
import time
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from rowfold import __version__, quality, segments, storage
from rowfold.blocks import BlockPlan, expand_columns, plan_blocks
from rowfold.cluster import (
    SMALL_JOB_BYTES,
    InlineEngine,
    Progress,
    ThreadedEngine,
    blas_limited,
    choose_scheduler,
    cpu_count,
    local_layout,
    open_engine,
)
from rowfold.errors import (
    EXIT_GATE_FAILED,
    EXIT_INVALID,
    EXIT_OK,
    InputError,
    OutputError,
    RowfoldError,
)
from rowfold.kernels import metrics
from rowfold.kernels.metrics import FirstPassSums, VerificationSums
from rowfold.methods import get_method, tsqr
from rowfold.methods._graph import map_pass
from rowfold.methods.base import Context, Engine, Factorization
from rowfold.provenance import provenance
from rowfold.refine import refine
from rowfold.report import CAUTION, render_html, to_json
from rowfold.solve import Solution, Statistics, solve, statistics
from rowfold.spec import (
    METHOD_NAMES,
    ClusterSpec,
    Job,
    check_fits_input,
    check_names,
    check_parameter_names,
    load_job,
)
from rowfold.storage import locations, published
from rowfold.storage.checkpoints import (
    CheckpointFolder,
    block_stamp,
    close_checkpoints,
    open_checkpoints,
)
from rowfold.storage.checkpoints import job_digest as job_digest_of

__all__ = [
    "METHOD_NAMES",
    "NoNewRowsError",
    "RunOutcome",
    "check_job",
    "inspect_path",
    "load_job",
    "replace_job",
    "retire_job",
    "run_job",
    "update_job",
]

STALE_Q_TEXT = "not formed by update; run `rowfold run` to form Q again"
# Why update leaves the Q figures unmeasured (the reason its gates on them give).
UPDATE_NO_Q = "Q not formed by update, so this figure was not measured; run `rowfold run`"


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
class _Clock:
    """Seconds per stage."""

    seconds: dict[str, float] = field(default_factory=dict)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        started = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = self.seconds.get(name, 0.0) + time.perf_counter() - started


def plan_job(job: Job) -> BlockPlan:
    """Describe the job's input arrays and cut them into row blocks (reads no data).

    ``input.matrix`` may name a dense dataset or a CSR group; which one is found by looking.
    """
    matrix = storage.describe_matrix(input_ref(job, job.input.matrix))
    rhs = None
    if job.input.rhs is not None:
        rhs = storage.describe_array(input_ref(job, job.input.rhs))
    weights = None
    if job.input.weights is not None:
        weights = storage.describe_array(input_ref(job, job.input.weights))
    native = job.method.precision == "native"
    plan = plan_blocks(
        matrix, rhs, job.input.rows_per_block, native, weights, job.input.fixed_columns
    )
    check_fits_input(job, plan.rows, plan.cols)
    return plan


def input_ref(job: Job, name: str) -> storage.ArrayRef:
    """The reference tasks carry to array ``name`` of the job's input (a path or URL, and
    the storage options as JSON text: no open handle, no credential object)."""
    spec = job.input
    return storage.ArrayRef(str(spec.path), name, spec.missing_chunks, spec.storage_options)


# Fewer rows per block than this many times the columns draws a warning (common practice:
# a block's QR costs about 2 b n^2 flops and leaves an n x n factor to reduce, so below a
# few n rows per block the reduction tree does as much work as the blocks).
MIN_BLOCK_ROWS_PER_COLUMN = 4


def block_warnings(plan: BlockPlan) -> list[str]:
    """Warnings about the input: HDF5 read by URL (slow), and the block size (too few rows
    per block for the columns)."""
    found = hdf5_url_warnings(plan)
    least = MIN_BLOCK_ROWS_PER_COLUMN * plan.cols
    if plan.blocks <= 1 or plan.per_block >= least:
        return found
    return [
        *found,
        f"input.rows_per_block: {plan.per_block} rows per block for {plan.cols} columns "
        f"({plan.blocks} blocks) is fewer than {MIN_BLOCK_ROWS_PER_COLUMN}n = {least}; "
        f"the reduction of the blocks' factors then costs as much as the blocks themselves; "
        f"use at least {least} (or auto)",
    ]


def hdf5_url_warnings(plan: BlockPlan) -> list[str]:
    """The cost of an HDF5 or NetCDF-4 input read by URL, said once per job."""
    ref = plan.matrix
    if not (locations.is_url(ref.path) and ref.is_hdf5):
        return []
    return [
        f"{ref.path}: an HDF5 file read by URL costs a ranged request per HDF5 chunk (and "
        "per piece of its metadata), far slower than a local file; copy it to a local path, "
        "or convert it to Zarr with chunks of a few MB (e.g. 65,536 rows of 8 float64 "
        "columns is 4 MiB)"
    ]


def parameter_names(job: Job, plan: BlockPlan) -> tuple[str, ...]:
    """The name of every input column: from ``input.parameter_names`` (a list, or a 1-D
    dataset of text in the input file), else ``x0 .. x{n-1}``.

    Raises
    ------
    JobError, InputError
        When the names are not one distinct non-empty text per input column, or the
        dataset cannot be read (exit 2, before anything is computed).
    """
    given = job.input.parameter_names
    if given is None:
        return tuple(f"x{j}" for j in range(plan.input_cols))
    if isinstance(given, str):
        ref = input_ref(job, given)
        found = storage.read_names(ref)
        try:
            names = check_names(found)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{ref.describe()}: parameter names: {exc}") from None
        check_parameter_names(job, names, plan.input_cols, f"dataset {ref.describe()}")
        return names
    check_parameter_names(job, given, plan.input_cols, "the list")
    return given


def validate_job(job: Job) -> BlockPlan:
    """Check what a job reads (shapes, types, names) without computing; return its plan.

    Raises
    ------
    JobError, InputError
        When a key or an input does not fit (exit 2).
    """
    plan = plan_job(job)
    parameter_names(job, plan)
    return plan


def check_job(job: Job) -> dict[str, Any]:
    """Validate a job's inputs and output path without computing; return a summary."""
    plan = validate_job(job)
    if job.output.is_url:
        _refuse_existing(job, _pointer(job))  # the object store answers; is a result there?
    else:
        with storage.open_output(job.output.local, job.output.overwrite, _inputs(job)):
            pass  # takes the lock and recovers an interrupted commit, like a run would
    return {
        "job": job.name,
        "input": str(job.input.path),
        "rows": plan.rows,
        "cols": plan.cols,
        "rhs_cols": plan.rhs_cols,
        "dtype": plan.dtype,
        "blocks": plan.blocks,
        "rows_per_block": plan.per_block,
        "method": job.method.name,
        "output": str(job.output.path),
        "warnings": block_warnings(plan),
    }


def wants_q(job: Job) -> bool:
    """Q is formed when it is written or measured (``output.measure_q``), when a gate needs
    its figures, or when refinement or leverages need its blocks."""
    gates = job.gates.orthogonality is not None or job.gates.residual is not None
    wanted = job.output.q or job.output.measure_q
    return wanted or gates or job.solve.refine or job.solve.residuals


def _inputs(job: Job) -> tuple[Path, ...]:
    """The input files or stores an output must stay clear of (a URL input is not on this
    machine's disk, so no local output can overlap it)."""
    path = job.input.path
    return () if isinstance(path, str) else (path,)


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
    token = _DRAW_HTML.set(html)
    try:
        return _run_job(job, progress, inline, resume, wait_lock)
    finally:
        _DRAW_HTML.reset(token)


# Whether the run being committed draws its HTML report (run_job's ``html``).
_DRAW_HTML: contextvars.ContextVar[bool] = contextvars.ContextVar("draw_html", default=True)


def _run_job(
    job: Job, progress: Progress | None, inline: bool, resume: bool, wait_lock: float
) -> RunOutcome:
    """:func:`run_job` (which says whether to draw the HTML report)."""
    if job.output.is_url:
        return _run_to_url(job, progress, inline, resume, wait_lock)
    progress = progress or Progress()
    clock = _Clock()
    started = time.time()
    with clock.stage("plan"):
        plan = plan_job(job)
        names = parameter_names(job, plan)
    progress.begin_job(job.name, plan.rows)
    for warning in hdf5_url_warnings(plan):
        progress.note(f"warning: {warning}")
    with storage.open_output(job.output.local, job.output.overwrite, _inputs(job), wait_lock):
        try:
            outcome = _run_with_engine(job, plan, names, progress, inline, resume, clock, started)
        except RowfoldError as exc:
            if exc.exit_status == EXIT_INVALID:  # a bad input: no checkpoint is worth resuming
                close_checkpoints(job.output.local)
            raise
        close_checkpoints(job.output.local)
    return outcome


def _run_to_url(
    job: Job, progress: Progress | None, inline: bool, resume: bool, wait_lock: float
) -> RunOutcome:
    """Run a job whose result goes to an object store: commit it in a private local folder,
    then publish it by pointer (:mod:`rowfold.storage.published`)."""
    url = str(job.output.path)
    if resume:
        raise OutputError(f"{url}: run --resume needs a local output.path (its checkpoints)")
    validate_job(job)  # a bad input fails before the store is touched
    existing = _pointer(job)
    _refuse_existing(job, existing)
    return _through_url(
        job,
        existing,
        lambda local: run_job(local, progress, inline, False, wait_lock, _DRAW_HTML.get()),
    )


def _refuse_existing(job: Job, pointer: dict[str, Any] | None) -> None:
    """Refuse a URL output that holds a result unless ``output.overwrite``."""
    if pointer is not None and not job.output.overwrite:
        raise OutputError(
            f"{job.output.path}: a result exists (commit {pointer.get('rowfold_commit')}); set "
            "output.overwrite: true to replace it"
        )


def _pointer(job: Job) -> dict[str, Any] | None:
    """The pointer of the job's URL result (None when there is none yet).

    Raises
    ------
    OutputError
        When the object store cannot be read (names the URL and ``output.path``).
    """
    url = str(job.output.path)
    try:
        return published.current(url, job.output.storage_options)
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot read the result's pointer "
            f"({locations.failure(exc, job.output.storage_options)}); "
            "check output.path and output.storage_options"
        ) from None


def _through_url(
    job: Job, pointer: dict[str, Any] | None, verb: Callable[[Job], RunOutcome], fetch: bool = False
) -> RunOutcome:
    """Run ``verb`` on the job with its output in a private local folder (holding the
    current result's store first when ``fetch``), then publish what it committed there,
    provided the pointer still names the commit read before (else exit 2)."""
    url, options = str(job.output.path), job.output.storage_options
    with published.private_folder() as scratch:
        store = scratch / url.rpartition("/")[2]
        if fetch and pointer is not None:
            try:
                published.fetch_store(pointer, options, store)
            except Exception as exc:
                raise OutputError(
                    f"{pointer['store']}: cannot read the current result "
                    f"({locations.failure(exc, options)}); "
                    "check output.path and output.storage_options"
                ) from None
        local = replace(job, output=replace(job.output, path=store, overwrite=True))
        try:
            outcome = verb(local)
        except RowfoldError as exc:  # name the URL, not the private folder
            raise _renamed(exc, str(store), url) from None
        parts = [store, *storage.report_paths(store)]
        commit = str(outcome.report["commit"])
        record = published.publish(url, options, commit, parts, published.commit_of(pointer))
    return RunOutcome(outcome.status, outcome.report, str(record["store"]))


def _renamed(exc: RowfoldError, local: str, url: str) -> RowfoldError:
    """The error with the private folder's store named by its URL instead."""
    text = str(exc)
    if local not in text:
        return exc
    try:
        return type(exc)(text.replace(local, url))
    except TypeError:  # an error class with other arguments: keep it as it is
        return exc


def _segments_on_url(job: Job, verb: str, action: Callable[[Job], RunOutcome]) -> RunOutcome:
    """``update``, ``replace`` or ``retire`` of a result at a URL: fetch the current
    result, change it locally as a local result, publish the new one by pointer."""
    pointer = _pointer(job)
    if pointer is None:
        raise InputError(
            f"{job.output.path}: no earlier result to {verb} (no pointer "
            f"{published.pointer_url(str(job.output.path))}; key output.path); "
            "run `rowfold run` first"
        )
    return _through_url(job, pointer, action, fetch=True)


def _run_with_engine(
    job: Job,
    plan: BlockPlan,
    names: tuple[str, ...],
    progress: Progress,
    inline: bool,
    resume: bool,
    clock: _Clock,
    started: float,
) -> RunOutcome:
    """Start the engine and scratch folder, run, and shut them down (before cleanup)."""
    with ExitStack() as stack:
        scratch = storage.ScratchFolder(
            stack.enter_context(storage.scratch_folder(job.output.local))
        )
        with clock.stage("cluster_start"):
            engine = stack.enter_context(_engine(job, progress, inline, plan))
        with clock.stage("fingerprint"):
            inputs = _fingerprints(job, plan, engine)
        checkpoints = _checkpoints(job, plan, inputs, resume)
        ctx = Context(engine, wants_q(job), scratch, checkpoints)
        return _run_on(job, plan, names, ctx, inputs, clock, started)


def _checkpoints(
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


@contextmanager
def _engine(
    job: Job, progress: Progress, inline: bool, plan: BlockPlan | None = None
) -> Iterator[Any]:
    """The engine a job runs on (its ``origin`` says which and why, for the report);
    ``cluster.scheduler: auto`` weighs the size of ``plan``'s matrix (without a plan, the
    job counts as large)."""
    if inline:
        try:
            yield InlineEngine(progress)
        finally:
            storage.close_open_inputs()
        return
    spec = job.cluster
    scheduler, why = choose_scheduler(spec, _dense_bytes(plan))
    if scheduler == "threads":
        with _threaded_engine(spec, progress) as threaded:
            threaded.origin["why"] = why
            yield threaded
        return
    if spec.processes is None:
        # measured (README, "Running on a cluster"): the hot kernels release the GIL, and
        # threads beat worker processes for dense and CSR input alike
        spec = replace(spec, processes=False)
    with open_engine(spec, progress) as engine:
        engine.origin["why"] = why
        try:
            yield engine
        finally:  # let the night's ingestion append to the inputs once the job is done
            engine.run_on_workers(storage.close_open_inputs)
            storage.close_open_inputs()


def _dense_bytes(plan: BlockPlan | None) -> int:
    """Bytes of the plan's matrix held densely (more than any small job without a plan)."""
    if plan is None:
        return SMALL_JOB_BYTES + 1
    return plan.rows * plan.cols * np.dtype(plan.dtype).itemsize


@contextmanager
def _threaded_engine(spec: ClusterSpec, progress: Progress) -> Iterator[ThreadedEngine]:
    """Dask's threaded scheduler in this process, one BLAS thread per worker thread."""
    workers, threads = local_layout(spec, cpu_count())
    engine = ThreadedEngine(progress, workers * threads)
    try:
        with blas_limited(1):
            yield engine
    finally:
        engine.close()
        storage.close_open_inputs()


def _run_on(
    job: Job,
    plan: BlockPlan,
    names: tuple[str, ...],
    ctx: Context,
    inputs: dict[str, Any],
    clock: _Clock,
    started: float,
) -> RunOutcome:
    """The part of a run that needs the engine."""
    engine = ctx.engine
    extra: dict[str, Any] = {"warnings": block_warnings(plan)}
    if plan.fixed_columns:
        extra["fixed_columns"] = _fixed_note(plan)
    scale = None
    if job.solve.scale_columns:
        with clock.stage("scale"):
            scale = quality.equilibration(quality.column_norms(plan, engine))
            plan = replace(plan, column_scale=tuple(scale))
    with clock.stage("factor"):
        fact = get_method(job.method.name)(plan, job.method, ctx)
    extra["warnings"].extend(fact.details.get("warnings", []))
    with clock.stage("solve"):
        solution = None if fact.qhb is None else solve(fact.R, fact.qhb, job.solve.rank_tolerance)
    refine_passes = 0
    if job.solve.refine and solution is not None:
        with clock.stage("refine"):
            solution, refine_passes = _refined(job, plan, fact, solution, ctx, extra)
    with storage.ResultWriter(job.output.local) as writer:
        with clock.stage("verify"):
            outputs = _row_outputs(job, plan)
            sink = _row_sink(writer, plan, outputs) if outputs else None
            x = None if solution is None else solution.x
            basis = None if solution is None else solution.range_basis
            check = quality.verify(plan, fact, x, engine, wants_q(job), outputs, sink, basis)
        stats = None
        used = check.sums.rows_counted(plan.rows)
        if solution is not None:
            res2, res_norm = check.sums.res2, check.sums.res_norm
            assert res2 is not None and res_norm is not None, "verify measures the residual"
            stats = statistics(solution, res2, used, res_norm.value)
        if solution is not None and stats is not None and job.solve.residuals:
            with clock.stage("screen"):
                setup = quality.screening_setup(job, plan, solution, stats, check.sums)
                extra.update(_screen(writer, plan, setup))
        if scale is not None:
            extra["column_scaling"] = _scaling_figures(fact.R, scale)
        extra.update(_answer(plan, solution, stats, scale, names))
        entry = _run_segment(plan, fact, check.sums.rtr, used, inputs, job.update.label)
        state = ResultState(fact.sums, check.sums.rtr, used, plan.rows, inputs, [entry])
        step = {"verb": "run", "rows_read": [[0, plan.rows]], "rows_read_count": plan.rows}
        extra["segments"] = segments.coverage(state.segments, [], step, recomputed=True)
        report = quality.assemble_report(
            job=job,
            plan=plan,
            fact=fact,
            solution=solution,
            stats=stats,
            checked=check.sums,
            formed_q=check.formed_q,
            passes=fact.passes + check.passes + refine_passes + (1 if scale is not None else 0),
            seconds=clock.seconds,
            peak_memory=engine.peak_memory_bytes(),
            extra={
                **extra,
                "inputs": storage.public_record(inputs),
                "provenance": {
                    **provenance(started, time.time()),
                    "scheduler": getattr(engine, "origin", None),
                },
                "caution": CAUTION,
            },
        )
        with clock.stage("write"):
            return _commit(writer, job, plan, fact, solution, stats, report, scale, state, names)


def _commit(
    writer: storage.ResultWriter,
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    stats: Statistics | None,
    report: dict[str, Any],
    scale: np.ndarray | None,
    state: ResultState,
    names: tuple[str, ...],
) -> RunOutcome:
    """Write the store, its update state and the reports, commit them, and say how it went."""
    _write_store(writer, job, plan, fact, solution, stats, report, scale)
    writer.put_labels("columns", names)
    writer.put_labels("columns_i", names)
    _write_state(writer, plan, fact, state, scale)
    json_path, html_path = storage.report_paths(job.output.local)
    report = {**report, "commit": writer.commit_id}  # the store records the same id
    drawing = time.perf_counter()
    page = render_html(report) if _DRAW_HTML.get() else None
    report["seconds"]["report"] = round(time.perf_counter() - drawing, 4)
    writer.add_file(json_path, to_json(report))
    if page is not None:
        writer.add_file(html_path, page)
    writer.commit()
    held = report["exit_status"] == EXIT_OK
    return RunOutcome(EXIT_OK if held else EXIT_GATE_FAILED, report, job.output.local)


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
        return _compare_to_url(job, methods, progress, inline)
    from rowfold import compare

    plan = plan_job(job)
    names = parameter_names(job, plan)
    progress = progress or Progress()
    progress.begin_job(job.name, plan.rows)
    with _engine(job, progress, inline, plan) as engine:
        inputs = _fingerprints(job, plan, engine)

        def run(method_job: Job) -> RunOutcome:
            out = method_job.output.local
            with (
                storage.open_output(out, True, _inputs(job)),
                storage.scratch_folder(out) as workdir,
            ):
                ctx = Context(engine, wants_q(method_job), storage.ScratchFolder(workdir))
                return _run_on(method_job, plan, names, ctx, inputs, _Clock(), time.time())

        rows = [compare.run_row(job, method, run) for method in methods]
    records = compare.table(rows)
    json_path, html_path = compare.write(job, records)
    return records, json_path, html_path


def _compare_to_url(
    job: Job, methods: list[str], progress: Progress | None, inline: bool
) -> tuple[list[dict[str, Any]], str, str]:
    """``compare_job`` for a URL output: compare locally, publish the comparison's three
    parts (the method results' folder, the JSON, the HTML) by pointer."""
    import uuid

    url, options = str(job.output.path), job.output.storage_options
    stem = url.rpartition("/")[2].rpartition(".")[0] or url.rpartition("/")[2]
    base = f"{url.rpartition('/')[0]}/{stem}.compare"
    try:
        pointer = published.current(base, options)
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot read the comparison's pointer ({locations.failure(exc, options)}); "
            "check output.path and output.storage_options"
        ) from None
    with published.private_folder() as scratch:
        store = scratch / url.rpartition("/")[2]
        local = replace(job, output=replace(job.output, path=store, overwrite=True))
        try:
            records, json_path, html_path = compare_job(local, methods, progress, inline)
        except RowfoldError as exc:
            raise _renamed(exc, str(store), url) from None
        parts = [scratch / f"{stem}.compare", Path(json_path), Path(html_path)]
        commit = uuid.uuid4().hex
        record = published.publish(base, options, commit, parts, published.commit_of(pointer))
    return records, record["parts"][parts[1].name], record["parts"][parts[2].name]


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
        return _segments_on_url(job, "update", lambda local: update_job(local, progress, inline))
    with storage.open_output(job.output.local, True, _inputs(job), wait_lock):
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
    clock = _Clock()
    old = _earlier(job, "update")
    plan, rows_done = old.plan, old.rows_done
    live = [(e.segment.first_row, e.segment.stop_row) for e in old.entries]
    progress = progress or Progress()
    progress.begin_job(job.name, 0)  # stages read old and new rows: no one rate
    with ExitStack() as stack:
        engine = stack.enter_context(_engine(job, progress, inline, plan))
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
            added = _fingerprints(job, replace(plan, first_row=rows_done), engine)
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
        return _segments_on_url(
            job, "replace", lambda local: replace_job(local, label, progress, inline)
        )
    with storage.open_output(job.output.local, True, _inputs(job), wait_lock):
        return _replace_held(job, label, progress, inline)


def _replace_held(job: Job, label: str, progress: Progress | None, inline: bool) -> RunOutcome:
    """``replace_job`` while it holds the output."""
    from rowfold import update

    out = job.output.local
    started = time.time()
    clock = _Clock()
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
        engine = stack.enter_context(_engine(job, progress or Progress(), inline, plan))
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
        return _segments_on_url(job, "retire", lambda local: retire_job(local, labels, progress))
    with storage.open_output(job.output.local, True, _inputs(job), wait_lock):
        return _retire_held(job, labels, progress)


def _retire_held(job: Job, labels: list[str], progress: Progress | None) -> RunOutcome:
    """``retire_job`` while it holds the output."""
    out = job.output.local
    started = time.time()
    clock = _Clock()
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
    with _engine(job, progress or Progress(), True) as engine:
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


def _commit_segments(
    job: Job, old: _Earlier, change: _Change, engine: Engine, clock: _Clock, started: float
) -> RunOutcome:
    """Reduce the live segments, solve, report and commit (the earlier result stays whole
    until the commit completes)."""
    plan = old.plan
    with clock.stage("reduce"):
        reduced = segments.reduce(change.kept)
    n = plan.cols
    whole = reduced.factor
    qhb = whole[:n, n:] if plan.rhs is not None else None
    factor = None if qhb is None else whole[n:, n:]
    gram = reduced.gram
    sums = FirstPassSums(float(np.real(np.trace(gram))), gram)
    fact = Factorization(
        R=whole[:n, :n],
        qhb=qhb,
        q_kernel=tsqr.q_block,
        q_recipes=[],
        passes=change.passes,
        sums=sums,
        details={"segments_reduced": reduced.segments, "reduction": "binary tree of QRs"},
    )
    view = replace(plan, first_row=0, rows=reduced.rows)  # the rows the answer covers
    residual_sq = None if factor is None else np.sum(np.abs(factor) ** 2, axis=0)
    solution = stats = None
    if fact.qhb is not None and residual_sq is not None:
        solution = solve(fact.R, fact.qhb, job.solve.rank_tolerance)
        stats = statistics(solution, residual_sq, reduced.rows_used)
    scale = old.state["column_scale"]
    coverage = segments.coverage(change.kept, change.retired, change.step, recomputed=False)
    extra = {
        **change.extra,
        "warnings": [*change.extra.get("warnings", []), *_update_warnings(job, change.verb)],
        "segments": coverage,
        "q_state": STALE_Q_TEXT,
        "inputs": storage.public_record(change.inputs),
        "provenance": {
            **provenance(started, time.time()),
            "scheduler": getattr(engine, "origin", None),
        },
        "caution": CAUTION,
        **_answer(plan, solution, stats, scale, old.names),
    }
    if plan.fixed_columns:
        extra["fixed_columns"] = _fixed_note(plan)
    report = quality.assemble_report(
        job=job,
        plan=view,
        fact=fact,
        solution=solution,
        stats=stats,
        checked=VerificationSums(res2=residual_sq),
        formed_q=False,
        seconds=clock.seconds,
        peak_memory=engine.peak_memory_bytes(),
        passes=change.passes,
        extra=extra,
        unmeasured={"orthogonality_loss": UPDATE_NO_Q, "factorization_residual": UPDATE_NO_Q},
    )
    state = ResultState(
        first=sums,
        rtr=None if factor is None else factor.conj().T @ factor,
        rows_used=reduced.rows_used,
        rows_done=change.rows_done,
        input_digests=change.inputs,
        segments=change.kept,
        retired_segments=change.retired,
    )
    with storage.ResultWriter(job.output.local) as writer:
        writer.set_attrs({"q_state": STALE_Q_TEXT})
        return _commit(writer, job, view, fact, solution, stats, report, scale, state, old.names)


def _update_warnings(job: Job, verb: str = "update") -> list[str]:
    """What an update, replace or retire leaves out, since it does not read every covered
    row again."""
    notes = [f"{verb}: Q and the orthogonality figures are not formed; see q_state"]
    if job.solve.refine:
        notes.append(f"{verb}: solve.refine skipped (it needs a pass over all rows; use run)")
    if job.solve.residuals:
        notes.append(f"{verb}: residual screening skipped (it needs all rows; use run)")
    return notes


def _refined(
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution,
    ctx: Context,
    extra: dict[str, Any],
) -> tuple[Solution, int]:
    """Refine x when the problem has full rank; record what happened in ``extra``."""
    if solution.rank < plan.cols:
        extra["warnings"].append("solve.refine skipped: the problem is rank deficient")
        return solution, 0
    outcome = refine(plan, fact, solution.x, ctx.engine, ctx.scratch, job.solve.refine_iterations)
    extra["refinement"] = {
        "iterations": outcome.iterations,
        "last_correction": outcome.last_correction,
        "corrections": outcome.history,
        "passes": outcome.passes,
    }
    return replace(solution, x=outcome.x), outcome.passes


def _row_outputs(job: Job, plan: BlockPlan) -> tuple[str, ...]:
    """Per-row arrays the verification pass must hand over for writing."""
    names: list[str] = []
    if job.output.q:
        names.append("Q")
    if job.solve.residuals and plan.rhs is not None:
        names += ["residuals", "leverage", "redundancy"]
    return tuple(names)


def _row_sink(
    writer: storage.ResultWriter, plan: BlockPlan, outputs: tuple[str, ...]
) -> quality.RowSink:
    """Create the per-row arrays in the store; return a function that fills their rows."""
    chunk = plan.per_block
    dtype = np.dtype(plan.dtype)
    real = np.zeros(0, dtype=dtype).real.dtype
    shapes = {
        "Q": (plan.rows, plan.cols),
        "residuals": _rows_shape(plan),
        "leverage": (plan.rows,),
        "redundancy": (plan.rows,),
    }
    kinds = {"leverage": real, "redundancy": np.dtype(np.float64)}
    for name in outputs:
        writer.create(name, shapes[name], kinds.get(name, dtype), chunk)

    def sink(start: int, rows: dict[str, np.ndarray]) -> None:
        for name, block in rows.items():
            writer.write_rows(name, start, _row_shaped(plan, name, block))

    return sink


_PER_RHS_ROWS = ("residuals", "standardized_residuals", "studentized_residuals")


def _rows_shape(plan: BlockPlan) -> tuple[int, ...]:
    """The stored shape of a per-rhs row array: (m,) for a 1-D rhs, (m, k) otherwise."""
    return (plan.rows,) if plan.rhs_1d else (plan.rows, plan.rhs_cols)


def _row_shaped(plan: BlockPlan, name: str, block: np.ndarray) -> np.ndarray:
    """A block of a row array in its stored shape (a 1-D rhs drops the rhs axis)."""
    return block[:, 0] if plan.rhs_1d and name in _PER_RHS_ROWS and block.ndim == 2 else block


def _screen(
    writer: storage.ResultWriter, plan: BlockPlan, setup: quality.ScreeningSetup
) -> dict[str, Any]:
    """Standardized and studentized residuals into the store; the report's screening
    summary, the bounded-size summaries its plots are drawn from, the redundancy numbers'
    total and the per-observation test."""
    chunk = plan.per_block
    for name in ("standardized_residuals", "studentized_residuals"):
        writer.create(name, _rows_shape(plan), np.float64, chunk)

    def write(name: str, start: int, rows: np.ndarray) -> None:
        writer.write_rows(name, start, _row_shaped(plan, name, np.real(rows)))

    def read(name: str, start: int, stop: int) -> np.ndarray:
        rows = writer.read_rows(name, start, stop)
        return rows[:, None] if name in _PER_RHS_ROWS and rows.ndim == 1 else rows

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


def _scaling_figures(R_scaled: np.ndarray, scale: np.ndarray) -> dict[str, Any]:
    """Condition numbers with and without column equilibration."""
    unscaled = R_scaled / scale[None, :]
    return {
        "column_multipliers": scale,
        "r_condition_equilibrated": metrics.condition_from(metrics.singular_values(R_scaled)),
        "r_condition_unscaled": metrics.condition_from(metrics.singular_values(unscaled)),
    }


def _fingerprints(job: Job, plan: BlockPlan, engine: Engine) -> dict[str, Any]:
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


def _shaped(plan: BlockPlan, array: np.ndarray) -> np.ndarray:
    """Give per-rhs results the rhs's own shape (n for a 1-D rhs, n x k otherwise)."""
    return array[:, 0] if plan.rhs_1d else array


def _write_store(
    writer: storage.ResultWriter,
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    stats: Statistics | None,
    report: dict[str, Any],
    scale: np.ndarray | None,
) -> None:
    """Write R, x, x_stderr, qhb and the attributes, undoing any column equilibration.

    With column multipliers s (A_s = A diag(s)): R = R_s diag(1/s), x = diag(s) x_s.
    Fixed columns (``input.fixed_columns``) come back as zeros: in x, x_stderr and qhb,
    and as zero rows and columns of R and x_covariance.
    """
    s = _multipliers(plan, fact.R.dtype, scale)
    writer.put("R", expand_columns(plan, fact.R / s[None, :], (0, 1)))
    if solution is not None and stats is not None and fact.qhb is not None:
        x, stderr = _unscaled(plan, solution, stats, scale)
        writer.put("x", _shaped(plan, x))
        writer.put("x_stderr", _shaped(plan, stderr))
        writer.put("qhb", _shaped(plan, expand_columns(plan, fact.qhb)))
        if job.solve.covariance:
            covariance = _covariance(plan, solution, stats, s)
            writer.put("x_covariance", expand_columns(plan, covariance, (-2, -1)))
    writer.set_attrs(
        {
            "rowfold_version": __version__,
            "method": job.method.name,
            "rows": plan.rows,
            "cols": plan.input_cols,
            "fixed_columns": list(plan.fixed_columns),
            "job": json.loads(job.resolved_json()),
            "inputs": report["inputs"],
            "provenance": report["provenance"],
        }
    )


def _multipliers(plan: BlockPlan, dtype: np.dtype, scale: np.ndarray | None) -> np.ndarray:
    """The column multipliers of an equilibration (ones without one), in the real dtype."""
    real = np.zeros(0, dtype=dtype).real.dtype
    return np.ones(plan.cols, dtype=real) if scale is None else scale.astype(real)


def _unscaled(
    plan: BlockPlan, solution: Solution, stats: Statistics, scale: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """x and its standard errors (n x k) in the input's columns: unscaled, and 0 for
    fixed columns."""
    s = _multipliers(plan, solution.x.dtype, scale)
    x = expand_columns(plan, solution.x * s[:, None])
    return x, expand_columns(plan, stats.x_stderr * s[:, None])


def _answer(
    plan: BlockPlan,
    solution: Solution | None,
    stats: Statistics | None,
    scale: np.ndarray | None,
    names: tuple[str, ...],
) -> dict[str, Any]:
    """The report's answer: ``parameters`` (name, column, x, stderr, fixed; per-rhs values
    as elsewhere) and ``datum`` (what fixes the solution)."""
    datum = _datum(plan, solution, names)
    if solution is None or stats is None:
        return {"parameters": None, "datum": datum}
    x, stderr = _unscaled(plan, solution, stats, scale)
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


def _datum(plan: BlockPlan, solution: Solution | None, names: tuple[str, ...]) -> dict[str, Any]:
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


def _fixed_note(plan: BlockPlan) -> dict[str, Any]:
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


def _write_state(
    writer: storage.ResultWriter,
    plan: BlockPlan,
    fact: Factorization,
    state: ResultState,
    scale: np.ndarray | None,
) -> None:
    """What ``update`` needs to fold in later rows without reading these again.

    ``state/R`` and ``state/qhb`` are in working coordinates (after any column scaling),
    ``state/residual_factor`` F has F^H F = r^H r, ``state/gram`` is A^H A;
    ``state/digest_bounds`` and ``state/digest_<input>`` are the row-block digests of the
    inputs (:func:`rowfold.storage.digest_arrays`).
    """
    writer.put("state/R", fact.R)
    writer.put("state/gram", state.first.gram)
    if fact.qhb is not None and state.rtr is not None:
        writer.put("state/qhb", fact.qhb)
        writer.put("state/residual_factor", residual_factor(state.rtr))
    writer.put("state/column_scale", np.ones(plan.cols) if scale is None else scale)
    for name, array in storage.digest_arrays(state.input_digests).items():
        writer.put(f"state/{name}", array)
    _write_segments(writer, state.segments, state.retired_segments)
    writer.set_attrs(
        {
            "rows_done": state.rows_done,
            "a_fro2": state.first.a_fro2,
            "rows_used": state.rows_used,
        }
    )


def _run_segment(
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


def _write_segments(
    writer: storage.ResultWriter, entries: list[Any], retired: list[dict[str, Any]]
) -> None:
    """Write each live segment's factor and Gram (one item each, read back one at a time)
    and the segment records (:mod:`rowfold.segments`)."""
    count = len(entries)
    for i, entry in enumerate(entries):
        factor, gram = entry.load()
        if i == 0:
            writer.create(segments.FACTORS, (count, *factor.shape), factor.dtype, 1)
            writer.create(segments.GRAMS, (count, *gram.shape), gram.dtype, 1)
        writer.write_rows(segments.FACTORS, i, factor[None])
        writer.write_rows(segments.GRAMS, i, gram[None])
    writer.set_attrs(
        {
            "segments": [e.segment.as_dict() for e in entries],
            "retired_segments": retired,
        }
    )


def _covariance(
    plan: BlockPlan, solution: Solution, stats: Statistics, scale: np.ndarray
) -> np.ndarray:
    """``sigma_j^2 (R^H R)^+`` per right-hand side: n x n, or k x n x n for a 2-D rhs."""
    w = solution.inverse_rows * scale[:, None]
    unit = w @ w.conj().T
    per_rhs = np.stack([s**2 * unit for s in stats.residual_std])
    return per_rhs[0] if plan.rhs_1d else per_rhs


def inspect_path(path: str | Path) -> dict[str, Any]:
    """Describe an input file or a result store (and its report, when there is one); a URL
    (text with a scheme) names a result published by pointer."""
    if isinstance(path, str) and locations.is_url(path):
        return _inspect_url(path)
    target = Path(path).expanduser().resolve()
    storage.recover_if_idle(target)  # finish an interrupted commit before describing it
    info = storage.describe_path(target)
    json_path, _ = storage.report_paths(target)
    if json_path.exists():
        info["report"] = json.loads(json_path.read_text(encoding="utf-8"))
    return info


def _inspect_url(url: str) -> dict[str, Any]:
    """Describe the result a URL's pointer names (its store fetched without the row arrays'
    chunks into a private folder; the file system's own environment gives its options).

    Raises
    ------
    InputError
        When there is no pointer, or the store cannot be read (names the URL).
    """
    try:
        pointer = published.current(url)
        if pointer is None:
            raise InputError(f"{published.pointer_url(url)}: no result published at {url}")
        with published.private_folder() as scratch:
            store = scratch / url.rpartition("/")[2]
            published.fetch_store(pointer, "", store)
            info = storage.describe_path(store)
            report = published.read_part(pointer, storage.report_paths(store)[0].name)
    except RowfoldError:
        raise
    except Exception as exc:
        raise InputError(
            f"{url}: cannot read the published result ({locations.failure(exc)})"
        ) from None
    info["path"] = str(pointer["store"])
    info["pointer"] = pointer
    if report is not None:
        info["report"] = json.loads(report)
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
