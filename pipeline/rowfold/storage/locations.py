"""Where an input lives: a local file or store, a Zarr zip store, or an fsspec URL.

A location travels as plain text (the path or URL, and the storage options as JSON text), so
a task carries no open handle and no credential object; the worker opens the store itself.
A local path (``/data/obs.zarr``, ``/data/obs.h5``) is the fast path. ``.zarr.zip`` is a
Zarr store inside one zip file, read through zarr's zip store (kept open per process, like
the HDF5 handles, and reopened when the file changes). Any other ``scheme://`` text is an
fsspec URL (``memory://``, ``s3://``, ``gs://``, ...) opened by zarr with the storage options;
credentials may come from those options or from each file system's own environment and
configuration. Values of storage options are never written into a store, a report or a log
(:func:`redacted` keeps only the option names).
"""

from __future__ import annotations

import json
import os
import re
import threading
from collections.abc import Mapping
from typing import Any

URL_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]*)://")
ZIP_SUFFIX = ".zarr.zip"

_ZIP_LOCK = threading.Lock()
# path -> (signature, open read-only zip store)
_OPEN_ZIPS: dict[str, tuple[tuple[int, ...], Any]] = {}


def scheme(location: str) -> str | None:
    """The URL scheme of ``location`` (``s3``, ``memory``, ...), None for a plain path."""
    found = URL_SCHEME.match(location)
    return found.group(1).lower() if found else None


def is_url(location: str) -> bool:
    """Whether ``location`` is a URL (has a scheme) rather than a local path."""
    return scheme(location) is not None


def is_zip(location: str) -> bool:
    """Whether ``location`` names a Zarr zip store (``.zarr.zip``)."""
    return location.lower().endswith(ZIP_SUFFIX)


def options_text(options: Mapping[str, Any] | None) -> str:
    """Storage options as the JSON text an :class:`ArrayRef` carries ("" for none)."""
    return json.dumps(dict(options), sort_keys=True) if options else ""


def options_of(text: str) -> dict[str, Any]:
    """The storage options carried as JSON text."""
    return dict(json.loads(text)) if text else {}


def redacted(options: Mapping[str, Any] | None) -> list[str]:
    """What a store, report or log may record of storage options: their names only."""
    return sorted(str(key) for key in (options or {}))


def failure(exc: BaseException, options: str = "") -> str:
    """An exception as a few words for a one-line message: its class and first line,
    shortened, with every text value of the storage options blanked out (a file system's
    message should never carry one, but a message is no place to find out)."""
    text = str(exc).strip()
    text = text.splitlines()[0][:160] if text else ""
    for value in _texts(options_of(options) if options else {}):
        if len(value) >= 4:
            text = text.replace(value, "***")
    return f"{exc.__class__.__name__}: {text}" if text else exc.__class__.__name__


def _texts(value: Any) -> list[str]:
    """Every text inside a nested value of storage options."""
    if isinstance(value, str):
        return [value]
    if isinstance(value, Mapping):
        return [t for item in value.values() for t in _texts(item)]
    if isinstance(value, list | tuple):
        return [t for item in value for t in _texts(item)]
    return []


def exists(location: str, options: str = "") -> bool:
    """Whether something is stored at ``location``.

    Raises
    ------
    OSError, ValueError, ImportError
        When the file system cannot be reached or is not known (the caller words it).
    """
    if not is_url(location):
        return os.path.exists(location)
    import fsspec

    fs, root = fsspec.core.url_to_fs(location, **options_of(options))
    fs.invalidate_cache()  # instances are shared in a process; another may have written
    return bool(fs.exists(root))


def open_file(url: str, options: str = "") -> Any:
    """A read-only fsspec file object of ``url`` (ranged reads; for HDF5 inputs by URL).

    Raises
    ------
    OSError, ValueError, ImportError
        When the file system cannot be reached or is not known (the caller words it).
    """
    import fsspec

    fs, root = fsspec.core.url_to_fs(url, **options_of(options))
    return fs.open(root, "rb")


def signature_of(url: str, options: str = "") -> tuple[int, ...]:
    """What identifies the stored version of the object at ``url`` for this process: the
    process, the object's size and a digest of its ETag or modification time."""
    import hashlib

    import fsspec

    fs, root = fsspec.core.url_to_fs(url, **options_of(options))
    info = fs.info(root)
    version = str(info.get("ETag") or info.get("LastModified") or info.get("mtime") or "")
    digest = int.from_bytes(hashlib.sha256(version.encode("utf-8")).digest()[:7], "big")
    return (os.getpid(), int(info.get("size") or 0), digest)


def open_zarr(location: str, options: str = "") -> Any:
    """Open a Zarr group or array read-only at a local path, a zip store or a URL."""
    import zarr

    if is_zip(location) and not is_url(location):
        return zarr.open(store=_zip_store(location), mode="r")
    if is_url(location):
        return zarr.open(store=location, mode="r", storage_options=options_of(options))
    return zarr.open(store=location, mode="r")


def _zip_store(path: str) -> Any:
    """The kept read-only zip store of ``path``, opened or reopened when the file changed."""
    from zarr.storage import ZipStore

    info = os.stat(path)
    signature = (os.getpid(), info.st_ino, info.st_size, info.st_mtime_ns)
    with _ZIP_LOCK:
        cached = _OPEN_ZIPS.get(path)
        if cached is not None and cached[0] == signature:
            return cached[1]
        if cached is not None and cached[0][0] == os.getpid():
            cached[1].close()
        store = ZipStore(path, mode="r")
        _OPEN_ZIPS[path] = (signature, store)
        return store


def close_zips() -> None:
    """Close every kept zip store of this process (at the end of a job)."""
    with _ZIP_LOCK:
        for path, (signature, store) in list(_OPEN_ZIPS.items()):
            if signature[0] == os.getpid():
                store.close()
            del _OPEN_ZIPS[path]
