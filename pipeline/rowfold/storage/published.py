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
new result current and an old prefix that the next run removes. One writer per output is
assumed (there is no lock across machines); two concurrent runs each leave a whole result,
and the pointer names the one whose step 2 came last.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from rowfold import testhooks
from rowfold.errors import OutputError
from rowfold.storage import locations

POINTER_SUFFIX = ".current.json"
COMMITS_SUFFIX = ".commits"


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


def publish(url: str, options: str, commit: str, parts: list[Path]) -> dict[str, Any]:
    """Upload locally committed ``parts`` (the store first, then the reports) under a fresh
    prefix, switch the pointer to them, and remove the other prefixes.

    Raises
    ------
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
        pointer_fs, pointer_root = _fs(pointer_url(url), options)
        pointer_fs.pipe_file(pointer_root, json.dumps(record, sort_keys=True).encode("utf-8"))
        testhooks.reached("publish:pointer")
    except OutputError:
        raise
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot write the result ({exc.__class__.__name__}: {exc}); "
            "check output.path and output.storage_options (the previous result is unchanged)"
        ) from None
    remove_stale(url, options, keep=commit)
    return record


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
