"""Arrays of the Python API into and out of stores (:mod:`rowfold.api`).

In: an in-memory matrix (numpy, dask or scipy.sparse) is written into a Zarr store row
block by row block, so that the runner reads it as it reads any input. A dask array is
stored by its own tasks (``dask.array.store``, one row block each), so it is never held
whole anywhere. Out: an array with one row per input row (Q, residuals, ...) of a result
store becomes a dask array that reads its row blocks when computed.

Nothing here knows about ``dask.distributed``; a dask array is stored on whatever scheduler
is active (the caller's client when there is one).
"""

from __future__ import annotations

import uuid
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from rowfold.storage.csr import ENCODING, WRITE_CHUNK, write_csr
from rowfold.storage.inputs import _HDF5_LOCK, HDF5_SUFFIXES, KEEP_EVERY_CHUNK
from rowfold.storage.locations import is_url

# Bytes per stored row block of a staged matrix (common practice: chunks of tens of MB
# keep the per-chunk overhead small and several blocks fit in any worker's memory).
STAGED_BLOCK_BYTES = 32 * 2**20


def staged_rows(shape: tuple[int, ...], itemsize: int) -> int:
    """Rows per stored block for an array of ``shape``: about STAGED_BLOCK_BYTES each."""
    width = int(np.prod(shape[1:], dtype=np.int64)) if len(shape) > 1 else 1
    rows = max(1, STAGED_BLOCK_BYTES // max(1, width * itemsize))
    return int(min(max(shape[0], 1), rows))


def stage_dense(store: Path | str, arrays: dict[str, Any]) -> None:
    """Write numpy or dask arrays (name -> array) into the Zarr store ``store`` (a local
    path or an fsspec URL such as ``memory://...``), in row blocks of :func:`staged_rows`.

    The dask arrays are rechunked to whole rows and stored by their own tasks, each task
    writing one block, in one graph: what they share (``b = A[:, 0] * 2``) is computed once.
    """
    import zarr

    group = zarr.open_group(str(store), mode="a")
    sources: list[Any] = []
    targets: list[Any] = []
    for name, array in arrays.items():
        dtype = np.dtype(array.dtype)
        rows = staged_rows(tuple(array.shape), dtype.itemsize)
        target: Any = group.create_array(
            name,
            shape=tuple(array.shape),
            dtype=dtype,
            chunks=(rows, *array.shape[1:]),
            config=KEEP_EVERY_CHUNK,
        )
        if _is_dask(array):
            whole = {0: rows, **{axis: -1 for axis in range(1, array.ndim)}}
            sources.append(array.rechunk(whole))
            targets.append(target)
            continue
        for start in range(0, array.shape[0], rows):
            target[start : start + rows] = array[start : start + rows]
    if sources:
        import dask.array as da

        da.store(sources, targets, lock=False)


def stage_csr(store: Path | str, name: str, matrix: Any) -> None:
    """Write a scipy.sparse matrix as the CSR group ``name`` of the Zarr store ``store``
    (a local path, or an fsspec URL: then written here in the layout ``write_csr`` uses)."""
    if not is_url(str(store)):
        write_csr(store, name, matrix)
        return
    import scipy.sparse as sp
    import zarr

    csr = sp.csr_array(matrix)
    group = zarr.open_group(str(store), mode="a")
    created = group.require_group(name)
    created.attrs.update({"shape": [int(v) for v in csr.shape], **ENCODING})
    for part in ("data", "indices", "indptr"):
        values = np.asarray(getattr(csr, part))
        target: Any = group.create_array(
            f"{name}/{part}",
            shape=values.shape,
            dtype=values.dtype,
            chunks=(WRITE_CHUNK,),
            config=KEEP_EVERY_CHUNK,
        )
        target[...] = values


def memory_store() -> str:
    """A fresh, unique ``memory://`` URL for a staged store (fsspec's in-process file
    system: readable by this process's threads only)."""
    return f"memory://rowfold-staged-{uuid.uuid4().hex}/input.zarr"


def remove_memory_store(url: str) -> None:
    """Remove a staged ``memory://`` store and everything below it (nothing if absent)."""
    import fsspec

    fs, root = fsspec.core.url_to_fs(url)
    top = root.rsplit("/", 1)[0] if "/" in root.strip("/") else root
    if fs.exists(top):
        fs.rm(top, recursive=True)


def _is_dask(array: Any) -> bool:
    return type(array).__module__.startswith("dask.")


class StoredRows:
    """An array of a result store read by row range on demand (for ``dask.array``).

    Holds a path and a name, never an open file, so it travels to workers; ``keep`` (an
    object whose life keeps the store, e.g. its temporary folder) stays in this process.
    """

    def __init__(
        self, path: Path, name: str, shape: tuple[int, ...], dtype: Any, keep: Any = None
    ) -> None:
        self.path, self.name = path, name
        self.shape, self.dtype, self.ndim = shape, np.dtype(dtype), len(shape)
        self.keep = keep

    def __getstate__(self) -> dict[str, Any]:
        return {**self.__dict__, "keep": None}

    def __getitem__(self, where: Any) -> np.ndarray:
        if self.path.suffix.lower() in HDF5_SUFFIXES:
            with _HDF5_LOCK, h5py.File(self.path, "r") as handle:
                return np.asarray(handle[self.name][where])
        import zarr

        array: Any = zarr.open_array(str(self.path), path=self.name, mode="r")
        return np.asarray(array[where])


def row_arrays(path: Path, names: tuple[str, ...], keep: Any = None) -> dict[str, Any]:
    """The arrays ``names`` of a result store that exist, as dask arrays chunked as stored.

    ``keep`` is held by every chunk's reader in this process (see :class:`StoredRows`).
    """
    import dask.array as da

    found = _layouts(path, names)
    out: dict[str, Any] = {}
    for name, (shape, dtype, chunks) in found.items():
        rows = StoredRows(path, name, shape, dtype, keep)
        block = chunks[0] if chunks else max(1, shape[0])
        chunking = (block, *shape[1:])
        label = f"rowfold-{name.replace('/', '-')}-{uuid.uuid4().hex}"
        out[name] = da.from_array(rows, chunks=chunking, name=label, asarray=True)
    return out


def _layouts(
    path: Path, names: tuple[str, ...]
) -> dict[str, tuple[tuple[int, ...], np.dtype, tuple[int, ...] | None]]:
    """Shape, dtype and chunks of each of ``names`` that the store holds."""
    found: dict[str, tuple[tuple[int, ...], np.dtype, tuple[int, ...] | None]] = {}
    if path.suffix.lower() in HDF5_SUFFIXES:
        with _HDF5_LOCK, h5py.File(path, "r") as handle:
            for name in names:
                dataset = handle.get(name)
                if isinstance(dataset, h5py.Dataset):
                    found[name] = (tuple(dataset.shape), dataset.dtype, dataset.chunks)
        return found
    import zarr

    root = zarr.open_group(str(path), mode="r")
    for name in names:
        try:
            item: Any = root[name]
        except KeyError:
            continue
        if isinstance(item, zarr.Array):
            found[name] = (tuple(item.shape), np.dtype(item.dtype), tuple(item.chunks))
    return found
