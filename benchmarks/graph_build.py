"""Time building rowfold's Dask graphs for many row blocks, without reading any data.

Run from the repository root::

    python benchmarks/graph_build.py --blocks 10000

A block plan of ``--blocks`` blocks (of ``--rows-per-block`` rows, ``--cols`` columns) is
made from a description of an input that does not exist: building graphs never opens files.
For each graph the script times building the delayed tasks, and then ``dask.compute``'s own
preparation of them up to the scheduler (given a stand-in scheduler that runs nothing), and
prints seconds and task counts. Nothing is computed.
"""

from __future__ import annotations

import argparse
import contextlib
import time
from collections.abc import Callable
from typing import Any

import dask

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


def main() -> None:
    """Build each graph and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--blocks", type=int, default=10_000, help="row blocks (10000)")
    parser.add_argument("--rows-per-block", type=int, default=65_536, help="rows a block")
    parser.add_argument("--cols", type=int, default=64, help="columns (64)")
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
    print(f"{'graph':<30} {'build s':>8} {'prepare s':>10} {'tasks':>8}")
    with dask.config.set(scheduler="sync"):
        for name, build in graphs.items():
            seconds, tasks = first_graph(build)
            prepared, count = prepare(tasks)
            print(f"{name:<30} {seconds:8.2f} {prepared:10.2f} {count:8d}")


if __name__ == "__main__":
    main()
