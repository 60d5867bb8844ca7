"""Is every chunk of a row range really stored? (``input.missing_chunks``)

Zarr reads a chunk that is absent from the store as the array's fill value, and HDF5 reads
a chunk that was never written (never allocated) the same way, so a partial copy or an
interrupted ingestion would otherwise read as zeros without a word. The task that reads a
row range first asks whether the chunks covering it exist:

- Zarr (v2 and v3): one ``exists`` per stored object covering the rows (a chunk, or a
  shard of a sharded v3 array; inner chunks of a shard that is present are the writer's
  choice, since a shard is written whole).
- HDF5, chunked: one count of allocated chunks per dataset (cached per open handle); only
  when some are missing, one lookup per chunk of the range
  (``get_chunk_info_by_coord``). Contiguous: a dataset whose storage was never allocated.

With ``missing_chunks="fill_value"`` nothing is checked.
"""

from __future__ import annotations

import asyncio
import itertools
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from rowfold.errors import InputError

FILL_VALUE = "fill_value"
HINT = (
    "restore it, or set input.missing_chunks: fill_value if the writer leaves out chunks "
    "equal to the fill value"
)

# Says what a range along the first axis holds, for messages: (lo, hi) -> "rows lo..hi-1".
Describe = Callable[[int, int], str]

# (file signature, dataset name) -> True when every chunk of the dataset is allocated.
_HDF5_COMPLETE: dict[tuple[tuple[int, ...], str], bool] = {}


def chunk_spans(
    shape: Sequence[int], chunks: Sequence[int], start: int, stop: int
) -> Iterator[tuple[tuple[int, ...], int, int]]:
    """Chunk grid coordinates covering rows ``[start, stop)`` (all of the other axes), each
    with the row range it holds (clipped to the array)."""
    if stop <= start or not shape or any(extent == 0 for extent in shape):
        return
    first, last = start // chunks[0], (stop - 1) // chunks[0]
    others = [range(-(-extent // size)) for extent, size in zip(shape[1:], chunks[1:], strict=True)]
    for row in range(first, last + 1):
        lo, hi = row * chunks[0], min((row + 1) * chunks[0], shape[0])
        for rest in itertools.product(*others):
            yield (row, *rest), lo, hi


def row_range(lo: int, hi: int) -> str:
    """The default range description: ``rows lo..hi-1``."""
    return f"rows {lo}..{hi - 1}"


def _missing_message(
    where: str, missing: list[tuple[str, int, int]], describe: Describe, state: str
) -> str:
    key, lo, hi = missing[0]
    more = f" and {len(missing) - 1} more chunks of this block" if len(missing) > 1 else ""
    return (
        f"{where}: chunk {key} ({describe(lo, hi)}){more} {state}, so it would read as the "
        f"fill value; {HINT}"
    )


def require_zarr_chunks(
    array: Any, where: str, start: int, stop: int, describe: Describe = row_range
) -> None:
    """Raise InputError when a stored object covering rows ``[start, stop)`` is absent.

    Parameters
    ----------
    array : zarr.Array
        The opened array (v2 or v3).
    where : str
        ``file:array`` for the message.
    start, stop : int
        Range along the first axis.
    describe : callable, optional
        What a range ``(lo, hi)`` holds, for the message (default ``rows lo..hi-1``).
    """
    from zarr.core.sync import sync

    grid = array.shards or array.chunks
    spans = list(chunk_spans(array.shape, grid, start, stop))
    if not spans:
        return
    store, prefix = array.store_path.store, array.store_path.path
    keys = [array.metadata.encode_chunk_key(coords) for coords, _, _ in spans]
    full = [f"{prefix}/{key}" if prefix else key for key in keys]

    async def present() -> list[bool]:
        return list(await asyncio.gather(*(store.exists(key) for key in full)))

    found = sync(present())
    missing = [
        (key, lo, hi) for key, (_, lo, hi), ok in zip(keys, spans, found, strict=True) if not ok
    ]
    if missing:
        raise InputError(_missing_message(where, missing, describe, "is missing from the store"))


def require_hdf5_chunks(
    dataset: Any,
    where: str,
    start: int,
    stop: int,
    signature: tuple[int, ...],
    describe: Describe = row_range,
) -> None:
    """Raise InputError when a chunk covering rows ``[start, stop)`` was never written.

    Parameters
    ----------
    dataset : h5py.Dataset
        The opened dataset (the caller holds the HDF5 lock).
    where : str
        ``file:dataset`` for the message.
    start, stop : int
        Range along the first axis.
    signature : tuple of int
        Identifies the open file version (pid, inode, size, mtime): the cached
        "every chunk allocated" answer is kept per signature.
    describe : callable, optional
        What a range ``(lo, hi)`` holds, for the message (default ``rows lo..hi-1``).
    """
    if dataset.size == 0 or stop <= start:
        return
    if dataset.chunks is None:
        if dataset.id.get_storage_size() == 0 and dataset.id.get_offset() is None:
            layout = dataset.id.get_create_plist().get_layout()
            import h5py

            if layout == h5py.h5d.CONTIGUOUS:
                raise InputError(
                    f"{where}: the dataset was created but never written "
                    f"({describe(start, stop)} would read as the fill value); {HINT}"
                )
        return
    if _hdf5_complete(dataset, signature):
        return
    missing = []
    for coords, lo, hi in chunk_spans(dataset.shape, dataset.chunks, start, stop):
        offset = tuple(c * size for c, size in zip(coords, dataset.chunks, strict=True))
        if dataset.id.get_chunk_info_by_coord(offset).byte_offset is None:
            missing.append((str(coords), lo, hi))
    if missing:
        raise InputError(_missing_message(where, missing, describe, "was never written"))


def _hdf5_complete(dataset: Any, signature: tuple[int, ...]) -> bool:
    """True when every chunk of a chunked dataset is allocated (cached per file version)."""
    key = (signature, dataset.name)
    known = _HDF5_COMPLETE.get(key)
    if known is None:
        total = 1
        for extent, size in zip(dataset.shape, dataset.chunks, strict=True):
            total *= -(-extent // size)
        known = dataset.id.get_num_chunks() >= total
        _HDF5_COMPLETE[key] = known
    return known
