"""Fault-injection points for tests (inert unless ``ROWFOLD_TEST_HOOK`` is set).

rowfold calls :func:`reached` at a few named points: ``startup`` (the CLI, before its heavy
imports), ``writer:staged`` (a result store was created under its staging folder),
``writer:rows`` (rows were written into it), ``lock:busy`` (a run found its output held
by another and is waiting, ``--wait-lock``), every step of the commit protocol
(``commit:<step>``, see :mod:`rowfold.storage.commit`) and of publishing a result on an
object store (``publish:upload:<part>``, ``publish:uploaded``, ``publish:pointer``, see
:mod:`rowfold.storage.published`). Only tests set the variable::

    ROWFOLD_TEST_HOOK="commit:journal=exit"     # os._exit(99) right after the journal
    ROWFOLD_TEST_HOOK="writer:rows=pause"       # wait there (see below)
    ROWFOLD_TEST_HOOK="commit:install:out.h5=raise"

Actions: ``exit`` ends the process at once with status 99 (as a kill would: no clean-up),
``raise`` raises :class:`InjectedFaultError`, ``pause`` creates the file named by
``ROWFOLD_TEST_HOOK_READY`` and waits until a test deletes it (at most 120 s), so a test
can signal or race the process at a known point, and ``mark`` only creates that file.
Several entries are separated by commas; each fires the first time its point is reached.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

HOOK_ENV = "ROWFOLD_TEST_HOOK"
READY_ENV = "ROWFOLD_TEST_HOOK_READY"
EXIT_STATUS = 99
PAUSE_LIMIT = 120.0

_fired: set[str] = set()


class InjectedFaultError(RuntimeError):
    """Raised at a hook point whose action is ``raise`` (tests only)."""


def reached(point: str) -> None:
    """Run the action a test attached to ``point``; do nothing otherwise."""
    spec = os.environ.get(HOOK_ENV)
    if not spec:
        return
    for entry in spec.split(","):
        where, _, action = entry.strip().partition("=")
        if where != point or entry in _fired:
            continue
        _fired.add(entry)
        _act(point, action)


def reset() -> None:
    """Let every hook fire again (tests that run several jobs in one process)."""
    _fired.clear()


def _act(point: str, action: str) -> None:
    if action == "exit":
        os._exit(EXIT_STATUS)
    if action == "raise":
        raise InjectedFaultError(f"test hook: fault injected at {point}")
    if action == "pause":
        _pause()
        return
    if action == "mark":
        _mark()
        return
    raise ValueError(f"{HOOK_ENV}: unknown action {action!r} at {point}")


def _mark() -> Path | None:
    ready = os.environ.get(READY_ENV)
    marker = Path(ready) if ready else None
    if marker is not None:
        marker.write_text(str(os.getpid()), encoding="utf-8")
    return marker


def _pause() -> None:
    marker = _mark()
    deadline = time.monotonic() + PAUSE_LIMIT
    while time.monotonic() < deadline and (marker is None or marker.exists()):
        time.sleep(0.02)
