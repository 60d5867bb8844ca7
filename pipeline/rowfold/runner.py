"""One job end to end: spec -> row blocks -> factorization -> solution -> quality -> store.

The CLI calls only this module (and :mod:`rowfold.report`). Nothing is written until the
whole result is ready; the result store and its reports are committed together.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from rowfold import __version__, quality, storage
from rowfold.blocks import BlockPlan, plan_blocks
from rowfold.cluster import InlineEngine, Progress, open_engine
from rowfold.errors import EXIT_GATE_FAILED, EXIT_OK
from rowfold.methods import get_method
from rowfold.methods._graph import task
from rowfold.methods.base import Context, Engine, Factorization
from rowfold.report import CAUTION, render_html, to_json
from rowfold.solve import Solution, Statistics, solve, statistics
from rowfold.spec import Job, load_job

__all__ = ["RunOutcome", "check_job", "inspect_path", "load_job", "run_job"]


@dataclass
class RunOutcome:
    """What a finished run produced.

    Attributes
    ----------
    status : int
        0 when every gate held, 3 when one failed.
    report : dict
        The report as written to JSON.
    output : Path
        The committed result store.
    """

    status: int
    report: dict[str, Any]
    output: Path


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
    """Describe the job's input arrays and cut them into row blocks (reads no data)."""
    path = str(job.input.path)
    matrix = storage.describe_array(storage.ArrayRef(path, job.input.matrix))
    rhs = None
    if job.input.rhs is not None:
        rhs = storage.describe_array(storage.ArrayRef(path, job.input.rhs))
    native = job.method.precision == "native"
    return plan_blocks(matrix, rhs, job.input.rows_per_block, native)


def check_job(job: Job) -> dict[str, Any]:
    """Validate a job's inputs and output path without computing; return a summary."""
    plan = plan_job(job)
    storage.check_output_path(job.output.path, job.output.overwrite)
    return {
        "job": job.name,
        "input": str(job.input.path),
        "rows": plan.rows,
        "cols": plan.cols,
        "rhs_cols": plan.rhs_cols,
        "dtype": plan.dtype,
        "blocks": plan.blocks,
        "rows_per_block": plan.bounds[0][1] - plan.bounds[0][0],
        "method": job.method.name,
        "output": str(job.output.path),
    }


def wants_q(job: Job) -> bool:
    """Q is formed when it is written, or when a gate needs its figures."""
    return job.output.q or job.gates.orthogonality is not None or job.gates.residual is not None


def run_job(job: Job, progress: Progress | None = None, inline: bool = False) -> RunOutcome:
    """Run a job end to end and commit its result store and reports.

    Parameters
    ----------
    job : Job
        A validated job.
    progress : Progress, optional
        Where progress goes (nothing by default).
    inline : bool
        Run the graphs in this thread instead of on a Dask cluster (tests, debugging).

    Raises
    ------
    RowfoldError
        Subclasses map to exit statuses 2 and 4; nothing is written on error.
    """
    progress = progress or Progress()
    clock = _Clock()
    started = time.time()
    with clock.stage("plan"):
        plan = plan_job(job)
        storage.check_output_path(job.output.path, job.output.overwrite)
    with ExitStack() as stack:
        storage.remove_litter(job.output.path)
        workdir = stack.enter_context(storage.scratch_folder(job.output.path))
        with clock.stage("cluster_start"):
            engine = stack.enter_context(_engine(job, progress, inline))
        return _run_on(job, plan, Context(engine, wants_q(job), workdir), clock, started)


@contextmanager
def _engine(job: Job, progress: Progress, inline: bool) -> Iterator[Any]:
    if inline:
        yield InlineEngine(progress)
        return
    with open_engine(job.cluster, progress) as engine:
        yield engine


def _run_on(job: Job, plan: BlockPlan, ctx: Context, clock: _Clock, started: float) -> RunOutcome:
    """The part of a run that needs the engine."""
    engine = ctx.engine
    with clock.stage("factor"):
        fact = get_method(job.method.name)(plan, job.method, ctx)
    with clock.stage("solve"):
        solution = None if fact.qhb is None else solve(fact.R, fact.qhb, job.solve.rank_tolerance)
    with storage.ResultWriter(job.output.path) as writer:
        with clock.stage("verify"):
            write_q = _q_writer(writer, plan) if job.output.q else None
            x = None if solution is None else solution.x
            check = quality.verify(plan, fact, x, engine, wants_q(job), write_q)
        stats = None
        if solution is not None:
            stats = statistics(solution, check.sums["res2"], plan.rows)
        sums = {**fact.sums, **check.sums}
        fingerprints = _fingerprints(job, plan, engine)
        report = quality.assemble_report(
            job=job,
            plan=plan,
            fact=fact,
            solution=solution,
            stats=stats,
            sums=sums,
            formed_q=check.formed_q,
            passes=fact.passes + check.passes,
            seconds=clock.seconds,
            peak_memory=engine.peak_memory_bytes(),
            extra={
                "inputs": fingerprints,
                "started": started,
                "finished": time.time(),
                "caution": CAUTION,
            },
        )
        with clock.stage("write"):
            _write_store(writer, job, plan, fact, solution, stats, report)
            json_path, html_path = storage.report_paths(job.output.path)
            writer.add_file(json_path, to_json(report))
            writer.add_file(html_path, render_html(report))
            writer.commit()
    failed = any(not gate["held"] for gate in report["gates"].values())
    return RunOutcome(EXIT_GATE_FAILED if failed else EXIT_OK, report, job.output.path)


def _q_writer(writer: storage.ResultWriter, plan: BlockPlan) -> Callable[[int, np.ndarray], None]:
    """Create the Q array in the store and return a function that fills its rows."""
    chunk = plan.bounds[0][1] - plan.bounds[0][0]
    writer.create("Q", (plan.rows, plan.cols), np.dtype(plan.dtype), chunk)

    def write(start: int, block: np.ndarray) -> None:
        writer.write_rows("Q", start, block)

    return write


def _fingerprints(job: Job, plan: BlockPlan, engine: Engine) -> dict[str, Any]:
    """Fingerprint each input on the workers (they are the ones that see the files)."""
    refs = {"matrix": plan.matrix, "rhs": plan.rhs}
    shapes = {"matrix": (plan.rows, plan.cols), "rhs": (plan.rows, plan.rhs_cols)}
    names = [name for name, ref in refs.items() if ref is not None]
    tasks = [task(storage.fingerprint, refs[name], shapes[name]) for name in names]
    values = engine.compute(tasks, "fingerprint inputs") if tasks else []
    return {
        name: {"path": str(job.input.path), "dataset": refs[name].name, "fingerprint": value}  # type: ignore[union-attr]
        for name, value in zip(names, values, strict=True)
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
) -> None:
    """Write R, x, x_stderr, qhb and the store attributes."""
    writer.put("R", fact.R)
    if solution is not None and stats is not None and fact.qhb is not None:
        writer.put("x", _shaped(plan, solution.x))
        writer.put("x_stderr", _shaped(plan, stats.x_stderr))
        writer.put("qhb", _shaped(plan, fact.qhb))
    writer.set_attrs(
        {
            "rowfold_version": __version__,
            "method": job.method.name,
            "rows": plan.rows,
            "cols": plan.cols,
            "job": job.resolved_json(),
            "inputs": report["inputs"],
        }
    )


def inspect_path(path: str | Path) -> dict[str, Any]:
    """Describe an input file or a result store (and its report, when there is one)."""
    target = Path(path).expanduser().resolve()
    info = storage.describe_path(target)
    json_path, _ = storage.report_paths(target)
    if json_path.exists():
        import json

        info["report"] = json.loads(json_path.read_text(encoding="utf-8"))
    return info


def run_demo(
    folder: Path, progress: Progress | None = None, rows: int | None = None
) -> Iterator[RunOutcome]:
    """Write the demo scenario into ``folder`` and run each of its jobs in turn."""
    from rowfold.demo import write_scenario

    for path in write_scenario(Path(folder), rows):
        yield run_job(load_job(path), progress)
