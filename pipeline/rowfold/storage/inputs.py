"""Dense inputs in HDF5 or Zarr, read by row range.

Tasks receive an :class:`ArrayRef` (a path or URL, a dataset name and any storage options as
JSON text: plain strings) and a row range; the worker opens the file or store itself (see
:mod:`rowfold.storage.locations`).
"""

from __future__ import annotations

import os
import threading
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import h5py
import numpy as np

from rowfold.errors import InputError, InputMissingError
from rowfold.storage import locations
from rowfold.storage.chunks import FILL_VALUE

if TYPE_CHECKING:
    from zarr.core.array_spec import ArrayConfigParams

    from rowfold.storage.backends import InputBackend

HDF5_SUFFIXES = (".h5", ".hdf5", ".nc")  # NetCDF-4 is HDF5
ZARR_SUFFIXES = (".zarr",)

# h5py serialises calls internally, but opening one file from several threads of one
# process at once is safest behind a lock of our own.
_HDF5_LOCK = threading.Lock()

# Read-only HDF5 handles kept open between the row reads of a job. Opening a file costs
# several ms, as much as reading a 65,536 x 64 block from the page cache (measured: 62 block
# reads of a 2 GB file took 0.45 s on one handle and 1.1 to 2.7 s opening the file each time).
# An entry is reopened when the file's inode, size or modification time changes, ignored in a
# forked child, and closed by close_open_inputs(), which the runner calls when a job ends.
_OPEN_INPUTS: dict[str, tuple[tuple[int, ...], Any, dict[str, Any]]] = {}
# the fsspec file objects under the kept handles of HDF5 inputs by URL (closed with them)
_OPEN_RAW: dict[str, Any] = {}

# Zarr arrays rowfold writes store every chunk, also one equal to the fill value (zarr
# leaves those out by default), so that they pass the missing-chunk check when read.
KEEP_EVERY_CHUNK: ArrayConfigParams = {"write_empty_chunks": True}
# Variable-length UTF-8 text in HDF5 (parameter names).
TEXT = h5py.string_dtype("utf-8")


@dataclass(frozen=True, slots=True)
class ArrayRef:
    """A named array inside an HDF5 file or a Zarr store.

    Attributes
    ----------
    path : str
        Absolute path of the file or store, or the URL of a Zarr store.
    name : str
        Dataset path inside it, e.g. ``network/A``.
    missing_chunks : str
        ``"error"``: reading rows whose chunk is absent (Zarr) or never written (HDF5)
        raises InputError; ``"fill_value"``: they read as the fill value
        (``input.missing_chunks``; scratch arrays, which start as zeros).
    storage_options : str
        The file system's options for a URL (``input.storage_options``) as JSON text, ""
        for none. Never written anywhere (stores and reports record only their names).
    """

    path: str
    name: str
    missing_chunks: str = "error"
    storage_options: str = field(default="", repr=False)

    def part(self, name: str) -> ArrayRef:
        """The array ``name`` inside this group (e.g. ``indptr`` of a CSR group)."""
        prefix = "" if self.name in ("", ".", "/") else self.name.rstrip("/") + "/"
        return ArrayRef(self.path, prefix + name, self.missing_chunks, self.storage_options)

    @property
    def checks_chunks(self) -> bool:
        """True when missing chunks are an error (see :mod:`rowfold.storage.chunks`)."""
        return self.missing_chunks != FILL_VALUE

    @property
    def is_hdf5(self) -> bool:
        """True for an HDF5 file, False for a Zarr store."""
        return Path(self.path).suffix.lower() in HDF5_SUFFIXES

    def describe(self) -> str:
        """Return ``file:dataset`` for messages."""
        return f"{Path(self.path).name}:{self.name}"


@dataclass(frozen=True, slots=True)
class ArrayInfo:
    """Shape, dtype and on-disk chunking of an input array.

    Attributes
    ----------
    ref : ArrayRef
        The array described.
    shape : tuple of int
        Its shape.
    dtype : str
        Its numpy dtype string.
    chunk_rows : int or None
        Rows per on-disk chunk, when chunked.
    """

    ref: ArrayRef
    shape: tuple[int, ...]
    dtype: str
    chunk_rows: int | None


def _open_zarr(path: str, options: str = "") -> Any:
    """Open a Zarr store read-only: a local path, a ``.zarr.zip`` or a URL."""
    return locations.open_zarr(path, options)


@contextmanager
def hdf5_file(path: str, options: str = "") -> Iterator[Any]:
    """An HDF5 input opened read-only for one look: a local file (the fast path), or a URL
    through an fsspec file object (each chunk then costs a ranged request)."""
    if not locations.is_url(path):
        with h5py.File(path, "r") as handle:
            yield handle
        return
    raw = locations.open_file(path, options)
    try:
        with h5py.File(raw, "r") as handle:
            yield handle
    finally:
        raw.close()


def _open_ref(ref: ArrayRef) -> Any:
    """The Zarr array or group ``ref`` names, opened read-only."""
    root = _open_zarr(ref.path, ref.storage_options)
    return root[ref.name] if ref.name not in ("", ".", "/") else root


def require_location(ref: ArrayRef) -> None:
    """Raise when nothing is stored at ``ref.path`` (a file, a store or a URL).

    Raises
    ------
    InputMissingError
        When the file or store does not exist.
    InputError
        When a URL's file system cannot be reached (the message names the URL, never a
        storage option's value).
    """
    try:
        found = locations.exists(ref.path, ref.storage_options)
    except Exception as exc:
        raise InputError(
            f"{ref.path}: cannot reach the store ({locations.failure(exc, ref.storage_options)}); "
            "check input.path and input.storage_options"
        ) from None
    if not found:
        what = "store" if locations.is_url(ref.path) else "file"
        raise InputMissingError(f"{ref.path}: input {what} not found (input.path)")


def _backend(ref: ArrayRef) -> InputBackend:
    """The backend reading ``ref`` (:mod:`.backends` builds on this module, hence imported
    here)."""
    from rowfold.storage.backends import input_backend

    return input_backend(ref)


def _list_names(path: str, options: str = "") -> list[str]:
    """List array names in a file, for 'dataset not found' messages."""
    ref = ArrayRef(path, "", storage_options=options)
    return _backend(ref).array_names(ref)


def _missing(ref: ArrayRef) -> InputMissingError:
    link = _broken_link(ref)
    if link:
        return InputMissingError(f"{ref.describe()}: {link}")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # zarr warns about what it cannot read
            present = ", ".join(_list_names(ref.path, ref.storage_options)) or "none"
    except Exception:  # listing is only a courtesy in an error message
        present = "unknown"
    return InputMissingError(
        f"{Path(ref.path).name}: dataset '{ref.name}' not found; datasets present: {present}"
    )


def _broken_link(ref: ArrayRef) -> str | None:
    """Describe the link that leaves ``ref.name`` dangling, if one does."""
    try:
        return _backend(ref).broken_link(ref)
    except Exception:  # a courtesy in an error message
        return None


def describe_array(ref: ArrayRef) -> ArrayInfo:
    """Read the shape, dtype and chunking of an array without reading its data.

    Raises
    ------
    InputMissingError
        When the file or the dataset does not exist.
    InputError
        When the file cannot be read as HDF5 or Zarr.
    """
    require_location(ref)
    backend = _backend(ref)
    try:
        return backend.describe(ref)
    except (InputError, InputMissingError):
        raise
    except KeyError:
        raise _missing(ref) from None
    except Exception as exc:
        reason = locations.failure(exc, ref.storage_options)
        raise InputError(
            f"{ref.path}: cannot open as {backend.kind} ({reason}); "
            "check input.path and input.storage_options"
        ) from None


def read_rows(ref: ArrayRef, start: int, stop: int, purpose: str = "data") -> np.ndarray:
    """Read rows ``[start, stop)`` of an array.

    Parameters
    ----------
    ref : ArrayRef
        The array. An HDF5 file stays open for the job's later reads (see
        :func:`open_dataset`); a Zarr store is opened for each read.
    start, stop : int
        Row range.
    purpose : str
        Recorded in the read log (``ROWFOLD_READ_LOG``): ``data`` or ``digest-rows``.

    Returns
    -------
    numpy.ndarray
        The rows, in the array's own dtype.
    """
    _log_read(ref, start, stop, purpose)
    try:
        return _backend(ref).read(ref, start, stop)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: rows {start}..{stop - 1} cannot be read "
            f"({locations.failure(exc, ref.storage_options)})"
        ) from None


def read_names(ref: ArrayRef) -> list[str]:
    """Read a 1-D array of text (parameter names): HDF5 strings or bytes, Zarr strings.

    Raises
    ------
    InputMissingError
        When the file or the dataset does not exist.
    InputError
        When it is not a 1-D array of text (bytes must be UTF-8).
    """
    info = describe_array(ref)
    if len(info.shape) != 1:
        raise InputError(
            f"{ref.describe()}: parameter names must be a 1-D array of text, found shape "
            f"{list(info.shape)}"
        )
    try:
        values = _backend(ref).read_all(ref)
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: cannot read the parameter names "
            f"({locations.failure(exc, ref.storage_options)})"
        ) from None
    names: list[str] = []
    for value in values.tolist():
        if isinstance(value, bytes):
            try:
                value = value.decode("utf-8")
            except UnicodeDecodeError:
                raise InputError(f"{ref.describe()}: parameter names are not UTF-8 text") from None
        if not isinstance(value, str):
            raise InputError(
                f"{ref.describe()}: parameter names must be text, found {values.dtype}"
            )
        names.append(value)
    return names


def open_dataset(path: str, name: str, options: str = "") -> Any:
    """A dataset of a kept HDF5 input, looked up once per handle (the caller holds the lock);
    ``options`` are the storage options of a URL input."""
    _, handle, datasets = _kept(path, options)
    if name not in datasets:
        datasets[name] = handle[name]
    return datasets[name]


def _kept(path: str, options: str = "") -> tuple[tuple[int, ...], Any, dict[str, Any]]:
    """The kept (signature, handle, datasets) entry of ``path``, opened or reopened (a URL
    through an fsspec file object, kept with the handle)."""
    if locations.is_url(path):
        signature = locations.signature_of(path, options)
    else:
        info = os.stat(path)
        signature = (os.getpid(), info.st_ino, info.st_size, info.st_mtime_ns)
    cached = _OPEN_INPUTS.get(path)
    if cached is not None and cached[0] == signature:
        return cached
    if cached is not None and cached[0][0] == os.getpid():
        _close_kept(path, cached[1])
    if locations.is_url(path):
        raw = _OPEN_RAW[path] = locations.open_file(path, options)
        handle = h5py.File(raw, "r")
    else:
        handle = h5py.File(path, "r")
    entry: tuple[tuple[int, ...], Any, dict[str, Any]] = (signature, handle, {})
    _OPEN_INPUTS[path] = entry
    return entry


def _close_kept(path: str, handle: Any) -> None:
    """Close a kept handle and the file object under it, if any."""
    handle.close()
    raw = _OPEN_RAW.pop(path, None)
    if raw is not None:
        raw.close()


def forget_input(path: str | Path) -> None:
    """Close the kept handle on ``path``, if any (before the file is written)."""
    with _HDF5_LOCK:
        cached = _OPEN_INPUTS.pop(str(path), None)
        if cached is not None and cached[0][0] == os.getpid():
            _close_kept(str(path), cached[1])
        else:
            _OPEN_RAW.pop(str(path), None)


def close_open_inputs() -> None:
    """Close every kept input handle of this process (at the end of a job)."""
    for path in list(_OPEN_INPUTS):
        forget_input(path)
    locations.close_zips()


def _log_read(ref: ArrayRef, start: int, stop: int, purpose: str) -> None:
    """Append a line to the read log named by ``ROWFOLD_READ_LOG``, when set (for tests and
    audits: it shows exactly which rows a job read)."""
    log = os.environ.get("ROWFOLD_READ_LOG")
    if log:
        with open(log, "a", encoding="utf-8") as handle:
            handle.write(f"{purpose}\t{ref.path}\t{ref.name}\t{start}\t{stop}\n")


def write_arrays(path: str | Path, arrays: dict[str, np.ndarray], chunk_rows: int = 16384) -> None:
    """Write arrays into a new HDF5 file or Zarr store (for demo data and tests).

    Parameters
    ----------
    path : str or Path
        Destination; ``.h5``/``.hdf5`` or ``.zarr`` decides the format. Replaced if present.
    arrays : dict
        Dataset name -> array.
    chunk_rows : int
        Rows per on-disk chunk, whatever the length (so the chunks of rows already written
        keep their stored bytes when the arrays are written again with more rows, which
        ``update`` relies on); HDF5 datasets are growable (``maxshape`` None).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    if target.suffix.lower() in HDF5_SUFFIXES:
        forget_input(target)
        with _HDF5_LOCK, h5py.File(target, "w") as handle:
            for name, array in arrays.items():
                if array.dtype.kind in "UO":  # text, e.g. parameter names
                    handle.create_dataset(name, data=array.astype(object), dtype=TEXT)
                    continue
                if array.ndim == 0 or not all(array.shape[1:]):
                    handle.create_dataset(name, data=array)
                    continue
                tail = array.shape[1:]
                handle.create_dataset(
                    name, data=array, chunks=(chunk_rows, *tail), maxshape=(None, *tail)
                )
        return
    import zarr

    group = zarr.open_group(str(target), mode="w")
    for name, array in arrays.items():
        created = group.create_array(
            name,
            shape=array.shape,
            dtype=str if array.dtype.kind in "UO" else array.dtype,
            chunks=(chunk_rows, *array.shape[1:]),
            config=KEEP_EVERY_CHUNK,
        )
        created[...] = array
