"""Time building rowfold's Dask graphs for many row blocks, without reading any data.

Run from the repository root::

    python benchmarks/graph_build.py --blocks 10000

A block plan of ``--blocks`` blocks (of ``--rows-per-block`` rows, ``--cols`` columns) is
made from a description of an input that does not exist: building graphs never opens files.
For each graph the script times building the tasks, then ``dask.compute``'s own preparation
of them up to the scheduler (given a stand-in scheduler that runs nothing), then the start on
Dask's threaded scheduler (what ``cluster.scheduler: threads`` uses: the graph converted,
ordered and its state set up, until the first task would run) and, with ``--distributed``,
on an in-process ``LocalCluster`` like the embedded default (until its scheduler has taken
in the whole graph). It prints seconds, task counts and the ratio of
build + start to the goal of 5 s (issue 17). Nothing is computed.
"""

from __future__ import annotations

import argparse
import contextlib
import time
from collections.abc import Callable
from typing import Any

import dask
import dask.threaded
from dask.callbacks import Callback

from rowfold.blocks import plan_blocks
from rowfold.methods import cholesky, tsqr
from rowfold.storage import ArrayInfo, ArrayRef


class _NoEngine:
    """Stands in for an engine: records the tasks a method asks to compute, computes none."""

    def __init__(self) -> None:
        self.tasks: list[Any] = []

    def compute(self, tasks: list[Any], label: str) -> list[Any]:
        self.tasks = list(tasks)
        raise _BuiltError

    def persist(self, tasks: list[Any]) -> list[Any]:
        return list(tasks)


class _BuiltError(Exception):
    """Raised once the method has handed over its first graph."""


def first_graph(build: Callable[[_NoEngine], Any]) -> tuple[float, list[Any]]:
    """Seconds to build the first graph a method computes, and its tasks."""
    engine = _NoEngine()
    started = time.perf_counter()
    with contextlib.suppress(_BuiltError):
        build(engine)
    return time.perf_counter() - started, engine.tasks


def prepare(tasks: list[Any]) -> tuple[float, int]:
    """Seconds for ``dask.compute`` to hand the tasks to a scheduler as one graph (a stand-in
    scheduler that runs nothing), and the number of tasks in that graph."""
    sizes: list[int] = []

    def run_nothing(graph: Any, keys: list[Any], **_: Any) -> list[None]:
        materialized = graph.__dask_graph__() if hasattr(graph, "__dask_graph__") else graph
        sizes.append(len(materialized))
        return [None] * len(keys)

    started = time.perf_counter()
    dask.compute(*tasks, scheduler=run_nothing)
    return time.perf_counter() - started, sizes[0]


GOAL_SECONDS = 5.0


class _StartedError(Exception):
    """Raised by :class:`_StopAtStart` when the scheduler is about to run the first task."""


class _StopAtStart(Callback):
    """A Dask callback that stops the threaded scheduler once its state is set up."""

    def _start_state(self, dsk: Any, state: Any) -> None:
        raise _StartedError


def start_threads(tasks: list[Any]) -> float:
    """Seconds until Dask's threaded scheduler would run the first task of ``tasks``."""
    started = time.perf_counter()
    with _StopAtStart(), contextlib.suppress(_StartedError):
        dask.compute(*tasks, scheduler=dask.threaded.get)
    return time.perf_counter() - started


def start_distributed(client: Any, tasks: list[Any]) -> float:
    """Seconds until an in-process cluster's scheduler has taken in the whole graph (its
    ``update_graph`` done: tasks converted, ordered and the first ones sent to workers)."""
    name = "graph-build-arrival"
    client.register_plugin(_arrival_plugin(), name=name)
    started = time.perf_counter()
    futures = client.compute(tasks)
    arrived: list[float] = []
    while not arrived:
        time.sleep(0.01)
        arrived = client.run_on_scheduler(_arrivals, name=name)
    client.cancel(futures)
    client.unregister_scheduler_plugin(name)
    return arrived[0] - started


def _arrival_plugin() -> Any:
    """A scheduler plugin noting when each graph has been taken in (perf_counter)."""
    from distributed.diagnostics.plugin import SchedulerPlugin

    class Arrival(SchedulerPlugin):  # type: ignore[misc]
        def __init__(self) -> None:
            self.arrived: list[float] = []

        def update_graph(self, scheduler: Any, **kwargs: Any) -> None:
            self.arrived.append(time.perf_counter())

    return Arrival()


def _arrivals(dask_scheduler: Any, name: str) -> list[float]:
    """The times the plugin ``name`` noted (runs on the scheduler)."""
    return list(dask_scheduler.plugins[name].arrived)


def main() -> None:
    """Build each graph and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--blocks", type=int, default=10_000, help="row blocks (10000)")
    parser.add_argument("--rows-per-block", type=int, default=65_536, help="rows a block")
    parser.add_argument("--cols", type=int, default=64, help="columns (64)")
    parser.add_argument(
        "--distributed", action="store_true", help="also start each graph on a LocalCluster"
    )
    opts = parser.parse_args()
    rows = opts.blocks * opts.rows_per_block
    info = ArrayInfo(ArrayRef("/nonexistent/input.h5", "A"), (rows, opts.cols), "<f8", None)
    plan = plan_blocks(info, None, opts.rows_per_block)
    graphs: dict[str, Callable[[_NoEngine], Any]] = {
        "tsqr, R only (binary tree)": lambda e: tsqr.factor_source(plan, "binary", e, False),
        "tsqr, R only (flat tree)": lambda e: tsqr.factor_source(plan, "flat", e, False),
        "tsqr with Q (binary tree)": lambda e: tsqr.factor_source(plan, "binary", e, True),
        "cholqr2 Gram pass": lambda e: cholesky.gram_pass(plan, e, (), "gram"),
    }
    print(f"{plan.blocks} blocks of {opts.rows_per_block} x {opts.cols} (no data read)")
    columns = f"{'graph':<30} {'build s':>8} {'prepare s':>10} {'threads s':>10}"
    columns += f" {'cluster s':>10}" if opts.distributed else ""
    print(f"{columns} {'tasks':>8} {'vs 5 s':>7}")
    with contextlib.ExitStack() as stack:
        client = stack.enter_context(_client()) if opts.distributed else None
        for name, build in graphs.items():
            seconds, tasks = first_graph(build)
            prepared, count = prepare(tasks)
            threads = start_threads(tasks)
            row = f"{name:<30} {seconds:8.2f} {prepared:10.2f} {threads:10.2f}"
            slowest = threads
            if client is not None:
                cluster = start_distributed(client, tasks)
                slowest = max(slowest, cluster)
                row += f" {cluster:10.2f}"
            print(f"{row} {count:8d} {(seconds + slowest) / GOAL_SECONDS:6.2f}x", flush=True)


@contextlib.contextmanager
def _client() -> Any:
    """A client of an in-process LocalCluster: 2 single-threaded workers, quiet."""
    import logging

    from distributed import Client, LocalCluster

    with (
        dask.config.set({"logging.distributed": "error"}),
        LocalCluster(
            n_workers=2, threads_per_worker=1, processes=False, silence_logs=logging.CRITICAL
        ) as cluster,
        Client(cluster) as client,
    ):
        yield client


if __name__ == "__main__":
    main()
