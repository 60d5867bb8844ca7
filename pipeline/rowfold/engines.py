"""Which engine a job runs on: in-line, Dask's threaded scheduler, or a Dask cluster."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from typing import Any

import numpy as np

from rowfold import storage
from rowfold.blocks import BlockPlan
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
from rowfold.spec import ClusterSpec, Job


@contextmanager
def job_engine(
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
    scheduler, why = choose_scheduler(spec, dense_bytes(plan))
    if scheduler == "threads":
        with threaded_engine(spec, progress) as threaded:
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


def dense_bytes(plan: BlockPlan | None) -> int:
    """Bytes of the plan's matrix held densely (more than any small job without a plan)."""
    if plan is None:
        return SMALL_JOB_BYTES + 1
    return plan.rows * plan.cols * np.dtype(plan.dtype).itemsize


@contextmanager
def threaded_engine(spec: ClusterSpec, progress: Progress) -> Iterator[ThreadedEngine]:
    """Dask's threaded scheduler in this process, one BLAS thread per worker thread."""
    workers, threads = local_layout(spec, cpu_count())
    engine = ThreadedEngine(progress, workers * threads)
    try:
        with blas_limited(1):
            yield engine
    finally:
        engine.close()
        storage.close_open_inputs()
