"""Dense inputs in HDF5 or Zarr, read by row range.

Tasks receive an :class:`ArrayRef` (a path and a dataset name, both plain strings) and a row
range; the worker opens the file itself. Nothing here keeps a file open between calls.
"""

from __future__ import annotations

import hashlib
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


def read_rows(ref: ArrayRef, start: int, stop: int) -> np.ndarray:
    """Read rows ``[start, stop)`` of an array.

    Parameters
    ----------
    ref : ArrayRef
        The array; opened here and closed before returning.
    start, stop : int
        Row range.

    Returns
    -------
    numpy.ndarray
        The rows, in the array's own dtype.
    """
    try:
        if ref.is_hdf5:
            with _HDF5_LOCK, h5py.File(ref.path, "r") as handle:
                return np.asarray(handle[ref.name][start:stop])
        root = _open_zarr(ref.path)
        obj = root[ref.name] if ref.name not in ("", ".", "/") else root
        return np.asarray(obj[start:stop])
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: rows {start}..{stop - 1} cannot be read "
            f"({exc.__class__.__name__}: {exc})"
        ) from None


def fingerprint(ref: ArrayRef, shape: tuple[int, ...], sample_rows: int = 1024) -> str:
    """Hash the shape, the first and the last rows of an array.

    Cheap enough to run on every job; enough to notice that an input was replaced.
    """
    digest = hashlib.sha256(repr(tuple(shape)).encode())
    m = shape[0] if shape else 0
    for start, stop in ((0, min(m, sample_rows)), (max(0, m - sample_rows), m)):
        digest.update(np.ascontiguousarray(read_rows(ref, start, stop)).tobytes())
    return "sha256:" + digest.hexdigest()


def write_arrays(path: str | Path, arrays: dict[str, np.ndarray], chunk_rows: int = 16384) -> None:
    """Write arrays into a new HDF5 file or Zarr store (for demo data and tests).

    Parameters
    ----------
    path : str or Path
        Destination; ``.h5``/``.hdf5`` or ``.zarr`` decides the format. Replaced if present.
    arrays : dict
        Dataset name -> array.
    chunk_rows : int
        Rows per on-disk chunk.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    if target.suffix.lower() in HDF5_SUFFIXES:
        with _HDF5_LOCK, h5py.File(target, "w") as handle:
            for name, array in arrays.items():
                rows = max(1, min(chunk_rows, array.shape[0]))
                handle.create_dataset(name, data=array, chunks=(rows, *array.shape[1:]))
        return
    import zarr

    group = zarr.open_group(str(target), mode="w")
    for name, array in arrays.items():
        rows = max(1, min(chunk_rows, array.shape[0]))
        created = group.create_array(
            name, shape=array.shape, dtype=array.dtype, chunks=(rows, *array.shape[1:])
        )
        created[...] = array
