"""Results on object stores (any fsspec URL but a local path): a commit by pointer.

An object store has no atomic rename, so a result is never written where readers look for
it. For ``output.path: s3://bucket/results/levelling.zarr`` a run first commits the whole
result locally (store and reports, :class:`rowfold.storage.ResultWriter` in a private
temporary folder), then

1. uploads it under a fresh prefix named by its commit id,
   ``s3://bucket/results/levelling.zarr.commits/<commit>/`` (``levelling.zarr``,
   ``levelling.report.json``, ``levelling.report.html``);
2. writes the pointer object ``s3://bucket/results/levelling.zarr.current.json`` (one small
   PUT, which object stores apply whole): the commit id and the URLs of the three parts.
   This is the commit point;
3. removes every other prefix under ``.commits/`` (earlier results, and uploads of runs
   killed before their commit point).

Readers follow the pointer (:func:`current`). A run killed at any moment before step 2
leaves the pointer, and the result it names, as they were; one killed after it leaves the
new result current and an old prefix that the next run removes.

``update``, ``replace`` and ``retire`` first fetch the current result's store (its small
arrays and segment factors; the chunks of its row arrays are not needed and not fetched,
:func:`fetch_store`) into the private folder, change it there as they change a local result,
and publish it the same way. Right before step 2 every writer reads the pointer again and
refuses (:class:`PointerMovedError`, exit 2) when it no longer names the commit the writer
started from: another writer got there first. That narrows the race between two writers but
does not close it (there is no lock across machines): two writers whose checks both pass
before either writes its pointer each leave a whole result, and the pointer names the one
whose step 2 came last.

The private folders (``$TMPDIR/rowfold-publish-*``, :func:`private_folder`) carry a marker
with the host and process id that made them; a folder that a killed run left behind is
removed by the next run on the same host once that process is no longer alive.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from rowfold import testhooks
from rowfold.errors import OutputError
from rowfold.storage import locations
from rowfold.storage.results import ROW_ARRAYS

POINTER_SUFFIX = ".current.json"
COMMITS_SUFFIX = ".commits"
FOLDER_PREFIX = "rowfold-publish-"
OWNER_MARK = "rowfold-owner.json"  # in each private folder: host and pid of its process
# arrays of a result whose chunks update, replace and retire never read (one row per input row)
UNFETCHED = tuple(name for name in ROW_ARRAYS if "/" not in name)


class PointerMovedError(OutputError):
    """The pointer changed between reading it and writing it: another writer committed."""


def pointer_url(url: str) -> str:
    """The pointer object of the result at ``url``."""
    return url + POINTER_SUFFIX


def commit_prefix(url: str, commit: str) -> str:
    """Where the parts of commit ``commit`` of the result at ``url`` are uploaded."""
    return f"{url}{COMMITS_SUFFIX}/{commit}"


def _fs(url: str, options: str) -> tuple[Any, str]:
    """The file system and path of ``url``, with its listing cache dropped (file system
    instances are shared within a process, and another process may have written since)."""
    import fsspec

    fs, root = fsspec.core.url_to_fs(url, **locations.options_of(options))
    fs.invalidate_cache()
    return fs, str(root)


def current(url: str, options: str = "") -> dict[str, Any] | None:
    """The pointer of the result at ``url``: commit id and part URLs (None when none)."""
    fs, root = _fs(pointer_url(url), options)
    if not fs.exists(root):
        return None
    record: dict[str, Any] = json.loads(fs.cat_file(root).decode("utf-8"))
    return record


def commit_of(pointer: dict[str, Any] | None) -> str | None:
    """The commit id a pointer names (None for no pointer)."""
    return None if pointer is None else str(pointer.get("rowfold_commit"))


def publish(
    url: str, options: str, commit: str, parts: list[Path], expected: str | None
) -> dict[str, Any]:
    """Upload locally committed ``parts`` (the store first, then the reports) under a fresh
    prefix, switch the pointer to them, and remove the other prefixes.

    ``expected`` is the commit the pointer named when the writer read it (None: there was
    none); the pointer is written only if it still names that commit.

    Raises
    ------
    PointerMovedError
        When the pointer no longer names ``expected`` (the upload is removed again).
    OutputError
        When the store cannot be written (the message names the URL, never an option's
        value); the previous result is then untouched.
    """
    prefix = commit_prefix(url, commit)
    try:
        fs, root = _fs(prefix, options)
        for part in parts:
            target = f"{root}/{part.name}"
            if part.is_dir():
                fs.put(str(part), target, recursive=True)
            else:
                fs.put_file(str(part), target)
            testhooks.reached(f"publish:upload:{part.name}")
        record = {
            "rowfold_commit": commit,
            "parts": {part.name: f"{prefix}/{part.name}" for part in parts},
            "store": f"{prefix}/{parts[0].name}",
        }
        testhooks.reached("publish:uploaded")
        _check_unmoved(url, options, commit, expected)
        pointer_fs, pointer_root = _fs(pointer_url(url), options)
        pointer_fs.pipe_file(pointer_root, json.dumps(record, sort_keys=True).encode("utf-8"))
        testhooks.reached("publish:pointer")
    except OutputError:
        raise
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot write the result ({locations.failure(exc, options)}); "
            "check output.path and output.storage_options (the previous result is unchanged)"
        ) from None
    remove_stale(url, options, keep=commit)
    return record


def _check_unmoved(url: str, options: str, commit: str, expected: str | None) -> None:
    """Refuse when the pointer no longer names ``expected`` (and remove this upload)."""
    found = commit_of(current(url, options))
    if found == expected:
        return
    _remove_quietly(commit_prefix(url, commit), options)
    was = f"commit {expected}" if expected else "no result"
    now = f"commit {found}" if found else "no result"
    raise PointerMovedError(
        f"{url}: another writer committed while this one ran (the pointer named {was}, now "
        f"{now}); this result was not published; run it again on the current result"
    )


def _remove_quietly(url: str, options: str) -> None:
    """Remove ``url`` recursively; leave it (garbage, never a wrong result) on failure."""
    try:
        fs, root = _fs(url, options)
        if fs.exists(root):
            fs.rm(root, recursive=True)
    except Exception:  # the next run's clean-up removes it
        return


def fetch_store(pointer: dict[str, Any], options: str, target: Path) -> None:
    """Download the store a pointer names into the local folder ``target``, leaving out
    the chunks of the row arrays (:data:`UNFETCHED`; their metadata is fetched).

    Raises
    ------
    OSError, ValueError, ImportError
        When the store cannot be read (the caller words it).
    """
    fs, root = _fs(str(pointer["store"]), options)
    root = root.rstrip("/")
    for name in fs.find(root):
        relative = str(name)[len(root) :].lstrip("/")
        top, _, rest = relative.partition("/")
        if top in UNFETCHED and rest not in ("zarr.json", ".zarray", ".zattrs"):
            continue
        local = target / relative
        local.parent.mkdir(parents=True, exist_ok=True)
        fs.get_file(name, str(local))


def read_part(pointer: dict[str, Any], name: str, options: str = "") -> str | None:
    """The text of the part ``name`` (e.g. the JSON report) a pointer names, None if none."""
    url = pointer.get("parts", {}).get(name)
    if url is None:
        return None
    fs, root = _fs(str(url), options)
    return str(fs.cat_file(root).decode("utf-8"))


@contextmanager
def private_folder() -> Iterator[Path]:
    """A fresh private folder under ``$TMPDIR`` marked with this host and process, removed
    afterwards; first remove the folders that dead processes of this host left behind."""
    base = Path(tempfile.gettempdir())
    remove_abandoned(base)
    folder = Path(tempfile.mkdtemp(prefix=FOLDER_PREFIX, dir=base))
    try:
        owner = {"host": socket.gethostname(), "pid": os.getpid()}
        (folder / OWNER_MARK).write_text(json.dumps(owner), encoding="utf-8")
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def remove_abandoned(base: Path) -> list[Path]:
    """Remove the private folders under ``base`` whose process, on this host, is gone; a
    folder without a readable marker, or of another host, is left alone."""
    removed = []
    for folder in base.glob(FOLDER_PREFIX + "*"):
        try:
            owner = json.loads((folder / OWNER_MARK).read_text(encoding="utf-8"))
            host, pid = str(owner["host"]), int(owner["pid"])
        except (OSError, ValueError, KeyError, TypeError):
            continue
        if host == socket.gethostname() and not _alive(pid):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed


def _alive(pid: int) -> bool:
    """Whether process ``pid`` exists on this host (one of another user counts as alive)."""
    if pid <= 0:
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale(url: str, options: str, keep: str | None) -> None:
    """Remove every uploaded prefix of ``url`` but the commit ``keep`` (after the pointer
    names it); a failure here leaves garbage, never a wrong result, so it is not raised."""
    try:
        fs, root = _fs(f"{url}{COMMITS_SUFFIX}", options)
        if not fs.exists(root):
            return
        for entry in fs.ls(root, detail=False):
            if str(entry).rstrip("/").rpartition("/")[2] != keep:
                fs.rm(entry, recursive=True)
    except Exception:  # clean-up is retried by the next run
        return
