"""Progress of a run: a bar sized to the terminal, or time-stamped lines.

:class:`Progress` receives ``show(stage, done, total, started)`` from the engines of
:mod:`rowfold.cluster` and draws, on a terminal, one ``tqdm`` bar per stage (the job's name,
the stage, tasks done, rows per second and the time left, cut to the terminal's width and
redrawn in place), and otherwise one plain line every ``interval`` seconds and at the end of
each stage, starting with the time in ISO 8601 with its zone. ``log`` (``--log-file``)
receives the plain lines whatever ``stream`` is.

The engines count finished tasks with Dask's public hooks only: a
``dask.callbacks.Callback`` for the threaded scheduler, and a ``SchedulerPlugin``
(:class:`rowfold.tally.TaskTally`) on a distributed scheduler.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, TextIO

# Room a bar needs besides its description: percentage, a bar of 10, counts, times, rate.
BAR_ROOM = 52
# Seconds between redraws of a bar on a terminal.
REDRAW_SECONDS = 0.2


def local_stamp() -> str:
    """The time now, ISO 8601 with the local zone (``2026-12-03T06:10:05+01:00``)."""
    return datetime.now().astimezone().isoformat(timespec="seconds")


def terminal_width(stream: TextIO, default: int = 80) -> int:
    """Columns of the terminal behind ``stream`` (``default`` when it has none)."""
    try:
        return os.get_terminal_size(stream.fileno()).columns or default
    except (OSError, ValueError, AttributeError):
        return default


def per_second(count: float, seconds: float) -> str:
    """``1.23M/s``-style rate of ``count`` things in ``seconds``."""
    rate = count / seconds if seconds > 0 else 0.0
    for size, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if rate >= size:
            return f"{rate / size:.3g}{suffix}"
    return f"{rate:.3g}"


def _clock(seconds: float) -> str:
    minutes, secs = divmod(round(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes:02d}:{secs:02d}"


@dataclass
class Progress:
    """Progress display: a bar per stage on a terminal, plain lines otherwise.

    Parameters
    ----------
    stream : TextIO or None
        Where progress goes (``None``: nowhere, ``--quiet``).
    interval : float
        Seconds between plain lines (not on a terminal, and in ``log``).
    log : TextIO or None
        Also receives the plain lines (``--log-file``).
    """

    stream: TextIO | None = None
    interval: float = 10.0
    log: TextIO | None = None
    job: str = ""
    rows: int = 0
    _bar: Any = field(default=None, repr=False)
    _stage: str = ""
    _last_line: float = 0.0
    _finished: str = ""

    def begin_job(self, name: str, rows: int) -> None:
        """Name the job whose stages follow, and its rows (for rows per second).

        On a terminal the name is printed once, above the bars of its stages.
        """
        self.close()
        self.job, self.rows, self._finished = name, rows, ""
        if self.stream is not None and _is_terminal(self.stream):
            width = terminal_width(self.stream) - 1
            head = f"rowfold: {name}" + (f" ({rows:,} rows)" if rows else "")
            self.stream.write((head if len(head) <= width else head[: width - 1] + "…") + "\n")
            self.stream.flush()

    def show(self, label: str, done: int, total: int, started: float) -> None:
        """Show that ``done`` of ``total`` tasks of stage ``label`` are finished."""
        total = max(total, 1)
        done = min(max(done, 0), total)
        if done >= total:
            if self._finished == f"{label}/{total}":
                return
            self._finished = f"{label}/{total}"
        elapsed = max(time.monotonic() - started, 0.0)
        plain = self._line(label, done, total, elapsed)
        due = done >= total or time.monotonic() - self._last_line >= self.interval
        if due:
            self._last_line = time.monotonic()
            if self.log is not None:
                self.log.write(plain + "\n")
                self.log.flush()
        if self.stream is None:
            return
        if _is_terminal(self.stream):
            self._draw(label, done, total, elapsed)
        elif due:
            self.stream.write(plain + "\n")
            self.stream.flush()

    def note(self, text: str) -> None:
        """Say one thing about the run (e.g. where it runs): ``rowfold: text`` on the
        stream, time-stamped in the log."""
        self.close()
        if self.log is not None:
            self.log.write(f"{local_stamp()} rowfold: {text}\n")
            self.log.flush()
        if self.stream is not None:
            self.stream.write(f"rowfold: {text}\n")
            self.stream.flush()

    def close(self) -> None:
        """End the bar on screen, if one is drawn."""
        if self._bar is not None:
            self._bar.close()
            self._bar, self._stage = None, ""

    def _title(self, label: str) -> str:
        return f"{self.job}: {label}" if self.job else label

    def _line(self, label: str, done: int, total: int, elapsed: float) -> str:
        """One plain progress line, time-stamped."""
        fraction = done / total
        text = f"{local_stamp()} {self._title(label)}: {fraction:.0%} ({done}/{total} tasks)"
        text += f", {elapsed:.1f}s"
        if self.rows:
            text += f", {per_second(self.rows * fraction, elapsed)} rows/s"
        if 0 < done < total:
            text += f", about {_clock(elapsed * (total - done) / done)} left"
        return text

    def _draw(self, label: str, done: int, total: int, elapsed: float) -> None:
        """Draw (or move) the terminal bar of this stage."""
        assert self.stream is not None
        if self._bar is None or self._stage != f"{label}/{total}":
            self.close()
            self._bar = self._new_bar(label, total)
            self._stage = f"{label}/{total}"
        bar = self._bar
        if self.rows:
            rate = per_second(self.rows * done / total, elapsed)
            bar.set_postfix_str(f"{rate} rows/s", refresh=False)
        bar.update(done - bar.n)
        if done >= total:
            self.close()

    def _new_bar(self, label: str, total: int) -> Any:
        from tqdm import tqdm

        assert self.stream is not None
        width = terminal_width(self.stream) - 1
        title = label  # the job's name is on the line above (begin_job)
        room = max(width - BAR_ROOM, 12)
        if len(title) > room:
            title = title[: room - 1] + "…"
        return tqdm(
            total=total,
            desc=title,
            file=self.stream,
            ncols=width,
            unit="task",
            mininterval=REDRAW_SECONDS,
            leave=True,
            dynamic_ncols=False,
            ascii=False,
            bar_format="{desc} {percentage:3.0f}%|{bar}| {n}/{total} {elapsed}<{remaining}"
            "{postfix}",
        )


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
