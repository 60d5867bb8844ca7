"""Where the Dask work runs: the embedded local cluster, an existing scheduler, or in-line.

:func:`open_engine` yields an engine with the :class:`rowfold.methods.base.Engine`
methods. The default is a Dask ``LocalCluster`` sized to the machine: one single-threaded
worker process per core, each with its BLAS limited to one thread, so workers x threads x
BLAS threads never exceeds the cores. ``cluster.address`` connects to a running scheduler
instead. :class:`InlineEngine` runs graphs in this thread (``check``, and unit tests).
"""

from __future__ import annotations

import collections
import logging
import os
import resource
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, TextIO

import dask

from rowfold.errors import RunError
from rowfold.spec import ClusterSpec

# Q blocks in flight at once when streaming (bounds client and worker memory).
STREAM_WINDOW = 4


def peak_rss_bytes() -> int:
    """Peak resident memory of this process, in bytes (Linux reports KiB)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak) * (1 if sys.platform == "darwin" else 1024)


def limit_blas_threads(threads: int) -> None:
    """Limit BLAS/OpenMP threads of this process (run inside each worker)."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)


@dataclass
class Progress:
    """Progress display: a bar on a terminal, a log line every ``interval`` s otherwise."""

    stream: TextIO | None = None
    interval: float = 10.0

    def show(self, label: str, done: int, total: int, started: float) -> None:
        """Print one progress update."""
        if self.stream is None:
            return
        elapsed = time.monotonic() - started
        if self.stream.isatty():
            width = 30
            filled = int(width * done / max(total, 1))
            bar = "#" * filled + "." * (width - filled)
            self.stream.write(f"\r{label:<34} [{bar}] {done}/{total} {elapsed:6.1f}s")
            if done >= total:
                self.stream.write("\n")
        else:
            self.stream.write(f"{label}: {done}/{total} tasks, {elapsed:.1f}s\n")
        self.stream.flush()


class InlineEngine:
    """Run graphs synchronously in this thread (no cluster); for checks and tests."""

    def __init__(self, progress: Progress | None = None) -> None:
        self.progress = progress or Progress()

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute and return values."""
        return list(dask.compute(*tasks, scheduler="sync"))

    def persist(self, tasks: Sequence[Any]) -> list[Any]:
        """Compute and keep values in this process."""
        return list(dask.persist(*tasks, scheduler="sync"))

    def stream(self, tasks: Sequence[Any], label: str) -> Iterator[Any]:
        """Yield values one at a time, in order."""
        for item in tasks:
            (value,) = dask.compute(item, scheduler="sync")
            yield value

    def peak_memory_bytes(self) -> int:
        """Peak RSS of this process."""
        return peak_rss_bytes()


class DistributedEngine:
    """Run graphs on a ``distributed.Client``.

    Parameters
    ----------
    client : distributed.Client
        Connected client.
    progress : Progress
        Where progress goes.
    """

    def __init__(self, client: Any, progress: Progress) -> None:
        self.client = client
        self.progress = progress

    def _wait(self, futures: list[Any], label: str) -> None:
        """Wait for futures, showing progress over every task of their graphs."""
        if self.progress.stream is None:
            from distributed import wait

            wait(futures)
            return
        _task_bar(futures, label, self.progress, self.client.scheduler.address)

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute on the cluster and gather the values."""
        futures = self.client.compute(list(tasks))
        self._wait(futures, label)
        return list(self.client.gather(futures))

    def persist(self, tasks: Sequence[Any]) -> list[Any]:
        """Persist on the cluster; values stay on the workers."""
        return list(self.client.persist(list(tasks)))

    def stream(self, tasks: Sequence[Any], label: str) -> Iterator[Any]:
        """Yield values in order, keeping at most STREAM_WINDOW in flight."""
        pending: collections.deque[Any] = collections.deque()
        items = iter(tasks)
        total = len(tasks)
        started = time.monotonic()
        for item in items:
            pending.append(self.client.compute(item))
            if len(pending) >= STREAM_WINDOW:
                break
        done = 0
        last = started
        while pending:
            value = pending.popleft().result()
            nxt = next(items, None)
            if nxt is not None:
                pending.append(self.client.compute(nxt))
            done += 1
            if time.monotonic() - last > (0.5 if self._tty else self.progress.interval):
                self.progress.show(label, done, total, started)
                last = time.monotonic()
            yield value
        if time.monotonic() - started > 1.0:
            self.progress.show(label, done, total, started)

    @property
    def _tty(self) -> bool:
        return self.progress.stream is not None and self.progress.stream.isatty()

    def peak_memory_bytes(self) -> int:
        """Peak RSS of the client plus every worker process (each counted once)."""
        peaks = self.client.run(_process_peak)
        by_pid = {pid: peak for pid, peak in peaks.values()}
        by_pid[os.getpid()] = peak_rss_bytes()
        return int(sum(by_pid.values()))


def _task_bar(futures: list[Any], label: str, progress: Progress, address: str) -> None:
    """Block until the futures finish, drawing progress over all tasks they depend on."""
    from distributed.diagnostics.progressbar import TextProgressBar

    started = time.monotonic()
    state = {"last": 0.0}

    class _Bar(TextProgressBar):
        def _draw_bar(self, remaining: int, all: int, **kwargs: Any) -> None:
            now = time.monotonic()
            tty = progress.stream is not None and progress.stream.isatty()
            wait = 0.2 if tty else progress.interval
            if now - started > 1.0 and now - state["last"] >= wait:
                state["last"] = now
                progress.show(label, all - remaining, all, started)

        def _draw_stop(self, **kwargs: Any) -> None:
            if state["last"] and kwargs.get("status") == "finished":
                total = int(kwargs.get("all", 1))
                progress.show(label, total, total, started)

    _Bar(futures, scheduler=address, interval="200ms")


def _process_peak() -> tuple[int, int]:
    """Return (pid, peak RSS bytes) of the calling worker process."""
    return os.getpid(), peak_rss_bytes()


def local_layout(spec: ClusterSpec, cores: int) -> tuple[int, int]:
    """Return (workers, threads per worker) for the embedded cluster.

    Default: one worker per core, one thread each (BLAS also one thread per worker).
    """
    workers = spec.workers or (
        max(1, cores // spec.threads_per_worker) if spec.threads_per_worker else cores
    )
    threads = spec.threads_per_worker or max(1, cores // workers)
    return workers, threads


@contextmanager
def open_engine(spec: ClusterSpec, progress: Progress) -> Iterator[DistributedEngine]:
    """Start (or connect to) a Dask cluster and yield an engine on it.

    Raises
    ------
    RunError
        When the scheduler at ``cluster.address`` cannot be reached.
    """
    from distributed import Client, LocalCluster

    # Task failures are reported by rowfold as one line; keep distributed's own logs quiet.
    logging.getLogger("distributed").setLevel(logging.CRITICAL)

    if spec.address:
        try:
            client = Client(spec.address, timeout="10s")
        except OSError as exc:
            raise RunError(
                f"cluster.address {spec.address}: cannot connect to the Dask scheduler ({exc})"
            ) from None
        with client:
            yield DistributedEngine(client, progress)
        return
    cores = os.cpu_count() or 1
    workers, threads = local_layout(spec, cores)
    with (
        dask.config.set({"distributed.worker.daemon": False, "logging.distributed": "error"}),
        LocalCluster(
            n_workers=workers,
            threads_per_worker=threads,
            processes=spec.processes,
            dashboard_address=":0",
            silence_logs=logging.CRITICAL,
        ) as cluster,
        Client(cluster) as client,
    ):
        blas = 1 if spec.processes else max(1, cores // max(1, workers * threads))
        client.run(limit_blas_threads, blas)
        yield DistributedEngine(client, progress)
