"""One writer per output: an exclusive ``flock`` on ``.rowfold-lock-<output name>``.

The lock file sits beside the output and is held (``fcntl.flock``, exclusive) for the whole
run or update; it records who holds it (pid, host, start time, command) so that a second
run can name the holder. The kernel releases the lock when the holder dies, so a lock is
never stale. The holder deletes the file when it is done; a process that locked a file
which was deleted (or replaced) meanwhile notices that the path no longer names its file
and tries again.

Within one process the lock is re-entrant: a nested :func:`output_lock` for an output this
process already holds yields ``False`` and changes nothing.
"""

from __future__ import annotations

import errno
import fcntl
import json
import os
import socket
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from rowfold import testhooks
from rowfold.errors import OutputError

LOCK_PREFIX = ".rowfold-lock-"
POLL_SECONDS = 0.1

_HELD: dict[str, int] = {}  # lock path -> nesting depth, for this process
_HELD_GUARD = threading.Lock()


class OutputBusyError(OutputError):
    """Another rowfold process holds the output (exit 2)."""


def lock_path(output: Path) -> Path:
    """The lock file of an output (in the output's folder, its links resolved)."""
    return Path(os.path.realpath(output.parent)) / f"{LOCK_PREFIX}{output.name}"


@contextmanager
def output_lock(output: Path, wait: float = 0.0) -> Iterator[bool]:
    """Hold the exclusive lock of ``output`` while the block runs.

    Parameters
    ----------
    output : Path
        The result store's path.
    wait : float
        Seconds to wait for another holder to finish; 0 refuses at once.

    Yields
    ------
    bool
        True when this call took the lock, False when this process already held it.

    Raises
    ------
    OutputBusyError
        When another process still holds it after ``wait`` seconds (naming the holder).
    OutputError
        When the lock file cannot be created (e.g. it is a symbolic link).
    """
    key = str(lock_path(output))
    with _HELD_GUARD:
        nested = key in _HELD
        if nested:
            _HELD[key] += 1
    if nested:
        try:
            yield False
        finally:
            with _HELD_GUARD:
                _HELD[key] -= 1
        return
    fd = _acquire(output, Path(key), wait)
    with _HELD_GUARD:
        _HELD[key] = 1
    try:
        yield True
    finally:
        with _HELD_GUARD:
            del _HELD[key]
        _release(Path(key), fd)


def _acquire(output: Path, path: Path, wait: float) -> int:
    deadline = time.monotonic() + max(wait, 0.0)
    while True:
        fd = _open_lock_file(output, path)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            if time.monotonic() >= deadline:
                raise OutputBusyError(_busy_message(output, holder, wait)) from None
            testhooks.reached("lock:busy")
            time.sleep(POLL_SECONDS)
            continue
        if _still_named(fd, path):
            _write_holder(fd)
            return fd
        os.close(fd)  # the file was removed or replaced after we opened it; try again


def _open_lock_file(output: Path, path: Path) -> int:
    flags = os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC
    try:
        return os.open(path, flags, 0o644)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise OutputError(
                f"{output}: the lock file {path.name} is a symbolic link; remove it"
            ) from None
        reason = exc.strerror or str(exc)
        raise OutputError(f"{output}: cannot create the lock file {path} ({reason})") from None


def _still_named(fd: int, path: Path) -> bool:
    try:
        named = os.lstat(path)
    except FileNotFoundError:
        return False
    held = os.fstat(fd)
    return (named.st_dev, named.st_ino) == (held.st_dev, held.st_ino)


def _write_holder(fd: int) -> None:
    holder = {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "command": " ".join([_program(), *sys.argv[1:]])[:300],
    }
    os.ftruncate(fd, 0)
    os.pwrite(fd, (json.dumps(holder) + "\n").encode(), 0)


def _program() -> str:
    name = os.path.basename(sys.argv[0]) if sys.argv and sys.argv[0] else "python"
    return "python -m rowfold" if name == "__main__.py" else name


def _read_holder(fd: int) -> dict[str, object]:
    try:
        data = json.loads(os.pread(fd, 4096, 0).decode("utf-8", "replace"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _busy_message(output: Path, holder: dict[str, object], wait: float) -> str:
    if holder:
        who = (
            f"pid {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}, "
            f"command: {holder.get('command')}"
        )
    else:
        who = "a process that has not yet recorded itself"
    waited = f" after waiting {wait:g} s" if wait > 0 else ""
    return (
        f"{output}: in use by another rowfold run ({who}){waited}; "
        "wait for it to finish, or pass --wait-lock SECONDS to wait"
    )


def _release(path: Path, fd: int) -> None:
    try:
        if _still_named(fd, path):
            path.unlink()
    except OSError:
        pass  # a lock file left behind is harmless: the next holder reuses it
    finally:
        os.close(fd)
