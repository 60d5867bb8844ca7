"""Jobs on a real Dask cluster: a scheduler and worker processes started here on 127.0.0.1.

What is checked, and against what:

- R from a run on the cluster equals numpy's LAPACK R after fixing its signs (with a
  positive diagonal the thin QR is unique: Trefethen & Bau, Numerical Linear Algebra,
  1997, Thm 7.2), to the first-order perturbation bound of R (``bounds.r_factor``, kappa
  u; Sun, BIT 31, 1991); Q has loss of orthogonality O(u) for TSQR (Demmel, Grigori,
  Hoemmen, Langou, SIAM J. Sci. Comput. 34(1), 2012), ``bounds.stable_qr``.
- A worker killed (SIGKILL) in the middle of a run: the scheduler runs its tasks again
  elsewhere and the run still gives that R.
- Every worker killed and none coming back: exit 4, the earlier result stays
  byte-identical (SPEC.md: exit 4 replaces no earlier good result).
- No scheduler at ``cluster.address``: exit 4 with one line that names the address.
- A worker or the scheduler stopped (SIGSTOP) mid-run: exit 4 within the job's
  ``cluster.worker_timeout`` / ``cluster.timeout`` (plus polling), naming what stopped
  answering; a scheduler killed mid-run: exit 4, one line naming it.
- The embedded cluster listens on 127.0.0.1 only and serves no dashboard unless asked.
"""

from __future__ import annotations

import contextlib
import hashlib
import http.client
import importlib.util
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import dask
import numpy as np
import psutil
import pytest
import yaml
from distributed import Client

from rowfold.cli import main
from rowfold.cluster import Progress, no_worker_timeout, open_engine
from rowfold.errors import RunError
from rowfold.spec import ClusterSpec
from rowfold.storage import write_arrays

import bounds
from support import assert_thin_qr, lapack_r, prescribed, read_store, write_job

pytestmark = pytest.mark.slow

# Large enough that a tsqr run over it lasts a few seconds on two single-threaded workers.
BIG_ROWS, BIG_COLS, BIG_BLOCK, BIG_KAPPA = 400_000, 20, 2_000, 1e3
# Upper bounds on waits, so a broken cluster fails the test instead of hanging it.
START_TIMEOUT = 30.0
RUN_TIMEOUT = 120.0


def dask_process(module: str, *args: str, folder: Path) -> subprocess.Popen[bytes]:
    """Start ``python -m distributed.cli.<module>`` with single-threaded BLAS."""
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    return subprocess.Popen(
        [sys.executable, "-m", f"distributed.cli.{module}", *args],
        cwd=folder,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )


def stop(proc: subprocess.Popen[bytes]) -> None:
    """Terminate a process, then kill it if it has not gone within 10 s."""
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)


@dataclass
class Cluster:
    """A scheduler address and the worker processes started for one test."""

    address: str
    folder: Path
    workers: list[subprocess.Popen[bytes]] = field(default_factory=list)

    def client(self) -> Client:
        """A separate client for watching the scheduler (not rowfold's default client)."""
        return Client(self.address, timeout="10s", set_as_default=False)

    def start_workers(self, count: int) -> None:
        """Start ``count`` single-threaded workers without a nanny (a killed one stays dead)."""
        for _ in range(count):
            self.workers.append(
                dask_process(
                    "dask_worker",
                    self.address,
                    "--nthreads=1",
                    "--no-nanny",
                    "--no-dashboard",
                    "--host=127.0.0.1",
                    "--death-timeout=30",
                    f"--local-directory={self.folder}",
                    folder=self.folder,
                )
            )
        with self.client() as client:
            wait_until(lambda: len(client.nthreads()) == count, "workers to connect")


def wait_until(condition: Callable[[], bool], what: str, timeout: float = START_TIMEOUT) -> None:
    """Poll ``condition`` every 50 ms; fail the test when it does not hold in time."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(0.05)


def scheduler_address(info: Path) -> str | None:
    """The address in a scheduler file, or None while it is missing or half written."""
    try:
        return str(json.loads(info.read_text(encoding="utf-8"))["address"])
    except (OSError, ValueError, KeyError):
        return None


@pytest.fixture(scope="module")
def scheduler(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[str, Path]]:
    """One ``dask scheduler`` for the module on a port it picks, dashboard on another.

    The scheduler writes its own address to a file, so no other process can have taken
    the port between choosing and binding it.
    """
    folder = tmp_path_factory.mktemp("scheduler")
    info = folder / "scheduler.json"
    args = ("--host=127.0.0.1", "--port=0", "--dashboard-address=:0", f"--scheduler-file={info}")
    proc = dask_process("dask_scheduler", *args, folder=folder)
    try:
        wait_until(lambda: scheduler_address(info) is not None, "the scheduler")
        assert proc.poll() is None, "the scheduler exited while starting"
        yield str(scheduler_address(info)), folder
    finally:
        stop(proc)


@pytest.fixture(autouse=True)
def patience(monkeypatch: pytest.MonkeyPatch) -> None:
    """A run that loses all its workers unexpectedly fails in 15 s, not the default 60 s."""
    monkeypatch.setenv("ROWFOLD_NO_WORKER_TIMEOUT", "15")


@pytest.fixture
def cluster(scheduler: tuple[str, Path]) -> Iterator[Cluster]:
    """Two fresh workers on the module's scheduler; all stopped after the test."""
    address, folder = scheduler
    cluster = Cluster(address, folder)
    try:
        cluster.start_workers(2)
        yield cluster
    finally:
        for proc in cluster.workers:
            stop(proc)
        with cluster.client() as client:
            wait_until(lambda: not client.nthreads(), "workers to leave")


@dataclass
class BigInput:
    """An input file, LAPACK's sign-normalised R of its matrix, and the matrix's 2-norm."""

    path: Path
    R: np.ndarray
    norm: float


@pytest.fixture(scope="module")
def big_input(tmp_path_factory: pytest.TempPathFactory) -> BigInput:
    """A BIG_ROWS x BIG_COLS input with singular values from 1 to 1/BIG_KAPPA."""
    path = tmp_path_factory.mktemp("big") / "big.h5"
    A = prescribed(BIG_ROWS, BIG_COLS, BIG_KAPPA, seed=11)
    write_arrays(path, {"model/A": A}, chunk_rows=4096)
    return BigInput(path, lapack_r(A), float(np.linalg.norm(A, 2)))


def big_job(folder: Path, source: Path, address: str, **cluster: float) -> Path:
    """A tsqr job over ``source`` in BIG_BLOCK-row blocks on the scheduler at ``address``
    (``cluster`` adds keys to the job's cluster section, e.g. ``timeout=5``)."""
    job = {
        "name": "cluster-test",
        "input": {"path": str(source), "matrix": "model/A", "rows_per_block": BIG_BLOCK},
        "method": {"name": "tsqr"},
        "output": {"path": "out.h5", "overwrite": True},
        "cluster": {"address": address, **cluster},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


class Background:
    """``rowfold.cli.main(argv)`` in a thread, so the test can act on the cluster meanwhile."""

    def __init__(self, argv: list[str]) -> None:
        self.status: int | None = None
        self.thread = threading.Thread(target=self._run, args=(argv,), daemon=True)
        self.thread.start()

    def _run(self, argv: list[str]) -> None:
        self.status = main(argv)

    def running(self) -> bool:
        return self.thread.is_alive()

    def join(self) -> int | None:
        """Wait at most RUN_TIMEOUT; None means the run never ended (a hang)."""
        self.thread.join(RUN_TIMEOUT)
        return None if self.thread.is_alive() else self.status


def wait_for_leaf_tasks(client: Client, run: Background) -> None:
    """Return once a worker is factoring row blocks (tsqr leaf tasks are processing)."""

    def busy() -> bool:
        assert run.running(), "the run ended before the cluster could be disturbed"
        keys = (str(key) for keys in client.processing().values() for key in keys)
        return any("leaf" in key for key in keys)

    wait_until(busy, "tsqr leaf tasks to start")


def files(folder: Path) -> dict[str, str]:
    """Name -> sha256 of the visible files directly in ``folder`` (results and reports)."""
    return {
        path.name: hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(folder.iterdir())
        if path.is_file() and not path.name.startswith(".")
    }


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_remote_scheduler_matches_lapack(
    cluster: Cluster, tmp_path: Path, capsys: pytest.CaptureFixture[str], method: str
) -> None:
    """R (and Q for tsqr) computed by `dask worker` processes match LAPACK's."""
    m, n, kappa = 3000, 12, 1e6
    A = prescribed(m, n, kappa, seed=7)
    job = write_job(
        tmp_path,
        A,
        input={"rows_per_block": 250},
        method={"name": method},
        output={"q": method == "tsqr"},
        cluster={"address": cluster.address},
    )
    status = main(["run", str(job)])
    err = capsys.readouterr().err
    assert status == 0, err
    got = read_store(tmp_path / "out.h5")
    # Trefethen & Bau Thm 7.2 (uniqueness) with the R-factor perturbation bound.
    r_error = np.linalg.norm(got["R"] - lapack_r(A)) / np.linalg.norm(A, 2)
    assert r_error <= bounds.r_factor(n, kappa)
    if method == "tsqr":
        assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(n))  # Demmel et al. 2012
    # The dashboard link is printed only when the scheduler can serve a dashboard (bokeh).
    has_dashboard = importlib.util.find_spec("bokeh") is not None
    assert ("rowfold: dashboard at http://" in err) == has_dashboard, err


def test_run_survives_a_killed_worker(
    cluster: Cluster, big_input: BigInput, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """SIGKILL one of two workers mid-run: its tasks run again and R is still LAPACK's."""
    job = big_job(tmp_path, big_input.path, cluster.address)
    victim = cluster.workers[0]
    with cluster.client() as client:
        run = Background(["--quiet", "run", str(job)])
        wait_for_leaf_tasks(client, run)
        time.sleep(0.3)
        assert run.running(), "the run ended before a worker could be killed"
        os.killpg(victim.pid, signal.SIGKILL)
        status = run.join()
    err = capsys.readouterr().err
    assert victim.wait(timeout=10) == -signal.SIGKILL
    assert status == 0, err
    R = read_store(tmp_path / "out.h5")["R"]
    # Trefethen & Bau Thm 7.2 (uniqueness) with the R-factor perturbation bound.
    limit = bounds.r_factor(BIG_COLS, BIG_KAPPA) * big_input.norm
    assert np.linalg.norm(R - big_input.R) <= limit


def test_run_without_workers_fails_and_keeps_earlier_result(
    cluster: Cluster,
    big_input: BigInput,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Every worker killed mid-run: exit 4 naming the scheduler; the earlier result stands."""
    monkeypatch.setenv("ROWFOLD_NO_WORKER_TIMEOUT", "2")
    job = big_job(tmp_path, big_input.path, cluster.address)
    small = tmp_path / "small.h5"
    write_arrays(small, {"model/A": prescribed(500, BIG_COLS, 10.0, seed=3)})
    assert main(["--quiet", "run", str(job), "--set", f"input.path={small}"]) == 0
    before = files(tmp_path)
    assert "out.h5" in before
    with cluster.client() as client:
        run = Background(["--quiet", "run", str(job)])
        wait_for_leaf_tasks(client, run)
        for proc in cluster.workers:
            os.killpg(proc.pid, signal.SIGKILL)
        status = run.join()
    assert status is not None, f"the run did not give up within {RUN_TIMEOUT:g} s"
    err = capsys.readouterr().err
    assert status == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and cluster.address in lines[0], err
    assert files(tmp_path) == before


def test_unreachable_scheduler_exits_4(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Nothing listens at cluster.address: exit 4 with one line naming the address."""
    with socket.socket() as held:  # bound but not listening: connections are refused
        held.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{held.getsockname()[1]}"
        job = write_job(
            tmp_path, prescribed(60, 3, 10.0), cluster={"address": address, "timeout": 2}
        )
        status = main(["run", str(job)])
    err = capsys.readouterr().err
    assert status == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and address in lines[0] and lines[0].startswith("rowfold: "), err
    assert not (tmp_path / "out.h5").exists()


@pytest.mark.parametrize(
    ("text", "seconds"),
    [(None, 60.0), ("2.5", 2.5), ("abc", None), ("0", None), ("-1", None), ("nan", None)],
)
def test_no_worker_timeout_from_environment(
    monkeypatch: pytest.MonkeyPatch, text: str | None, seconds: float | None
) -> None:
    """ROWFOLD_NO_WORKER_TIMEOUT: unset means 60 s; anything but a positive number is refused."""
    if text is None:
        monkeypatch.delenv("ROWFOLD_NO_WORKER_TIMEOUT", raising=False)
    else:
        monkeypatch.setenv("ROWFOLD_NO_WORKER_TIMEOUT", text)
    if seconds is None:
        with pytest.raises(RunError, match=f"ROWFOLD_NO_WORKER_TIMEOUT={text}"):
            no_worker_timeout()
    else:
        assert no_worker_timeout() == seconds


# ---------------------------------------------------------------- stopped and killed processes

# What the tests set in the job: seconds before a silent worker or scheduler fails the run.
SILENCE = 5.0
# Longest the tests wait for such a run to end; beyond it the run counts as hung.
HANG_GUARD = 60.0


def join_within(run: Background, seconds: float) -> tuple[int | None, float]:
    """Wait for the run at most ``seconds``; return its status (None: still running) and
    the seconds waited."""
    started = time.monotonic()
    run.thread.join(seconds)
    waited = time.monotonic() - started
    return (None if run.thread.is_alive() else run.status), waited


def record(case: str, status: int | None, waited: float, err: str) -> None:
    """Show what a run did and how long it took on the terminal (``-s``); not asserted."""
    sys.__stdout__.write(f"\n{case}: exit {status} after {waited:.1f} s: {err.strip()}\n")


def test_stopped_worker_fails_the_run_naming_it(
    cluster: Cluster, big_input: BigInput, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """SIGSTOP one of two workers mid-run: exit 4 once it has been silent for
    cluster.worker_timeout, one line naming that worker; nothing written."""
    job = big_job(tmp_path, big_input.path, cluster.address, worker_timeout=SILENCE)
    victim = cluster.workers[0]
    with cluster.client() as client:
        addresses = {pid: address for address, pid in client.run(os.getpid).items()}
        run = Background(["--quiet", "run", str(job)])
        wait_for_leaf_tasks(client, run)
    os.killpg(victim.pid, signal.SIGSTOP)
    try:
        status, waited = join_within(run, HANG_GUARD)
    finally:
        os.killpg(victim.pid, signal.SIGCONT)
    assert status is not None, f"the run still waited {HANG_GUARD:g} s after the worker stopped"
    err = capsys.readouterr().err
    record("stopped worker", status, waited, err)
    assert status == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and addresses[victim.pid] in lines[0], err
    assert "worker" in lines[0] and "cluster.worker_timeout" in lines[0], err
    assert not (tmp_path / "out.h5").exists()


@pytest.fixture
def own_scheduler(tmp_path: Path) -> Iterator[tuple[str, subprocess.Popen[bytes], Cluster]]:
    """A scheduler for one test (so it can be stopped or killed) with two workers."""
    info = tmp_path / "own-scheduler.json"
    args = ("--host=127.0.0.1", "--port=0", "--no-dashboard", f"--scheduler-file={info}")
    proc = dask_process("dask_scheduler", *args, folder=tmp_path)
    own = Cluster("", tmp_path)
    try:
        wait_until(lambda: scheduler_address(info) is not None, "the scheduler")
        own.address = str(scheduler_address(info))
        own.start_workers(2)
        yield own.address, proc, own
    finally:
        for member in [proc, *own.workers]:
            with contextlib.suppress(ProcessLookupError):  # already gone
                os.killpg(member.pid, signal.SIGCONT)
            stop(member)


def test_stopped_scheduler_fails_the_run_naming_it(
    own_scheduler: tuple[str, subprocess.Popen[bytes], Cluster],
    big_input: BigInput,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """SIGSTOP the scheduler mid-run: exit 4 once it has not answered for cluster.timeout,
    one line naming it; nothing written."""
    address, scheduler_proc, own = own_scheduler
    job = big_job(tmp_path, big_input.path, address, timeout=SILENCE)
    with own.client() as client:
        run = Background(["--quiet", "run", str(job)])
        wait_for_leaf_tasks(client, run)
    os.killpg(scheduler_proc.pid, signal.SIGSTOP)
    status, waited = join_within(run, HANG_GUARD)
    os.killpg(scheduler_proc.pid, signal.SIGCONT)
    assert status is not None, f"the run still waited {HANG_GUARD:g} s after the scheduler stopped"
    err = capsys.readouterr().err
    record("stopped scheduler", status, waited, err)
    assert status == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and address in lines[0] and "scheduler" in lines[0], err
    assert "cluster.timeout" in lines[0], err
    assert not (tmp_path / "out.h5").exists()


def test_killed_scheduler_is_one_line_naming_it(
    own_scheduler: tuple[str, subprocess.Popen[bytes], Cluster],
    big_input: BigInput,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """SIGKILL the scheduler mid-run: exit 4 and one line naming the scheduler and saying
    that nothing was written."""
    address, scheduler_proc, own = own_scheduler
    job = big_job(tmp_path, big_input.path, address, timeout=SILENCE)
    with own.client() as client:
        run = Background(["--quiet", "run", str(job)])
        wait_for_leaf_tasks(client, run)
    os.killpg(scheduler_proc.pid, signal.SIGKILL)
    status, waited = join_within(run, HANG_GUARD)
    assert status is not None, f"the run still waited {HANG_GUARD:g} s after the scheduler died"
    err = capsys.readouterr().err
    record("killed scheduler", status, waited, err)
    assert status == 4, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and address in lines[0], err
    assert "nothing was written" in lines[0] and "Traceback" not in err, err
    assert not (tmp_path / "out.h5").exists()


# ---------------------------------------------------------------- what the embedded cluster opens

LOOPBACK = ("127.0.0.1", "::1")


def listening(pids: set[int]) -> list[tuple[str, int]]:
    """(address, port) of every TCP socket the processes ``pids`` listen on."""
    found = []
    for pid in pids:
        for conn in psutil.Process(pid).net_connections(kind="tcp"):
            if conn.status == psutil.CONN_LISTEN:
                found.append((conn.laddr.ip, conn.laddr.port))
    return found


def http_status(port: int, path: str) -> int:
    """HTTP status of GET ``path`` on 127.0.0.1:port (0 when the port does not speak HTTP,
    e.g. a Dask comm port)."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as answer:
            return int(answer.status)
    except urllib.error.HTTPError as exc:
        return int(exc.code)
    except (urllib.error.URLError, http.client.HTTPException, OSError):
        return 0


def engine_sockets(spec: ClusterSpec) -> tuple[list[str], list[tuple[str, int]], list[int]]:
    """Start the embedded cluster; return its scheduler and worker addresses, the sockets
    it listens on, and the HTTP status of the scheduler's dashboard page on each."""
    before = set(listening({os.getpid()}))  # left by earlier tests in this process
    with open_engine(spec, Progress()) as engine:
        client = engine.client
        pids = {os.getpid(), *client.run(os.getpid).values()}
        sockets = [s for s in listening(pids) if s not in before]
        addresses = [engine.address, *client.scheduler_info()["workers"]]
        pages = [http_status(port, "/status") for ip, port in sockets if ip in LOOPBACK]
    return addresses, sockets, pages


@pytest.mark.parametrize("processes", [False, True], ids=["threads", "processes"])
def test_embedded_cluster_listens_on_loopback_only(processes: bool) -> None:
    """Scheduler, workers and nannies: loopback (or in-process) addresses, every listening
    socket on 127.0.0.1, and no dashboard page by default."""
    spec = ClusterSpec(workers=2, threads_per_worker=1, processes=processes)
    addresses, sockets, pages = engine_sockets(spec)
    assert all(a.startswith(("inproc://", "tcp://127.0.0.1:")) for a in addresses), addresses
    assert sockets and all(ip in LOOPBACK for ip, _ in sockets), sockets
    assert 200 not in pages, (sockets, pages)


def test_embedded_dashboard_only_when_asked() -> None:
    """cluster.dashboard: true serves the dashboard page, on 127.0.0.1."""
    spec = ClusterSpec(workers=1, threads_per_worker=1, processes=False, dashboard="127.0.0.1:0")
    _, sockets, pages = engine_sockets(spec)
    assert all(ip in LOOPBACK for ip, _ in sockets), sockets
    assert 200 in pages, (sockets, pages)


def test_stalled_cluster_fails_naming_the_stall_timeout() -> None:
    """A task that runs on while every worker keeps its heartbeat: RunError once nothing
    has started or finished for cluster.stall_timeout, naming the worker."""
    spec = ClusterSpec(workers=1, threads_per_worker=1, processes=False, stall_timeout=2.0)
    with open_engine(spec, Progress()) as engine, pytest.raises(RunError) as caught:
        engine.compute([dask.delayed(time.sleep)(6)], "sleep")
    message = str(caught.value)
    assert "no task started or finished for 2 s (cluster.stall_timeout" in message, message
    assert "1 tasks running on inproc://" in message and "nothing was written" in message
