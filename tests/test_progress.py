"""Progress on a real pseudo-terminal at 80 and 120 columns, and as plain lines elsewhere.

A small terminal model (carriage return, line feed, overwrite, CSI sequences skipped) replays
what was written and fails when any character would land past the last column, i.e. when
the terminal would wrap and leave a stray piece behind on the next redraw. Plain lines
start with an ISO 8601 time with its UTC offset (ISO 8601-1:2019, section 5.3.4).
"""

from __future__ import annotations

import fcntl
import io
import os
import pty
import re
import select
import struct
import subprocess
import sys
import termios
import time
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest

from rowfold.progress import Progress
from test_cli import setup_job

CSI = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")
LONG_JOB = "marrowby-fen-levelling-network-nightly-refit-with-a-rather-long-name"
LONG_STAGES = [
    "fingerprint inputs",
    "bcgs2: panel 12 of 40, project onto the earlier panels (second pass)",
    "refine pass 1 (at most 10)",
    "refine pass 2 (at most 10)",
]


def replay(text: str, columns: int) -> list[str]:
    """The screen a terminal of ``columns`` shows after ``text``; fail on any wrap."""
    screen: list[list[str]] = [[]]
    row = col = 0
    for piece in re.split(f"({CSI.pattern}|\r|\n)", text):
        if not piece or CSI.fullmatch(piece):
            continue
        if piece == "\r":
            col = 0
        elif piece == "\n":
            row, col = row + 1, 0
            screen.extend([] for _ in range(row + 1 - len(screen)))
        else:
            end = col + len(piece)
            assert end <= columns, f"wrapped past column {columns}: {piece!r}"
            line = screen[row]
            line.extend(" " for _ in range(end - len(line)))
            line[col:end] = list(piece)
            col = end
    return ["".join(line).rstrip() for line in screen]


def pty_pair(columns: int) -> tuple[int, int]:
    """A pseudo-terminal (master, slave) of ``columns`` x 30."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 30, columns, 0, 0))
    return master, slave


def drain(master: int, until: float = 0.2) -> str:
    """Everything the master side can read now (waiting ``until`` s for more)."""
    out = b""
    while select.select([master], [], [], until)[0]:
        try:
            chunk = os.read(master, 65536)
        except OSError:
            break
        if not chunk:
            break
        out += chunk
    return out.decode("utf-8", "replace")


@pytest.mark.parametrize("columns", [80, 120])
def test_bars_fit_the_terminal_and_finish(columns: int) -> None:
    """Long job names and stage labels never wrap; each stage ends drawn at 100 %."""
    master, slave = pty_pair(columns)
    stream = io.TextIOWrapper(os.fdopen(slave, "wb", buffering=0), encoding="utf-8")
    progress = Progress(stream=stream)
    progress.begin_job(LONG_JOB, 4_000_000)
    text = ""
    for stage in LONG_STAGES:
        started = time.monotonic() - 2.0
        for done in (0, 3, 17, 40, 41):
            progress.show(stage, done, 41, started)
            time.sleep(0.21)
        text += drain(master, 0.05)
    progress.close()
    stream.close()
    text += drain(master)
    os.close(master)
    screen = [line for line in replay(text, columns) if line]
    assert screen[0].startswith("rowfold: marrowby-fen")
    bars = screen[1:]
    assert len(bars) == len(LONG_STAGES), screen
    for stage, line in zip(LONG_STAGES, bars, strict=True):
        assert line.startswith(stage[:10]), line
        assert "100%" in line and "41/41" in line and "rows/s" in line, line


def test_plain_lines_carry_zoned_time_job_stage_and_rate() -> None:
    """Not a terminal: one line per interval and at the end, ISO 8601 with the zone."""
    stream = io.StringIO()
    progress = Progress(stream=stream, interval=0.0)
    progress.begin_job("harlow-gnss", 10_000)
    started = time.monotonic() - 4.0
    progress.show("tsqr: factor row blocks", 5, 20, started)
    progress.show("tsqr: factor row blocks", 20, 20, started)
    lines = stream.getvalue().splitlines()
    assert len(lines) == 2
    for line in lines:
        stamp, rest = line.split(" ", 1)
        assert datetime.fromisoformat(stamp).utcoffset() is not None
        assert rest.startswith("harlow-gnss: tsqr: factor row blocks: ")
    assert "25% (5/20 tasks)" in lines[0] and "left" in lines[0]
    assert "100% (20/20 tasks)" in lines[1] and "rows/s" in lines[1]


def run_in_pty(argv: list[str], columns: int, cwd: Path) -> tuple[int, str]:
    """Run a command with a pseudo-terminal of ``columns`` as its stdout and stderr."""
    master, slave = pty_pair(columns)
    env = {**os.environ, "COLUMNS": str(columns), "TERM": "xterm"}
    proc = subprocess.Popen(argv, stdout=slave, stderr=slave, cwd=cwd, env=env)
    os.close(slave)
    chunks = []
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline:
        text = drain(master, 0.5)
        chunks.append(text)
        if not text and proc.poll() is not None:
            break
    os.close(master)
    return proc.wait(timeout=30), "".join(chunks)


@pytest.mark.slow
@pytest.mark.parametrize("columns", [80, 120])
def test_a_real_run_draws_within_the_terminal(tmp_path: Path, columns: int) -> None:
    """``rowfold run`` on the embedded cluster, in a pseudo-terminal: no line wraps; the
    screen ends with the job's name, its stages at 100 % and the summary."""
    rng = np.random.default_rng(5)
    a = rng.standard_normal((24_000, 6))
    job = setup_job(
        tmp_path,
        a=a,
        b=a @ np.arange(1.0, 7.0) + rng.standard_normal(24_000),
        input={"rows_per_block": 500},
        solve={"refine": True},
        cluster={"scheduler": "distributed"},  # a small job: auto would pick threads
    )
    command = [sys.executable, "-m", "rowfold", "run", str(job)]
    status, text = run_in_pty(command, columns, tmp_path)
    assert status == 0, text
    screen = [line for line in replay(text, columns) if line]
    assert screen[0] == "rowfold: cli-test (24,000 rows)", screen
    factor = [line for line in screen if line.startswith("tsqr: factor row blocks")]
    assert factor and "100%" in factor[-1], screen
    assert any(line.startswith("refine pass 1 (at most") for line in screen), screen
    assert "  wrote " + str(tmp_path / "out.h5") in screen, screen
