"""One run per output at a time, and SIGINT/SIGTERM that stop a run cleanly.

Every test here starts real ``python -m rowfold`` processes. They meet at known points
through the test hook (``ROWFOLD_TEST_HOOK``, :mod:`rowfold.testhooks`): a process pauses
there and announces it by creating a file, so nothing depends on timing. README,
"Operating rowfold nightly": a second run to a held output exits 2 naming the holder, or
waits with ``--wait-lock``; a signal gives exit 128 + its number with one line on stderr,
and removes the staging area, the scratch folder and the lock.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from rowfold.storage import describe_path, report_paths, write_arrays

HOOK = "ROWFOLD_TEST_HOOK"
NOTHING = "nothing was written, the previous result is kept"
READY = "ROWFOLD_TEST_HOOK_READY"


def write_job(folder: Path, suffix: str = ".h5", rows: int = 2000, q: bool = True) -> Path:
    rng = np.random.default_rng(5)
    A = rng.standard_normal((rows, 6))
    write_arrays(folder / "in.h5", {"A": A, "b": A @ np.ones(6)}, chunk_rows=250)
    job = {
        "input": {"path": "in.h5", "matrix": "A", "rhs": "b", "rows_per_block": 500},
        "method": {"name": "tsqr"},
        "output": {"path": f"out{suffix}", "overwrite": True, "q": q},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def start(folder: Path, *args: str, hook: str = "", ready: Path | None = None) -> Any:
    env = {k: v for k, v in os.environ.items() if k not in (HOOK, READY)}
    if hook:
        env[HOOK] = hook
    if ready is not None:
        env[READY] = str(ready)
    return subprocess.Popen(
        [sys.executable, "-m", "rowfold", "--quiet", *args],
        cwd=folder,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )


def wait_for(marker: Path, proc: Any, limit: float = 120.0) -> None:
    """Wait until ``proc`` has reached its hook point (it creates ``marker``)."""
    deadline = time.monotonic() + limit
    while not marker.exists():
        if proc.poll() is not None:
            raise AssertionError(f"ended ({proc.returncode}) first: {proc.stderr.read()}")
        if time.monotonic() > deadline:
            raise AssertionError(f"{marker.name} did not appear")
        time.sleep(0.02)


def finish(proc: Any, timeout: float = 120.0) -> tuple[int, list[str]]:
    try:
        _, err = proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(30)
    return proc.returncode, err.strip().splitlines()


def consistent(out: Path) -> str:
    """The store's commit id, after checking both reports name the same one."""
    commit = describe_path(out)["attrs"]["rowfold_commit"]
    json_path, html_path = report_paths(out)
    assert json.loads(json_path.read_text())["commit"] == commit
    assert commit in html_path.read_text()
    return str(commit)


def digest(path: Path) -> str:
    sha = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for item in files:
        sha.update(item.read_bytes())
    return sha.hexdigest()


def ours(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".rowfold-"))


# ---------------------------------------------------------------- the output lock


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_second_run_is_refused_naming_the_holder_or_waits(tmp_path: Path, suffix: str) -> None:
    """A holds the output (paused after creating its staged store). B exits 2 at once with
    one line naming A; C with --wait-lock waits (it announces finding the lock busy), and
    once A is let go both finish, and the output is C's result, whole."""
    job = write_job(tmp_path, suffix)
    out = tmp_path / f"out{suffix}"
    held = tmp_path / "a-paused"
    a = start(tmp_path, "run", str(job), "--inline", hook="writer:staged=pause", ready=held)
    try:
        wait_for(held, a)
        status, err = finish(start(tmp_path, "run", str(job), "--inline"))
        assert status == 2, err
        assert len(err) == 1, err
        line = err[0]
        assert f"pid {a.pid}" in line and socket.gethostname() in line, line
        assert "started " in line and "command: python -m rowfold --quiet run" in line, line
        assert "--wait-lock" in line
        waiting = tmp_path / "c-waiting"
        c = start(
            tmp_path, "run", str(job), "--inline", "--wait-lock", "120",
            hook="lock:busy=mark", ready=waiting,
        )  # fmt: skip
        wait_for(waiting, c)
        held.unlink()  # let A go on
        a_status, a_err = finish(a)
        c_status, c_err = finish(c)
    finally:
        for proc in (a,):
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
    assert (a_status, c_status) == (0, 0), (a_err, c_err)
    consistent(out)
    assert "lock" not in " ".join(ours(tmp_path))
    assert ours(tmp_path) == []


def test_wait_lock_gives_up_after_its_seconds(tmp_path: Path) -> None:
    job = write_job(tmp_path)
    held = tmp_path / "a-paused"
    a = start(tmp_path, "run", str(job), "--inline", hook="writer:staged=pause", ready=held)
    try:
        wait_for(held, a)
        status, err = finish(start(tmp_path, "update", str(job), "--inline", "--wait-lock", "0.3"))
        assert status == 2 and len(err) == 1 and "after waiting 0.3 s" in err[0], err
    finally:
        held.unlink(missing_ok=True)
        finish(a)


# ---------------------------------------------------------------- signals


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_at_start_up_gives_one_line_and_128_plus_signal(tmp_path: Path, signum: int) -> None:
    """Paused before the heavy imports (where a SIGINT used to print a traceback)."""
    job = write_job(tmp_path)
    ready = tmp_path / "started"
    proc = start(tmp_path, "run", str(job), hook="startup=pause", ready=ready)
    wait_for(ready, proc)
    proc.send_signal(signum)
    status, err = finish(proc)
    name = signal.Signals(signum).name
    assert status == 128 + signum, err
    assert err == [
        f"rowfold: interrupted by {name}; nothing was written, the previous result is kept"
    ]
    assert ours(tmp_path) == []


@pytest.mark.parametrize(
    ("engine", "signum"),
    [
        ("--inline", signal.SIGTERM),
        ("--inline", signal.SIGINT),
        ("cluster", signal.SIGTERM),
        ("threads", signal.SIGINT),
    ],
    ids=["inline-SIGTERM", "inline-SIGINT", "cluster-SIGTERM", "threads-SIGINT"],
)
def test_signal_mid_run_cleans_up_and_keeps_the_previous_result(
    tmp_path: Path, engine: str, signum: int
) -> None:
    """Paused after Q rows went into the staged store: the signal removes the staging
    area, scratch and lock, leaves the earlier result byte-identical, says one line (on
    stderr and in the --log-file)."""
    job = write_job(tmp_path, ".zarr")
    out = tmp_path / "out.zarr"
    first = start(tmp_path, "run", str(job), "--inline")
    assert finish(first)[0] == 0
    before = {name: digest(tmp_path / name) for name in ("out.zarr", "out.report.json")}
    ready = tmp_path / "writing"
    engines = {
        "--inline": ["--inline"],
        "cluster": ["--set", "cluster.workers=1"],
        "threads": ["--set", "cluster.scheduler=threads"],
    }
    log = tmp_path / "run.log"
    args = ["--log-file", str(log), "run", str(job), *engines[engine]]
    proc = start(tmp_path, *args, hook="writer:rows=pause", ready=ready)
    wait_for(ready, proc)
    assert any(name.startswith(".rowfold-stage-") for name in ours(tmp_path))
    proc.send_signal(signum)
    status, err = finish(proc)
    name = signal.Signals(signum).name
    assert status == 128 + signum, err
    assert err == [
        f"rowfold: interrupted by {name}; nothing was written, the previous result is kept"
    ]
    assert log.read_text().splitlines()[-1].endswith(err[0]), "the log file misses the line"
    assert {n: digest(tmp_path / n) for n in before} == before
    assert [n for n in ours(tmp_path) if not n.startswith(".rowfold-checkpoints-")] == []
    consistent(out)
    again = start(tmp_path, "run", str(job), "--inline")  # the lock was released
    assert finish(again)[0] == 0


def test_signal_during_the_commit_is_held_until_the_commit_is_complete(tmp_path: Path) -> None:
    """SIGTERM once the journal is written: the commit completes first, then 143."""
    job = write_job(tmp_path)
    out = tmp_path / "out.h5"
    assert finish(start(tmp_path, "run", str(job), "--inline"))[0] == 0
    old = consistent(out)
    ready = tmp_path / "journal"
    proc = start(tmp_path, "run", str(job), "--inline", hook="commit:journal=pause", ready=ready)
    wait_for(ready, proc)
    proc.send_signal(signal.SIGTERM)
    ready.unlink()
    status, err = finish(proc)
    assert status == 143, err
    assert len(err) == 1 and "after committing" in err[0] and "out.h5" in err[0], err
    assert consistent(out) != old
    assert [n for n in ours(tmp_path) if not n.startswith(".rowfold-checkpoints-")] == []
