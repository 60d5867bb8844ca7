"""SIGINT and SIGTERM: stop cleanly, never in the middle of a commit.

The CLI installs handlers (:func:`handled`) that turn either signal into
:class:`Interrupted`, raised in the main thread wherever it is. The exception unwinds the
run like any other: the staging folder and scratch arrays are removed, the output lock is
released, the earlier result stays. The CLI then prints one line and exits with
128 + the signal number (130 for SIGINT, 143 for SIGTERM), the shell's convention.

A commit that has passed its commit point must not be abandoned half way, so the storage
layer runs those steps inside :func:`deferred`: a signal that arrives there is held, and
raised (as :class:`Interrupted` with ``committed`` set) once the commit is complete. A
second signal while rowfold is already cleaning up ends the process at once (the commit
protocol makes that safe; the next run recovers).
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import FrameType
from typing import Any

SIGNALS = (signal.SIGINT, signal.SIGTERM)


class Interrupted(KeyboardInterrupt):
    """SIGINT or SIGTERM arrived; raised in the main thread to unwind the run.

    Attributes
    ----------
    signum : int
        The signal received.
    committed : Path or None
        The output whose commit completed before the signal was acted on, if any.
    """

    def __init__(self, signum: int, committed: Path | None = None) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum
        self.committed = committed

    @property
    def name(self) -> str:
        """The signal's name, e.g. ``SIGTERM``."""
        return signal.Signals(self.signum).name

    @property
    def exit_status(self) -> int:
        """128 + the signal number."""
        return 128 + self.signum


class _State:
    installed = False
    stopping = False


def _on_signal(signum: int, frame: FrameType | None) -> None:
    if _State.stopping:
        name = signal.Signals(signum).name
        sys.stderr.write(f"rowfold: second {name}; stopping now without clean-up\n")
        sys.stderr.flush()
        os._exit(128 + signum)
    _State.stopping = True
    raise Interrupted(signum)


@contextmanager
def handled() -> Iterator[None]:
    """Turn SIGINT and SIGTERM into :class:`Interrupted` while the block runs.

    Outside the main thread (where Python cannot install handlers) this does nothing. The
    previous handlers come back afterwards.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {signum: signal.getsignal(signum) for signum in SIGNALS}
    _State.installed, _State.stopping = True, False
    for signum in SIGNALS:
        signal.signal(signum, _on_signal)
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        _State.installed, _State.stopping = False, False


@contextmanager
def deferred(committing: Path) -> Iterator[None]:
    """Hold SIGINT and SIGTERM until the block (a commit of ``committing``) has finished.

    A held signal is acted on afterwards: with :func:`handled` active it raises
    :class:`Interrupted` naming ``committing``; otherwise the previous handler gets it
    (Python's default SIGINT handler raises KeyboardInterrupt, SIGTERM's default ends the
    process). In a thread other than the main one, signals are not delivered there anyway
    and nothing is changed.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    held: list[int] = []

    def hold(signum: int, frame: FrameType | None) -> None:
        held.append(signum)

    previous: dict[int, Any] = {int(signum): signal.getsignal(signum) for signum in SIGNALS}
    for signum in previous:
        signal.signal(signum, hold)
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
    if held:
        _act_on(held[0], previous[held[0]], committing)


def _act_on(signum: int, handler: Any, committing: Path) -> None:
    if handler is _on_signal:
        _State.stopping = True
        raise Interrupted(signum, committed=committing)
    signal.raise_signal(signum)
