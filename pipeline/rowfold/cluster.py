"""Where the Dask work runs: the embedded local cluster, an existing scheduler, or in-line.

:func:`open_engine` yields an engine with the :class:`rowfold.methods.base.Engine`
methods. The default is a Dask ``LocalCluster`` sized to the machine: one single-threaded
worker per core, as threads of this process (``cluster.processes: true`` for processes),
with BLAS limited to one thread per worker, so workers x threads x BLAS threads never
exceeds the cores. ``cluster.address`` connects to a running scheduler
instead. :class:`InlineEngine` runs graphs in this thread (``check``, and unit tests).
The embedded cluster listens on 127.0.0.1 only and serves a dashboard only with
``cluster.dashboard``.

Losing workers: a task whose worker dies is run again elsewhere, at most
:data:`ALLOWED_FAILURES` times on the embedded cluster (a remote scheduler keeps its own
``distributed.scheduler.allowed-failures``) before the run fails with :class:`RunError`.
Every wait of :class:`DistributedEngine` is bounded (:class:`Patience`): the scheduler must
answer each request within ``cluster.timeout``, every worker must keep its heartbeat
within ``cluster.worker_timeout``, something must start or finish within
``cluster.stall_timeout``, and some worker must be connected within
:data:`NO_WORKER_TIMEOUT` seconds (environment variable ``ROWFOLD_NO_WORKER_TIMEOUT``);
otherwise the run fails with :class:`RunError` naming what stopped answering.
"""

from __future__ import annotations

import collections
import concurrent.futures
import functools
import json
import logging
import os
import resource
import sys
import time
from collections.abc import Awaitable, Callable, Iterator, Sequence
from contextlib import ExitStack, contextmanager, suppress
from dataclasses import dataclass
from typing import Any

import dask
import dask.threaded
from dask.callbacks import Callback

from rowfold.errors import RowfoldError, RunError
from rowfold.progress import REDRAW_SECONDS, Progress
from rowfold.spec import ClusterSpec

# Q blocks in flight at once when streaming (bounds client and worker memory).
STREAM_WINDOW = 4
# Workers that may die while running one task before the task (and the run) fails.
ALLOWED_FAILURES = 3
# Seconds a run waits while no worker is connected (override: ROWFOLD_NO_WORKER_TIMEOUT).
NO_WORKER_TIMEOUT = 60.0
NO_WORKER_TIMEOUT_ENV = "ROWFOLD_NO_WORKER_TIMEOUT"
# Seconds between checks on the workers while waiting for results.
POLL_SECONDS = 0.5


def peak_rss_bytes() -> int:
    """Peak resident memory of this process, in bytes (Linux reports KiB)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak) * (1 if sys.platform == "darwin" else 1024)


def limit_blas_threads(threads: int) -> None:
    """Limit BLAS/OpenMP threads of this process (run inside each worker *process*)."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)


@contextmanager
def blas_limited(threads: int) -> Iterator[None]:
    """Limit BLAS/OpenMP threads of this process while inside, then restore the caller's."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=threads):
        yield


@contextmanager
def distributed_logs_quiet() -> Iterator[None]:
    """Keep ``distributed``'s own log quiet while inside (rowfold reports task failures as
    one line), then give the caller its level back."""
    logger = logging.getLogger("distributed")
    level = logger.level
    logger.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        logger.setLevel(level)


def cpu_count() -> int:
    """Cores this process may use: Dask's count, which honours CPU affinity and cgroup
    quotas (``dask.system.CPU_COUNT``)."""
    from dask.system import CPU_COUNT

    return max(1, int(CPU_COUNT))


class InlineEngine:
    """Run graphs synchronously in this thread (no cluster); for checks and tests."""

    def __init__(self, progress: Progress | None = None) -> None:
        self.progress = progress or Progress()
        self.origin = {"how": "inline", "address": "this thread"}

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


class ThreadedEngine:
    """Run graphs on Dask's threaded scheduler in this process (``cluster.scheduler: threads``).

    No scheduler, no dashboard and no worker restarts. On one machine it saves the start-up
    of a ``LocalCluster`` and its per-task messages: about 0.8 s a run on the 4M x 64
    benchmark (README, "Performance").

    Parameters
    ----------
    progress : Progress
        Where progress goes.
    threads : int
        Worker threads.
    """

    def __init__(self, progress: Progress, threads: int) -> None:
        self.progress = progress
        self.threads = threads
        self.pool = concurrent.futures.ThreadPoolExecutor(threads, "rowfold-worker")
        self.origin = {"how": "threads", "address": f"this process, {threads} threads"}

    def close(self) -> None:
        """Wait for every task still running, then stop the threads."""
        self.pool.shutdown(wait=True, cancel_futures=True)

    def _run(self, tasks: Sequence[Any], label: str | None) -> tuple[Any, ...]:
        """Compute ``tasks``; when one fails, let the tasks already running finish first
        (so none of them writes after the caller has cleaned up) and raise its error."""
        try:
            if label is None:
                return tuple(dask.compute(*tasks, scheduler=dask.threaded.get, pool=self.pool))
            with _TaskProgress(self.progress, label):
                return tuple(dask.compute(*tasks, scheduler=dask.threaded.get, pool=self.pool))
        except BaseException:
            self.close()
            self.pool = concurrent.futures.ThreadPoolExecutor(self.threads, "rowfold-worker")
            raise

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute and return values, showing progress over the graph's tasks."""
        return list(self._run(tasks, label))

    def persist(self, tasks: Sequence[Any]) -> list[Any]:
        """Compute and keep values in this process (they are plain values already)."""
        values = self._run(tasks, "compute tree nodes")
        return [dask.delayed(value) for value in values]

    def stream(self, tasks: Sequence[Any], label: str) -> Iterator[Any]:
        """Yield values in order, computing at most STREAM_WINDOW at a time."""
        started = time.monotonic()
        for first in range(0, len(tasks), STREAM_WINDOW):
            values = self._run(tasks[first : first + STREAM_WINDOW], None)
            for offset, value in enumerate(values):
                self.progress.show(label, first + offset + 1, len(tasks), started)
                yield value

    def peak_memory_bytes(self) -> int:
        """Peak RSS of this process (the workers are its threads)."""
        return peak_rss_bytes()

    def run_on_workers(self, function: Callable[[], None]) -> None:
        """Call ``function`` once (the workers share this process)."""
        function()


class _TaskProgress(Callback):
    """Dask scheduler callback that reports finished tasks to a :class:`Progress`."""

    def __init__(self, progress: Progress, label: str) -> None:
        super().__init__()
        self.progress, self.label = progress, label
        self.total = self.done = 0
        self.started = self.shown = time.monotonic()

    def _start_state(self, dsk: Any, state: dict[str, Any]) -> None:
        self.total = sum(len(state[key]) for key in ("ready", "waiting", "running", "finished"))

    def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
        self.done += 1
        now = time.monotonic()
        if self.done >= self.total or now - self.shown >= REDRAW_SECONDS:
            self.shown = now
            self.progress.show(self.label, self.done, max(self.total, self.done), self.started)


@dataclass(frozen=True, slots=True)
class Patience:
    """How long the distributed engine waits for each kind of answer, in seconds.

    Attributes
    ----------
    scheduler : float
        For the scheduler: to connect, and for each answer (``cluster.timeout``).
    worker : float
        For the next heartbeat of a worker while the run waits (``cluster.worker_timeout``).
    stall : float
        While no task starts or finishes anywhere (``cluster.stall_timeout``).
    no_worker : float
        While no worker is connected at all (``ROWFOLD_NO_WORKER_TIMEOUT``).
    """

    scheduler: float = 10.0
    worker: float = 60.0
    stall: float = 1800.0
    no_worker: float = NO_WORKER_TIMEOUT

    @classmethod
    def of(cls, spec: ClusterSpec) -> Patience:
        """The patience a job asks for (the no-worker wait from the environment)."""
        return cls(spec.timeout, spec.worker_timeout, spec.stall_timeout, no_worker_timeout())


NOTHING_WRITTEN = "nothing was written (an earlier result is kept)"
# Why distributed cancels a client's futures when its scheduler connection closes.
CONNECTION_LOST = "scheduler-connection-lost"


def _cancel_reasons(exc: BaseException) -> set[str]:
    """The reasons distributed gives for cancelled futures (none for other errors)."""
    groups = getattr(exc, "error_groups", None)
    if groups is not None:
        return {str(group.reason) for group in groups}
    reason = getattr(exc, "reason", None)
    return set() if reason is None else {str(reason)}


class DistributedEngine:
    """Run graphs on a ``distributed.Client``, with every wait bounded.

    While it waits for results it asks the scheduler, each time within
    ``patience.scheduler`` seconds, for its workers (heartbeats, threads) and for the tasks
    they are running, and gives up with :class:`RunError` naming what stopped answering:
    the scheduler (no answer in time, or its connection lost), a worker (no heartbeat for
    ``patience.worker`` s), the cluster as a whole (no task started or finished for
    ``patience.stall`` s), or no worker at all for ``patience.no_worker`` s.

    Parameters
    ----------
    client : distributed.Client
        Connected client.
    progress : Progress
        Where progress goes.
    patience : Patience
        The bounds above.
    """

    def __init__(self, client: Any, progress: Progress, patience: Patience | None = None) -> None:
        self.client = client
        self.progress = progress
        self.patience = patience or Patience()
        self.scheduler_silent = False
        # worker address -> (last heartbeat time the scheduler reported, when we first saw it)
        self._heard: dict[str, tuple[Any, float]] = {}
        self._silent_workers: set[str] = set()
        self._tally_name: str | None = None
        # which scheduler this is and how it was found (the report's provenance)
        self.origin: dict[str, str] = {"how": "client", "address": self.address}

    @property
    def address(self) -> str:
        """The scheduler's address."""
        return str(self.client.scheduler.address)

    def ask(self, what: str, call: Callable[[], Awaitable[Any]]) -> Any:
        """Await ``call()`` on the client's loop within ``patience.scheduler`` seconds.

        ``call`` runs on the loop, where client methods return awaitables.

        Raises
        ------
        RunError
            When the scheduler does not answer in time or its connection is lost.
        """
        from distributed.comm import CommClosedError
        from distributed.utils import sync

        seconds = self.patience.scheduler
        try:
            return sync(self.client.loop, call, callback_timeout=seconds)
        except TimeoutError:
            self.scheduler_silent = True
            raise RunError(
                f"cluster {self.address}: the scheduler has not answered for {seconds:g} s "
                f"(cluster.timeout) while {what}; it may be stopped or overloaded; "
                f"{NOTHING_WRITTEN}"
            ) from None
        except (CommClosedError, OSError, concurrent.futures.CancelledError) as exc:
            raise self._lost(exc) from None

    def _lost(self, exc: BaseException) -> RunError:
        """The error for a scheduler that went away (or cancelled our tasks)."""
        self.scheduler_silent = True
        if _cancel_reasons(exc) - {CONNECTION_LOST} and not isinstance(exc, OSError):
            return RunError(
                f"cluster {self.address}: the scheduler cancelled this run's tasks "
                f"(another client or a restart); {NOTHING_WRITTEN}"
            )
        return RunError(
            f"cluster {self.address}: lost the connection to the scheduler while running "
            f"(it stopped or was killed); {NOTHING_WRITTEN}"
        )

    def run_on_workers(self, function: Callable[[], None]) -> None:
        """Call ``function`` once on every worker, best effort (a lost worker is skipped)."""
        if self.scheduler_silent:
            return
        # a worker known to be silent would hold the call up until cluster.timeout
        answering = [w for w in self._heard if w not in self._silent_workers]
        targets = answering if self._silent_workers else None
        with suppress(RowfoldError, Exception):
            self.ask(
                "running clean-up on the workers",
                lambda: self.client.run(function, workers=targets),
            )

    def _wait(self, futures: list[Any], label: str, before: tuple[int, int] | None) -> None:
        """Wait for futures, showing progress over every task of their graphs.

        ``before`` is the scheduler's (received, finished) count for this client before
        the graph was sent (:mod:`rowfold.tally`); without it, finished futures count.
        """
        if self.progress.stream is None and self.progress.log is None:
            self._wait_for_workers(futures)
            return
        started = time.monotonic()

        def tick() -> None:
            done, total = self._counted(futures, before)
            self.progress.show(label, done, total, started)

        self._wait_for_workers(futures, tick)
        if time.monotonic() - started > 0.05:
            total = self._counted(futures, before)[1]
            self.progress.show(label, total, total, started)

    def _tally(self) -> tuple[int, int] | None:
        """(tasks received, tasks finished) for this client, or None without the plugin."""
        if self._tally_name is None:
            return None
        from rowfold.tally import tally_of

        name, client = self._tally_name, self.client.id
        try:
            counts = self.ask(
                "counting finished tasks",
                lambda: self.client.run_on_scheduler(tally_of, name=name, client=client),
            )
        except RowfoldError:
            raise
        except Exception:
            self._tally_name = None
            return None
        return int(counts[0]), int(counts[1])

    def _counted(self, futures: list[Any], before: tuple[int, int] | None) -> tuple[int, int]:
        """(done, total) tasks of the graph being waited for."""
        now = self._tally() if before is not None else None
        if now is None or before is None or now[0] <= before[0]:
            return sum(future.done() for future in futures), len(futures)
        total = now[0] - before[0]
        return min(now[1] - before[1], total), total

    def install_tally(self) -> None:
        """Install :class:`rowfold.tally.TaskTally` on the scheduler (best effort)."""
        from rowfold.tally import TaskTally

        name = f"rowfold-tally-{self.client.id}"
        try:
            self.ask(
                "installing the task counter",
                lambda: self.client.register_plugin(TaskTally(), name=name),
            )
        except RowfoldError:
            raise
        except Exception:
            return  # e.g. a scheduler that cannot import rowfold: count futures instead
        self._tally_name = name

    def remove_tally(self) -> None:
        """Remove the task counter from the scheduler (best effort)."""
        name, self._tally_name = self._tally_name, None
        if name is not None and not self.scheduler_silent:
            with suppress(Exception):
                self.ask(
                    "removing the task counter",
                    lambda: self.client.unregister_scheduler_plugin(name),
                )

    def _wait_for_workers(self, futures: list[Any], tick: Callable[[], None] | None = None) -> None:
        """Block until the futures finish, watching the cluster between short waits
        (and calling ``tick`` after each, for progress).

        Raises
        ------
        RunError
            When the scheduler or a worker stops answering, nothing progresses for
            ``patience.stall`` s, or no worker is connected for ``patience.no_worker`` s.
        """
        from distributed import wait

        idle_since: float | None = None
        mark: tuple[Any, ...] = ()
        moved = time.monotonic()
        while True:
            try:
                wait(futures, timeout=POLL_SECONDS)
                return
            except TimeoutError:
                pass
            except concurrent.futures.CancelledError as exc:
                raise self._lost(exc) from None
            workers = self._workers()
            running = self._processing()
            now = time.monotonic()
            self._check_heartbeats(workers, now)
            idle_since = None if workers else (idle_since or now)
            if idle_since is not None and now - idle_since >= self.patience.no_worker:
                self.client.cancel(futures)
                raise RunError(
                    f"cluster {self.address}: no Dask worker connected for "
                    f"{self.patience.no_worker:g} s; start workers (or set "
                    f"{NO_WORKER_TIMEOUT_ENV} to wait longer) and run the job again"
                )
            if tick is not None:
                tick()
            now_mark = (running, sum(future.done() for future in futures))
            if now_mark != mark:
                mark, moved = now_mark, now
            elif now - moved >= self.patience.stall:
                raise self._stalled(running)

    def _workers(self) -> dict[str, Any]:
        """Address -> identity of every worker with threads, from the scheduler."""
        identity = self.ask(
            "listing its workers", lambda: self.client.scheduler.identity(n_workers=-1)
        )
        workers = identity.get("workers", {})
        return {addr: info for addr, info in workers.items() if info.get("nthreads")}

    def _processing(self) -> frozenset[tuple[str, str]]:
        """(worker, task) pairs the scheduler has running."""
        processing = self.ask("listing running tasks", self.client.scheduler.processing)
        return frozenset((str(w), str(key)) for w, keys in processing.items() for key in keys)

    def _check_heartbeats(self, workers: dict[str, Any], now: float) -> None:
        """Raise when a worker's last heartbeat has not changed for ``patience.worker`` s."""
        for gone in set(self._heard) - set(workers):
            del self._heard[gone]
        for addr, info in workers.items():
            seen = info.get("last_seen")
            heard = self._heard.get(addr)
            if heard is None or heard[0] != seen:
                self._heard[addr] = (seen, now)
            elif now - heard[1] >= self.patience.worker:
                self._silent_workers.add(addr)
                name = info.get("name")
                named = f" ({name})" if name not in (None, addr) else ""
                raise RunError(
                    f"cluster {self.address}: worker {addr}{named} has sent no heartbeat "
                    f"for {self.patience.worker:g} s (cluster.worker_timeout); it may be "
                    f"stopped or overloaded; {NOTHING_WRITTEN}"
                )

    def _stalled(self, running: frozenset[tuple[str, str]]) -> RunError:
        """The error for a cluster on which nothing moved for ``patience.stall`` s."""
        workers = sorted({worker for worker, _ in running})
        where = f"{len(running)} tasks running on {', '.join(workers)}" if workers else "none"
        return RunError(
            f"cluster {self.address}: no task started or finished for "
            f"{self.patience.stall:g} s (cluster.stall_timeout; still running: {where}); "
            f"{NOTHING_WRITTEN}"
        )

    def _gather(self, futures: list[Any]) -> list[Any]:
        """Gather finished futures; a task whose workers kept dying becomes a RunError."""
        from distributed import KilledWorker

        try:
            values = self.ask(
                "sending results", lambda: self.client.gather(futures, asynchronous=True)
            )
        except KilledWorker as exc:
            raise RunError(
                f"cluster {self.address}: workers died while running one task "
                f"({exc}); check the workers' memory limits and logs"
            ) from None
        return list(values)

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute on the cluster and gather the values."""
        shown = self.progress.stream is not None or self.progress.log is not None
        before = self._tally() if shown else None
        futures = self.client.compute(list(tasks))
        self._wait(futures, label, before)
        return self._gather(futures)

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
            future = pending.popleft()
            self._wait_for_workers([future])
            (value,) = self._gather([future])
            nxt = next(items, None)
            if nxt is not None:
                pending.append(self.client.compute(nxt))
            done += 1
            if time.monotonic() - last > REDRAW_SECONDS:
                self.progress.show(label, done, total, started)
                last = time.monotonic()
            yield value
        self.progress.show(label, done, total, started)

    def peak_memory_bytes(self) -> int:
        """Peak RSS of the client plus every worker process (each counted once)."""
        peaks = self.ask("measuring memory", lambda: self.client.run(_process_peak))
        by_pid = {pid: peak for pid, peak in peaks.values()}
        by_pid[os.getpid()] = peak_rss_bytes()
        return int(sum(by_pid.values()))


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


def no_worker_timeout() -> float:
    """Seconds to wait with no worker connected: ``ROWFOLD_NO_WORKER_TIMEOUT`` or 60.

    Raises
    ------
    RunError
        When the environment variable is not a positive number.
    """
    text = os.environ.get(NO_WORKER_TIMEOUT_ENV)
    if text is None:
        return NO_WORKER_TIMEOUT
    try:
        seconds = float(text)
    except ValueError:
        seconds = -1.0
    if not seconds > 0:
        raise RunError(
            f"{NO_WORKER_TIMEOUT_ENV}={text}: expected a number of seconds > 0; "
            "unset it for the default of 60"
        )
    return seconds


def announce_dashboard(engine: DistributedEngine, progress: Progress) -> None:
    """Print the Dask dashboard link on the progress stream when there is a dashboard.

    Nothing is printed when progress is quiet or the scheduler lacks bokeh (then it has
    no dashboard, only a page saying bokeh is missing).
    """
    if progress.stream is None:
        return
    client = engine.client
    try:
        versions = engine.ask(
            "reporting its versions", lambda: client.get_versions(packages=["bokeh"])
        )
        link = client.dashboard_link if versions["scheduler"]["packages"].get("bokeh") else None
    except (KeyError, OSError):
        link = None
    if link:
        progress.stream.write(f"rowfold: dashboard at {link}\n")
        progress.stream.flush()


# The embedded cluster's HTTP endpoints (Dask always opens one on the scheduler and on each
# worker) listen here: the loopback, on a free port.
LOOPBACK_HTTP = "127.0.0.1:0"
# Without a dashboard they serve only Dask's health check (no cluster pages, no metrics).
HEALTH_ONLY = ["distributed.http.health"]


@contextmanager
def open_engine(spec: ClusterSpec, progress: Progress) -> Iterator[DistributedEngine]:
    """Connect to a Dask cluster (or start one) and yield an engine on it.

    Where the job runs, first match wins: ``cluster.address``; ``cluster.scheduler_file``;
    the caller's active ``distributed.Client`` (used as it is and left open); Dask's own
    configuration (``scheduler-address``, which ``DASK_SCHEDULER_ADDRESS`` sets), said on
    the progress stream and the log; else the embedded cluster, which listens on 127.0.0.1
    only (scheduler, workers, nannies and their HTTP endpoints) and serves Dask's dashboard
    only with ``cluster.dashboard``. The engine's ``origin`` records which (for the report).

    Raises
    ------
    RunError
        When the scheduler cannot be reached within ``cluster.timeout`` seconds, or the
        scheduler file does not appear or names no scheduler.
    """
    with distributed_logs_quiet():
        if spec.address:
            yield from _remote_engine(spec, progress, spec.address, "cluster.address")
        elif spec.scheduler_file:
            address = scheduler_file_address(spec)
            yield from _remote_engine(spec, progress, address, "cluster.scheduler_file")
        elif (client := active_client()) is not None:
            yield from _active_engine(client, spec, progress)
        elif (configured := configured_address()) is not None:
            address, source = configured
            progress.note(f"running on the Dask scheduler at {address} (from {source})")
            yield from _remote_engine(spec, progress, address, source)
        else:
            yield from _embedded_engine(spec, progress)


def active_client() -> Any:
    """The caller's current ``distributed.Client``, or None (distributed not even imported
    means there is none)."""
    if "distributed" not in sys.modules:
        return None
    from distributed import default_client

    try:
        client = default_client()
    except ValueError:
        return None
    return None if client.status in ("closing", "closed") else client


# Largest input (as a dense float matrix) that ``cluster.scheduler: auto`` runs on Dask's
# threaded scheduler in this process rather than on an embedded LocalCluster, whose start
# (distributed's import, the cluster, its client) costs about 1.5 s: more than such a job's
# compute on this machine (benchmarks/startup.py; README, "Running on a cluster").
SMALL_JOB_BYTES = 64 * 2**20


def choose_scheduler(spec: ClusterSpec, input_bytes: int) -> tuple[str, str]:
    """``("threads" | "distributed", why)``: where a job runs for ``cluster.scheduler``.

    ``auto`` picks threads only for a job that would start the embedded cluster (no
    address, scheduler file, active client or configured scheduler; no
    ``cluster.processes: true`` or dashboard asked for) and whose input, counted as a dense
    matrix, is at most :data:`SMALL_JOB_BYTES`; the reason goes into the report.
    """
    if spec.scheduler != "auto":
        return spec.scheduler, f"cluster.scheduler: {spec.scheduler}"
    if spec.address or spec.scheduler_file or active_client() or configured_address():
        return "distributed", "cluster.scheduler: auto, and a Dask scheduler is given"
    if spec.processes or spec.dashboard is not None:
        asked = "cluster.processes: true" if spec.processes else "cluster.dashboard"
        return "distributed", f"cluster.scheduler: auto, and {asked} asks for a LocalCluster"
    size = f"{input_bytes / 2**20:.3g} MiB"
    limit = f"{SMALL_JOB_BYTES // 2**20} MiB"
    if input_bytes > SMALL_JOB_BYTES:
        return "distributed", f"cluster.scheduler: auto, input {size} is above {limit}"
    return "threads", f"cluster.scheduler: auto, input {size} is at most {limit}"


def remote_scheduler(spec: ClusterSpec) -> str | None:
    """The address of a scheduler or worker the job would use on another machine (whose
    workers then do not share this machine's disk), or None when it all runs here.

    Follows :func:`open_engine`'s order; for the active client its workers count too.
    """
    if spec.scheduler == "threads":
        return None
    if spec.address:
        addresses = [spec.address]
    elif spec.scheduler_file:
        addresses = [scheduler_file_address(spec)]
    elif (client := active_client()) is not None:
        workers = client.scheduler_info(n_workers=-1).get("workers", {})
        addresses = [str(client.scheduler.address), *map(str, workers)]
    elif (configured := configured_address()) is not None:
        addresses = [configured[0]]
    else:
        return None
    return next((a for a in addresses if not on_this_machine(a)), None)


def on_this_machine(address: str) -> bool:
    """Whether a Dask address (``tcp://host:port``, ``inproc://...``) is on this machine."""
    if address.startswith("inproc://"):
        return True
    rest = address.split("://", 1)[-1]
    host = rest[1 : rest.find("]")] if rest.startswith("[") else rest.rsplit(":", 1)[0]
    if host in ("", "localhost", "::1") or host.startswith("127."):
        return True
    return host in _own_names()


@functools.cache
def _own_names() -> frozenset[str]:
    """This machine's host names and addresses."""
    import socket

    names = {socket.gethostname(), socket.getfqdn()}
    with suppress(OSError):
        _, aliases, addresses = socket.gethostbyname_ex(socket.gethostname())
        names.update(aliases, addresses)
    return frozenset(names)


def configured_address() -> tuple[str, str] | None:
    """The scheduler address Dask's configuration names, and where it came from."""
    address = dask.config.get("scheduler-address", None)
    if not address:
        return None
    from_env = os.environ.get("DASK_SCHEDULER_ADDRESS") == str(address)
    return str(address), "DASK_SCHEDULER_ADDRESS" if from_env else "dask config scheduler-address"


def scheduler_file_address(spec: ClusterSpec) -> str:
    """The address in ``cluster.scheduler_file``, waiting up to ``cluster.timeout`` seconds
    for a launcher to write it.

    Raises
    ------
    RunError
        When the file does not appear in time, or holds no ``address``.
    """
    path = spec.scheduler_file
    assert path is not None
    deadline = time.monotonic() + spec.timeout
    while not path.exists() and time.monotonic() < deadline:
        time.sleep(0.1)
    where = f"cluster.scheduler_file {path}"
    try:
        address = json.loads(path.read_text(encoding="utf-8")).get("address")
    except FileNotFoundError:
        raise RunError(
            f"{where}: no scheduler file after {spec.timeout:g} s (cluster.timeout); "
            "start the scheduler with --scheduler-file, or check the path"
        ) from None
    except (OSError, ValueError, AttributeError) as exc:
        raise RunError(f"{where}: not a Dask scheduler file ({exc})") from None
    if not isinstance(address, str) or not address:
        raise RunError(f"{where}: names no scheduler address (no 'address' entry)")
    return address


def _remote_engine(
    spec: ClusterSpec, progress: Progress, address: str, source: str
) -> Iterator[DistributedEngine]:
    """An engine on the scheduler at ``address`` (named by ``source`` in errors)."""
    from distributed import Client

    try:
        client = Client(address, timeout=f"{spec.timeout}s")
    except OSError as exc:
        raise RunError(
            f"{source} {address}: cannot connect to the Dask scheduler ({exc}); "
            "check that it is running and reachable"
        ) from None
    engine = DistributedEngine(client, progress, Patience.of(spec))
    engine.origin = {"how": source, "address": engine.address}
    try:
        announce_dashboard(engine, progress)
        engine.install_tally()
        yield engine
    finally:
        engine.remove_tally()
        _close(engine)


def _active_engine(
    client: Any, spec: ClusterSpec, progress: Progress
) -> Iterator[DistributedEngine]:
    """An engine on the caller's own client, which stays open (and its default) after."""
    engine = DistributedEngine(client, progress, Patience.of(spec))
    engine.origin = {"how": "active client", "address": engine.address}
    try:
        engine.install_tally()
        yield engine
    finally:
        engine.remove_tally()


def _embedded_engine(spec: ClusterSpec, progress: Progress) -> Iterator[DistributedEngine]:
    """An engine on the embedded cluster; BLAS limited in its workers (worker threads share
    this process: limited here only while the cluster runs)."""
    from distributed import Client

    with _embedded_cluster(spec) as (cluster, blas), ExitStack() as stack:
        client = Client(cluster)
        engine = DistributedEngine(client, progress, Patience.of(spec))
        engine.origin = {"how": "embedded cluster", "address": engine.address}
        try:
            if spec.processes:
                engine.ask(
                    "limiting BLAS threads", lambda: engine.client.run(limit_blas_threads, blas)
                )
            else:
                stack.enter_context(blas_limited(blas))
            announce_dashboard(engine, progress)
            engine.install_tally()
            yield engine
        finally:
            engine.remove_tally()
            _close(engine)


def _close(engine: DistributedEngine) -> None:
    """Close the client, briefly when the scheduler has stopped answering."""
    seconds = 1.0 if engine.scheduler_silent else engine.patience.scheduler
    with suppress(Exception):
        engine.client.close(timeout=seconds)


@contextmanager
def _embedded_cluster(spec: ClusterSpec) -> Iterator[tuple[Any, int]]:
    """A ``LocalCluster`` on the loopback; yields it and the BLAS threads per worker."""
    from distributed import LocalCluster

    cores = cpu_count()
    workers, threads = local_layout(spec, cores)
    processes = bool(spec.processes)  # None (auto) is decided by the runner; threads here
    config: dict[str, Any] = {
        "distributed.worker.daemon": False,
        "distributed.scheduler.allowed-failures": ALLOWED_FAILURES,
        "logging.distributed": "error",
    }
    if spec.dashboard is None:
        config["distributed.scheduler.http.routes"] = HEALTH_ONLY
        config["distributed.worker.http.routes"] = HEALTH_ONLY
    # processes talk tcp on 127.0.0.1; worker threads talk in-process, and their HTTP
    # endpoints are put on the loopback by _loopback_worker_class
    placement: dict[str, Any] = (
        {"host": "127.0.0.1"} if processes else {"worker_class": _loopback_worker_class()}
    )
    with (
        dask.config.set(config),
        LocalCluster(
            n_workers=workers,
            threads_per_worker=threads,
            processes=processes,
            dashboard_address=spec.dashboard or LOOPBACK_HTTP,
            scheduler_kwargs={"dashboard": spec.dashboard is not None},
            silence_logs=logging.CRITICAL,
            **placement,
        ) as cluster,
    ):
        blas = 1 if processes else max(1, cores // max(1, workers * threads))
        yield cluster, blas


@functools.cache
def _loopback_worker_class() -> type:
    """A ``distributed.Worker`` whose HTTP endpoint listens on 127.0.0.1, never with a
    dashboard (a worker thread's address is in-process, so Dask would bind all interfaces)."""
    from distributed import Worker

    class LoopbackWorker(Worker):
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            kwargs.update(dashboard=False, dashboard_address=LOOPBACK_HTTP)
            super().__init__(*args, **kwargs)

    return LoopbackWorker
