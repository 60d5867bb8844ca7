"""Dense inputs in HDF5 or Zarr, read by row range.

Tasks receive an :class:`ArrayRef` (a path and a dataset name, both plain strings) and a row
range; the worker opens the file itself. Nothing here keeps a file open between calls.
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from rowfold.errors import InputError, InputMissingError

HDF5_SUFFIXES = (".h5", ".hdf5")
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


@dataclass(frozen=True, slots=True)
class ArrayRef:
    """A named array inside an HDF5 file or a Zarr store.

    Attributes
    ----------
    path : str
        Absolute path of the file or store.
    name : str
        Dataset path inside it, e.g. ``network/A``.
    """

    path: str
    name: str

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


def _open_zarr(path: str) -> Any:
    import zarr

    return zarr.open(store=path, mode="r")


def _list_names(path: str) -> list[str]:
    """List array names in a file, for 'dataset not found' messages."""
    names: list[str] = []
    if Path(path).suffix.lower() in HDF5_SUFFIXES:
        with _HDF5_LOCK, h5py.File(path, "r") as handle:
            handle.visititems(
                lambda name, obj: names.append(name) if isinstance(obj, h5py.Dataset) else None
            )
        return names
    root = _open_zarr(path)
    if hasattr(root, "arrays"):
        for name, _ in root.members(max_depth=None):
            if hasattr(root[name], "shape") and not hasattr(root[name], "members"):
                names.append(name)
    return names


def _missing(ref: ArrayRef) -> InputMissingError:
    try:
        present = ", ".join(_list_names(ref.path)) or "none"
    except Exception:  # listing is only a courtesy in an error message
        present = "unknown"
    return InputMissingError(
        f"{Path(ref.path).name}: dataset '{ref.name}' not found; datasets present: {present}"
    )


def describe_array(ref: ArrayRef) -> ArrayInfo:
    """Read the shape, dtype and chunking of an array without reading its data.

    Raises
    ------
    InputMissingError
        When the file or the dataset does not exist.
    InputError
        When the file cannot be read as HDF5 or Zarr.
    """
    if not os.path.exists(ref.path):
        raise InputMissingError(f"{ref.path}: input file not found")
    try:
        if ref.is_hdf5:
            return _describe_hdf5(ref)
        return _describe_zarr(ref)
    except (InputError, InputMissingError):
        raise
    except KeyError:
        raise _missing(ref) from None
    except Exception as exc:
        kind = "HDF5" if ref.is_hdf5 else "Zarr"
        raise InputError(
            f"{ref.path}: cannot open as {kind} ({exc.__class__.__name__}: {exc})"
        ) from None


def _describe_hdf5(ref: ArrayRef) -> ArrayInfo:
    with _HDF5_LOCK, h5py.File(ref.path, "r") as handle:
        obj = handle.get(ref.name)
        if obj is None:
            raise KeyError(ref.name)
        if not isinstance(obj, h5py.Dataset):
            raise InputError(f"{ref.describe()}: expected a dataset, found a group")
        chunks = obj.chunks
        return ArrayInfo(ref, tuple(obj.shape), obj.dtype.str, chunks[0] if chunks else None)


def _describe_zarr(ref: ArrayRef) -> ArrayInfo:
    root = _open_zarr(ref.path)
    obj = root[ref.name] if ref.name not in ("", ".", "/") else root
    if not hasattr(obj, "chunks") or not hasattr(obj, "dtype"):
        raise InputError(f"{ref.describe()}: expected an array, found a group")
    chunks = obj.chunks
    return ArrayInfo(ref, tuple(obj.shape), np.dtype(obj.dtype).str, chunks[0] if chunks else None)


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
        if ref.is_hdf5:
            with _HDF5_LOCK:
                return np.asarray(open_dataset(ref.path, ref.name)[start:stop])
        root = _open_zarr(ref.path)
        obj = root[ref.name] if ref.name not in ("", ".", "/") else root
        return np.asarray(obj[start:stop])
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: rows {start}..{stop - 1} cannot be read "
            f"({exc.__class__.__name__}: {exc})"
        ) from None


def open_dataset(path: str, name: str) -> Any:
    """A dataset of a kept HDF5 input, looked up once per handle (the caller holds the lock)."""
    _, handle, datasets = _kept(path)
    if name not in datasets:
        datasets[name] = handle[name]
    return datasets[name]


def _kept(path: str) -> tuple[tuple[int, ...], Any, dict[str, Any]]:
    """The kept (signature, handle, datasets) entry of ``path``, opened or reopened."""
    info = os.stat(path)
    signature = (os.getpid(), info.st_ino, info.st_size, info.st_mtime_ns)
    cached = _OPEN_INPUTS.get(path)
    if cached is not None and cached[0] == signature:
        return cached
    if cached is not None and cached[0][0] == os.getpid():
        cached[1].close()
    entry: tuple[tuple[int, ...], Any, dict[str, Any]] = (signature, h5py.File(path, "r"), {})
    _OPEN_INPUTS[path] = entry
    return entry


def forget_input(path: str | Path) -> None:
    """Close the kept handle on ``path``, if any (before the file is written)."""
    with _HDF5_LOCK:
        cached = _OPEN_INPUTS.pop(str(path), None)
        if cached is not None and cached[0][0] == os.getpid():
            cached[1].close()


def close_open_inputs() -> None:
    """Close every kept input handle of this process (at the end of a job)."""
    for path in list(_OPEN_INPUTS):
        forget_input(path)


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
            name, shape=array.shape, dtype=array.dtype, chunks=(chunk_rows, *array.shape[1:])
        )
        created[...] = array
