"""Storage backends: what storage needs from a file format, behind one protocol per role.

An input array lives in an HDF5 file (a local path, or a URL read through an fsspec file
object) or a Zarr store (a local folder, a ``.zarr.zip`` or a URL). :class:`InputBackend`
is everything :mod:`.inputs`, :mod:`.csr` and :mod:`.digests` ask of such a format: describe
an array, read a row range (after the missing-chunk check), read the stored chunk bytes a
digest hashes, say which link leaves a name dangling, and open a CSR group's three arrays.
A CSR group is a layout over either backend, not a backend of its own. Results go to a
:class:`ResultStore` (an HDF5 file or a Zarr group) that :class:`.results.ResultWriter`
fills. :func:`backend_for_path` is the one place a path's format is decided.

HDF5 inputs are opened through the per-process handle cache of :mod:`.inputs`
(:func:`~rowfold.storage.inputs.open_dataset`, closed by
:func:`~rowfold.storage.inputs.close_open_inputs`) and read behind its lock.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import AbstractContextManager, contextmanager
from pathlib import Path
from typing import Any, Protocol

import h5py
import numpy as np

from rowfold.storage import layout
from rowfold.storage.chunks import require_hdf5_chunks, require_zarr_chunks
from rowfold.storage.inputs import (
    _HDF5_LOCK,
    HDF5_SUFFIXES,
    ArrayInfo,
    ArrayRef,
    _kept,
    _open_ref,
    _open_zarr,
    hdf5_file,
    open_dataset,
)

# Checks that the chunks of one part of a CSR group covering a range are stored:
# (part, lo, hi, describe) -> None, or InputError.
ChunkCheck = Callable[[str, int, int, Callable[[int, int], str]], None]

# A group's arrays (name -> (shape, dtype string)) and some of its attributes.
GroupMembers = tuple[dict[str, tuple[tuple[int, ...], str]], dict[str, Any]]

# The three arrays of a CSR group (name -> array, sliceable) and their chunk check.
CsrParts = tuple[Mapping[str, Any], ChunkCheck | None]


class StoredChunks(Protocol):
    """The stored chunks of one dense array, as a digest reads them.

    ``shape`` is None when the array has no chunks whose bytes can be read as stored (a
    contiguous HDF5 dataset, a Zarr chunk grid that is not regular).
    """

    shape: tuple[int, ...] | None
    extent: tuple[int, ...]

    def read(self, coords: tuple[int, ...]) -> tuple[bytes, bytes | None]:
        """(header, stored bytes or None when the chunk was never written)."""
        ...


class InputBackend(Protocol):
    """What storage needs from the format of a dense input (and of a CSR group's arrays)."""

    kind: str
    """The format's name in messages: ``HDF5`` or ``Zarr``."""

    def describe(self, ref: ArrayRef) -> ArrayInfo:
        """Shape, dtype and rows per chunk; KeyError when ``ref.name`` does not exist."""
        ...

    def array_names(self, ref: ArrayRef) -> list[str]:
        """Every array in the file or store (for 'dataset not found' messages)."""
        ...

    def broken_link(self, ref: ArrayRef) -> str | None:
        """Describe the link that leaves ``ref.name`` dangling, if one does."""
        ...

    def read(self, ref: ArrayRef, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)``, after the missing-chunk check when ``ref`` asks for it."""
        ...

    def read_all(self, ref: ArrayRef) -> np.ndarray:
        """The whole (small) array."""
        ...

    def read_ends(self, ref: ArrayRef, last: int) -> tuple[int, int]:
        """Entries 0 and ``last`` of a 1-D array (the ends of ``indptr``)."""
        ...

    def group_members(self, ref: ArrayRef, keys: Sequence[str]) -> GroupMembers | None:
        """None when ``ref`` is an array, else the group's arrays (name -> (shape, dtype))
        and its attributes ``keys`` (None when absent)."""
        ...

    def csr_parts(self, ref: ArrayRef) -> AbstractContextManager[CsrParts]:
        """The arrays of the CSR group ``ref``, open for slicing, and their chunk check."""
        ...

    def layout(self, ref: ArrayRef) -> dict[str, Any]:
        """The on-disk layout that the array's stored chunk bytes depend on."""
        ...

    def stored_chunks(self, ref: ArrayRef) -> StoredChunks:
        """The array's stored chunks (for digests)."""
        ...


def _chunk_header(coords: tuple[int, ...]) -> bytes:
    return b"C" + np.asarray(coords, dtype="<i8").tobytes()


# ---------------------------------------------------------------- HDF5 inputs


class _Hdf5Chunks:
    """Stored chunks of an HDF5 dataset, read with ``read_direct_chunk``."""

    def __init__(self, ref: ArrayRef) -> None:
        self.ref = ref
        with _HDF5_LOCK:
            dataset = open_dataset(ref.path, ref.name, ref.storage_options)
            self.extent: tuple[int, ...] = tuple(dataset.shape)
            self.shape: tuple[int, ...] | None = tuple(dataset.chunks) if dataset.chunks else None

    def read(self, coords: tuple[int, ...]) -> tuple[bytes, bytes | None]:
        """(header with the filter mask, stored bytes or None when never allocated)."""
        assert self.shape is not None
        header = _chunk_header(coords)
        offset = tuple(i * c for i, c in zip(coords, self.shape, strict=True))
        with _HDF5_LOCK:
            dataset = open_dataset(self.ref.path, self.ref.name, self.ref.storage_options)
            try:
                mask, data = dataset.id.read_direct_chunk(offset)
            except RuntimeError:  # the chunk's storage was never allocated
                return header, None
        return header + np.asarray([mask], dtype="<u4").tobytes(), bytes(data)


class Hdf5Input:
    """HDF5 inputs: a local file, or a URL through an fsspec file object."""

    kind = "HDF5"

    def describe(self, ref: ArrayRef) -> ArrayInfo:
        """Shape, dtype and rows per chunk of a dataset."""
        from rowfold.errors import InputError

        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            obj = handle.get(ref.name)
            if obj is None:
                raise KeyError(ref.name)
            if not isinstance(obj, h5py.Dataset):
                raise InputError(f"{ref.describe()}: expected a dataset, found a group")
            chunks = obj.chunks
            return ArrayInfo(ref, tuple(obj.shape), obj.dtype.str, chunks[0] if chunks else None)

    def array_names(self, ref: ArrayRef) -> list[str]:
        """Every dataset in the file."""
        names: list[str] = []
        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            handle.visititems(
                lambda name, obj: names.append(name) if isinstance(obj, h5py.Dataset) else None
            )
        return names

    def broken_link(self, ref: ArrayRef) -> str | None:
        """A soft or external link on the way to ``ref.name`` whose target is missing."""
        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            where = ""
            for part in (p for p in ref.name.split("/") if p):
                where = f"{where}/{part}"
                link = handle.get(where, getlink=True)
                dangling = handle.get(where) is None  # ``in`` is true for a dangling link
                if isinstance(link, h5py.SoftLink) and dangling:
                    return f"{where} is a soft link to {link.path}, which does not exist"
                if isinstance(link, h5py.ExternalLink) and dangling:
                    return (
                        f"{where} is an external link to {link.filename}:{link.path}, which "
                        "cannot be opened (is the file missing or moved?)"
                    )
        return None

    def read(self, ref: ArrayRef, start: int, stop: int) -> np.ndarray:
        """Rows of a dataset of the kept handle."""
        with _HDF5_LOCK:
            dataset = open_dataset(ref.path, ref.name, ref.storage_options)
            if ref.checks_chunks:
                signature = _kept(ref.path, ref.storage_options)[0]
                require_hdf5_chunks(dataset, ref.describe(), start, stop, signature)
            return np.asarray(dataset[start:stop])

    def read_all(self, ref: ArrayRef) -> np.ndarray:
        """The whole dataset, opened for this one look."""
        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            return np.asarray(handle[ref.name][...])

    def read_ends(self, ref: ArrayRef, last: int) -> tuple[int, int]:
        """Entries 0 and ``last`` of a 1-D dataset."""
        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            dataset = handle[ref.name]
            return int(dataset[0]), int(dataset[last])

    def group_members(self, ref: ArrayRef, keys: Sequence[str]) -> GroupMembers | None:
        """Describe the object at ``ref.name``: None for a dataset, else the group."""
        with _HDF5_LOCK, hdf5_file(ref.path, ref.storage_options) as handle:
            obj = handle.get(ref.name) if ref.name not in ("", ".", "/") else handle
            if obj is None:
                raise KeyError(ref.name)
            if isinstance(obj, h5py.Dataset):
                return None
            arrays = {
                key: (tuple(value.shape), value.dtype.str)
                for key, value in obj.items()
                if isinstance(value, h5py.Dataset)
            }
            return arrays, {key: obj.attrs.get(key) for key in keys}

    @contextmanager
    def csr_parts(self, ref: ArrayRef) -> Iterator[CsrParts]:
        """The group's datasets of the kept handle, used while holding the HDF5 lock."""
        with _HDF5_LOCK:
            arrays = {
                part: open_dataset(ref.path, ref.part(part).name, ref.storage_options)
                for part in ("data", "indices", "indptr")
            }
            yield arrays, self._check(ref, arrays)

    @staticmethod
    def _check(ref: ArrayRef, arrays: dict[str, Any]) -> ChunkCheck | None:
        """Chunk checks for the parts of a CSR group (the caller holds the HDF5 lock)."""
        if not ref.checks_chunks:
            return None
        signature = _kept(ref.path, ref.storage_options)[0]

        def check(part: str, lo: int, hi: int, describe: Callable[[int, int], str]) -> None:
            where = ref.part(part).describe()
            require_hdf5_chunks(arrays[part], where, lo, hi, signature, describe)

        return check

    def layout(self, ref: ArrayRef) -> dict[str, Any]:
        """dtype, row tail, chunks, filters and fill value of the dataset."""
        with _HDF5_LOCK:
            dataset = open_dataset(ref.path, ref.name, ref.storage_options)
            plist = dataset.id.get_create_plist()
            filters = [list(plist.get_filter(i)[:3]) for i in range(plist.get_nfilters())]
            return {
                "format": "hdf5",
                "dtype": dataset.dtype.str,
                "tail": list(dataset.shape[1:]),
                "chunks": list(dataset.chunks) if dataset.chunks else None,
                "filters": [[int(c), int(f), [int(v) for v in values]] for c, f, values in filters],
                "fill": np.asarray(dataset.fillvalue).tolist(),
            }

    def stored_chunks(self, ref: ArrayRef) -> StoredChunks:
        """The dataset's chunks, read as stored."""
        return _Hdf5Chunks(ref)


# ---------------------------------------------------------------- Zarr inputs


class _ZarrChunks:
    """Stored chunks of a Zarr array: the bytes of each chunk (or shard) object."""

    def __init__(self, ref: ArrayRef) -> None:
        self._array = _open_ref(ref)
        self.extent: tuple[int, ...] = tuple(self._array.shape)
        self.shape: tuple[int, ...] | None = None
        grid = getattr(self._array.metadata, "chunk_grid", None)
        chunk_shape = getattr(grid, "chunk_shape", None)
        if chunk_shape is not None and len(self.extent) > 0:
            self.shape = tuple(int(c) for c in chunk_shape)

    def read(self, coords: tuple[int, ...]) -> tuple[bytes, bytes | None]:
        """(header, the chunk object's bytes or None when it is absent)."""
        from zarr.core.buffer import default_buffer_prototype
        from zarr.core.sync import sync

        array = self._array
        key = array.metadata.encode_chunk_key(coords)
        full = f"{array.path}/{key}" if array.path else key
        buffer = sync(array.store.get(full, prototype=default_buffer_prototype()))
        return _chunk_header(coords), None if buffer is None else buffer.to_bytes()


class ZarrInput:
    """Zarr inputs (formats 2 and 3): a local store, a ``.zarr.zip`` or a URL."""

    kind = "Zarr"

    def describe(self, ref: ArrayRef) -> ArrayInfo:
        """Shape, dtype and rows per chunk of an array."""
        from rowfold.errors import InputError

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # zarr warns about folders it cannot read
            obj = _open_ref(ref)
            if not hasattr(obj, "chunks") or not hasattr(obj, "dtype"):
                raise InputError(f"{ref.describe()}: expected an array, found a group")
            chunks = obj.chunks
            shape, dtype = tuple(obj.shape), np.dtype(obj.dtype).str
        return ArrayInfo(ref, shape, dtype, chunks[0] if chunks else None)

    def array_names(self, ref: ArrayRef) -> list[str]:
        """Every array in the store."""
        names: list[str] = []
        root = _open_zarr(ref.path, ref.storage_options)
        if hasattr(root, "arrays"):
            for name, _ in root.members(max_depth=None):
                if hasattr(root[name], "shape") and not hasattr(root[name], "members"):
                    names.append(name)
        return names

    def broken_link(self, ref: ArrayRef) -> str | None:
        """A symbolic link inside the store (e.g. the array's folder) that points nowhere."""
        folder = Path(ref.path)
        for part in (p for p in ref.name.split("/") if p):
            folder = folder / part
            if folder.is_symlink() and not folder.exists():
                return (
                    f"{part} is a broken symbolic link to {os.readlink(folder)} "
                    "(which does not exist); restore the target"
                )
        return None

    def read(self, ref: ArrayRef, start: int, stop: int) -> np.ndarray:
        """Rows of an array, the store opened for this read."""
        obj = _open_ref(ref)
        if ref.checks_chunks:
            require_zarr_chunks(obj, ref.describe(), start, stop)
        return np.asarray(obj[start:stop])

    def read_all(self, ref: ArrayRef) -> np.ndarray:
        """The whole array."""
        return np.asarray(_open_ref(ref)[...])

    def read_ends(self, ref: ArrayRef, last: int) -> tuple[int, int]:
        """Entries 0 and ``last`` of a 1-D array."""
        array = _open_ref(ref)
        return int(array[0]), int(array[last])

    def group_members(self, ref: ArrayRef, keys: Sequence[str]) -> GroupMembers | None:
        """Describe the object at ``ref.name``: None for an array, else the group."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # zarr warns about folders it cannot read
            obj = _open_ref(ref)
            if not hasattr(obj, "members"):
                return None
            arrays = {
                key: (tuple(value.shape), np.dtype(value.dtype).str)
                for key, value in obj.members()
                if not hasattr(value, "members")
            }
            return arrays, {key: obj.attrs.get(key) for key in keys}

    @contextmanager
    def csr_parts(self, ref: ArrayRef) -> Iterator[CsrParts]:
        """The group itself (its arrays by name) and their chunk check."""
        group = _open_ref(ref)
        yield group, self._check(ref, group)

    @staticmethod
    def _check(ref: ArrayRef, group: Any) -> ChunkCheck | None:
        """Chunk checks for the parts of a CSR group, unless missing chunks are data."""
        if not ref.checks_chunks:
            return None

        def check(part: str, lo: int, hi: int, describe: Callable[[int, int], str]) -> None:
            require_zarr_chunks(group[part], ref.part(part).describe(), lo, hi, describe)

        return check

    def layout(self, ref: ArrayRef) -> dict[str, Any]:
        """The array's metadata without its shape and attributes."""
        array = _open_ref(ref)
        meta = dict(array.metadata.to_dict())
        for volatile in ("shape", "attributes"):
            meta.pop(volatile, None)
        return {"format": "zarr", "tail": list(array.shape[1:]), "metadata": meta}

    def stored_chunks(self, ref: ArrayRef) -> StoredChunks:
        """The array's chunk (or shard) objects, read through the store."""
        return _ZarrChunks(ref)


# ---------------------------------------------------------------- result stores


class ResultStore(Protocol):
    """A result store being written in staging (an HDF5 file or a Zarr group)."""

    def create(
        self,
        name: str,
        shape: tuple[int, ...],
        dtype: Any,
        chunks: tuple[int, ...],
        dims: tuple[str, ...],
    ) -> None:
        """Create an empty array with its dimension names and :func:`layout.array_attrs`."""
        ...

    def write_rows(self, name: str, start: int, block: np.ndarray) -> None:
        """Write ``block`` into rows ``start ..`` of array ``name``."""
        ...

    def read_rows(self, name: str, start: int, stop: int) -> np.ndarray:
        """Read rows of an array written earlier."""
        ...

    def put(self, name: str, array: np.ndarray, dims: tuple[str, ...]) -> None:
        """Write a whole array with its dimension names and :func:`layout.array_attrs`."""
        ...

    def put_labels(self, dimension: str, values: np.ndarray, attrs: dict[str, Any]) -> None:
        """Write text labels (an object array) as the coordinate of ``dimension``."""
        ...

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Set store attributes (each format's own encoding of containers)."""
        ...

    def finish(
        self,
        sizes: Mapping[str, Mapping[str, int]],
        arrays: Mapping[str, tuple[str, ...]],
        labelled: set[str],
    ) -> None:
        """Last touches while open (HDF5: dimension scales)."""
        ...

    def close(self) -> None:
        """Close the store."""
        ...

    def closed(self, target: Path) -> None:
        """Last touches after closing (Zarr: consolidated metadata)."""
        ...


def _hdf5_attr(value: Any) -> Any:
    """An HDF5 attribute value: a list of integers as an integer array, other containers
    as JSON text (HDF5 attributes hold no nested data)."""
    if isinstance(value, list | tuple) and all(
        isinstance(v, int | np.integer) and not isinstance(v, bool) for v in value
    ):
        return np.asarray(value, dtype=np.int64)
    if isinstance(value, dict | list | tuple):
        return layout.to_json_text(value)
    return value


class Hdf5Result:
    """A result store in a new HDF5 file, written behind the HDF5 lock."""

    def __init__(self, target: Path) -> None:
        self._file: Any = h5py.File(target, "x")

    def create(
        self,
        name: str,
        shape: tuple[int, ...],
        dtype: Any,
        chunks: tuple[int, ...],
        dims: tuple[str, ...],
    ) -> None:
        """Create an empty chunked dataset (dimension names come as scales in finish)."""
        with _HDF5_LOCK:
            created = self._file.create_dataset(name, shape=shape, dtype=dtype, chunks=chunks)
            created.attrs.update(layout.array_attrs(name))

    def write_rows(self, name: str, start: int, block: np.ndarray) -> None:
        """Write rows of a dataset."""
        with _HDF5_LOCK:
            self._file[name][start : start + block.shape[0]] = block

    def read_rows(self, name: str, start: int, stop: int) -> np.ndarray:
        """Read rows of a dataset."""
        with _HDF5_LOCK:
            return np.asarray(self._file[name][start:stop])

    def put(self, name: str, array: np.ndarray, dims: tuple[str, ...]) -> None:
        """Write a whole dataset."""
        with _HDF5_LOCK:
            created = self._file.create_dataset(name, data=array)
            created.attrs.update(layout.array_attrs(name))

    def put_labels(self, dimension: str, values: np.ndarray, attrs: dict[str, Any]) -> None:
        """Write variable-length text labels."""
        with _HDF5_LOCK:
            created = self._file.create_dataset(dimension, data=values, dtype=h5py.string_dtype())
            created.attrs.update(attrs)

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Integer lists as arrays, other containers as JSON text."""
        clean = {key: _hdf5_attr(value) for key, value in attrs.items()}
        with _HDF5_LOCK:
            self._file.attrs.update(clean)

    def finish(
        self,
        sizes: Mapping[str, Mapping[str, int]],
        arrays: Mapping[str, tuple[str, ...]],
        labelled: set[str],
    ) -> None:
        """Make and attach the dimension scales."""
        with _HDF5_LOCK:
            layout.attach_scales(self._file, sizes, arrays, labelled)

    def close(self) -> None:
        """Close the file."""
        with _HDF5_LOCK:
            self._file.close()

    def closed(self, target: Path) -> None:
        """Nothing to add after closing."""


class ZarrResult:
    """A result store in a new Zarr group."""

    def __init__(self, target: Path) -> None:
        import zarr

        self._group: Any = zarr.open_group(str(target), mode="w-")

    def create(
        self,
        name: str,
        shape: tuple[int, ...],
        dtype: Any,
        chunks: tuple[int, ...],
        dims: tuple[str, ...],
    ) -> None:
        """Create an empty array with its dimension names."""
        self._group.create_array(
            name,
            shape=shape,
            dtype=dtype,
            chunks=chunks,
            dimension_names=dims,
            attributes=layout.array_attrs(name),
        )

    def write_rows(self, name: str, start: int, block: np.ndarray) -> None:
        """Write rows of an array."""
        self._group[name][start : start + block.shape[0]] = block

    def read_rows(self, name: str, start: int, stop: int) -> np.ndarray:
        """Read rows of an array."""
        return np.asarray(self._group[name][start:stop])

    def put(self, name: str, array: np.ndarray, dims: tuple[str, ...]) -> None:
        """Write a whole array."""
        created = self._group.create_array(
            name,
            shape=array.shape,
            dtype=array.dtype,
            dimension_names=dims,
            attributes=layout.array_attrs(name),
        )
        created[...] = array

    def put_labels(self, dimension: str, values: np.ndarray, attrs: dict[str, Any]) -> None:
        """Write text labels as a string array."""
        created = self._group.create_array(
            dimension, shape=values.shape, dtype=str, dimension_names=[dimension], attributes=attrs
        )
        created[...] = values.astype(str)

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Native JSON values."""
        self._group.attrs.update({key: layout.json_value(v) for key, v in attrs.items()})

    def finish(
        self,
        sizes: Mapping[str, Mapping[str, int]],
        arrays: Mapping[str, tuple[str, ...]],
        labelled: set[str],
    ) -> None:
        """Nothing to add: dimension names were written with each array."""

    def close(self) -> None:
        """Nothing to close: a Zarr group holds no handle."""

    def closed(self, target: Path) -> None:
        """Write the consolidated metadata."""
        layout.consolidate(target)


# ---------------------------------------------------------------- the one choice


class Backend:
    """A format: its input reader and its result store.

    Attributes
    ----------
    name : str
        ``hdf5`` or ``zarr``.
    input : InputBackend
        How its inputs are read.
    result : callable
        Opens a new result store at a path: ``result(target) -> ResultStore``.
    """

    def __init__(self, name: str, reader: InputBackend, result: Callable[[Path], ResultStore]):
        self.name, self.input, self.result = name, reader, result


HDF5 = Backend("hdf5", Hdf5Input(), Hdf5Result)
ZARR = Backend("zarr", ZarrInput(), ZarrResult)


def backend_for_path(path: str | Path) -> Backend:
    """The format of a file, store or URL, from its suffix (``.h5``, ``.hdf5`` and ``.nc``
    are HDF5, anything else Zarr): the one place the format is decided."""
    return HDF5 if Path(str(path)).suffix.lower() in HDF5_SUFFIXES else ZARR


def input_backend(ref: ArrayRef) -> InputBackend:
    """The backend that reads ``ref``."""
    return backend_for_path(ref.path).input


def open_result_store(path: Path, target: Path) -> ResultStore:
    """A new result store for the output ``path`` (format from its suffix) at ``target``."""
    return backend_for_path(path).result(target)


__all__ = [
    "HDF5",
    "ZARR",
    "Backend",
    "ChunkCheck",
    "CsrParts",
    "GroupMembers",
    "Hdf5Input",
    "Hdf5Result",
    "InputBackend",
    "ResultStore",
    "StoredChunks",
    "ZarrInput",
    "ZarrResult",
    "backend_for_path",
    "input_backend",
    "open_result_store",
]
