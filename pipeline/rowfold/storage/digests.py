"""Digests of input row blocks: what proves that an input still starts with the same rows.

A run records, for every input array and every row block ``[start, stop)``, a BLAKE3
digest of those rows; ``update`` recomputes the digests of the old blocks and compares
them before it folds new rows into the stored factor, and ``run --resume`` ties each
checkpoint to the digests of its block (:mod:`.checkpoints`).

How a range is hashed follows from the array's on-disk layout and the range alone, so the
same range under the same layout always hashes the same way:

* a chunk lying wholly inside the range is hashed as stored, without decoding it (HDF5:
  ``read_direct_chunk``, with the chunk's filter mask; Zarr: the bytes of the chunk object,
  the shard for a sharded array, read through the store); a chunk never written is hashed
  as absent;
* the rows of a chunk that straddles an end of the range (such as the last, partial chunk
  of the old rows, which appending rewrites), and every row of a contiguous HDF5 dataset,
  are read decoded and hashed in the stored dtype, C order.

A CSR group's block is the ``indptr`` entries ``[start, stop]`` and the ``data`` and
``indices`` ranges those entries point to, each hashed the same way. The layout (dtype,
chunk shape, filters or codecs, fill value) is recorded beside the digests: stored bytes
under another layout cannot be compared, and :func:`layout_change` says what changed.
"""

from __future__ import annotations

import itertools
import json
import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import blake3
import numpy as np

from rowfold.errors import InputError
from rowfold.storage import locations
from rowfold.storage.backends import StoredChunks, input_backend
from rowfold.storage.csr import require_csr_chunks
from rowfold.storage.inputs import (
    ArrayRef,
    _log_read,
    read_rows,
)

HASH = "blake3"
"""The hash every digest uses (recorded with the digests)."""

DIGEST_BYTES = 32
"""Bytes of one digest."""

_VERSION = b"rowfold-rows-v1"


@dataclass(frozen=True, slots=True)
class RangeDigest:
    """The digest of a range of one input, and how its items were hashed.

    Attributes
    ----------
    digest : str
        Hex BLAKE3 digest.
    stored : int
        Items (rows of a dense array; entries of a CSR group's arrays) hashed as stored
        chunk bytes.
    decoded : int
        Items read decoded and hashed.
    """

    digest: str
    stored: int
    decoded: int


def _csr_parts(ref: ArrayRef) -> dict[str, ArrayRef]:
    return {part: ref.part(part) for part in ("data", "indices", "indptr")}


# ---------------------------------------------------------------- layouts


def array_layout(ref: ArrayRef) -> dict[str, Any]:
    """The on-disk layout of a dense array that its stored chunk bytes depend on."""
    layout = input_backend(ref).layout(ref)
    normal: dict[str, Any] = json.loads(json.dumps(layout, sort_keys=True, default=str))
    return normal


def input_layout(ref: ArrayRef, csr: bool) -> dict[str, Any]:
    """:func:`array_layout` of a dense array, or of each of a CSR group's three arrays."""
    if not csr:
        return array_layout(ref)
    return {"csr": {part: array_layout(sub) for part, sub in _csr_parts(ref).items()}}


def layout_change(old: dict[str, Any], new: dict[str, Any]) -> str | None:
    """Describe how a recorded layout differs from the current one (None when equal)."""
    if old == new:
        return None
    changes = []
    for key in sorted(set(old) | set(new)):
        if old.get(key) == new.get(key):
            continue
        if isinstance(old.get(key), dict) and isinstance(new.get(key), dict):
            inner = layout_change(old[key], new[key])
            changes.append(f"{key}: {inner}")
        else:
            changes.append(f"{key} {json.dumps(old.get(key))} -> {json.dumps(new.get(key))}")
    return "; ".join(changes)


# ---------------------------------------------------------------- chunk access


def _coordinates(chunks: StoredChunks, row_chunk: int) -> Iterator[tuple[int, ...]]:
    """Chunk grid coordinates of the chunks in one chunk-row, in C order."""
    assert chunks.shape is not None
    tails = [
        range(math.ceil(e / c)) for e, c in zip(chunks.extent[1:], chunks.shape[1:], strict=True)
    ]
    for tail in itertools.product(*tails):
        yield (row_chunk, *tail)


def _update_decoded(digest: Any, ref: ArrayRef, start: int, stop: int) -> int:
    """Hash rows ``[start, stop)`` decoded; return how many."""
    if stop <= start:
        return 0
    rows = np.ascontiguousarray(read_rows(ref, start, stop, purpose="digest-rows"))
    head = np.asarray([start, stop, *rows.shape[1:]], dtype="<i8").tobytes()
    digest.update(b"R" + rows.dtype.str.encode() + head)
    digest.update(rows.reshape(-1).view(np.uint8).data)
    return stop - start


def range_digest(ref: ArrayRef, start: int, stop: int) -> RangeDigest:
    """Digest rows ``[start, stop)`` of a dense array (see the module docstring)."""
    stop = max(start, stop)
    digest = blake3.blake3(_VERSION + np.asarray([start, stop], dtype="<i8").tobytes())
    chunks = input_backend(ref).stored_chunks(ref)
    if chunks.shape is None or not chunks.extent:
        decoded = _update_decoded(digest, ref, start, stop)
        return RangeDigest(digest.hexdigest(), 0, decoded)
    size = chunks.shape[0]
    first, last = -(-start // size), stop // size  # chunk rows wholly inside [start, stop)
    if first >= last:
        decoded = _update_decoded(digest, ref, start, stop)
        return RangeDigest(digest.hexdigest(), 0, decoded)
    decoded = _update_decoded(digest, ref, start, first * size)
    _log_read(ref, first * size, last * size, "digest-chunks")
    try:
        for row_chunk in range(first, last):
            for coords in _coordinates(chunks, row_chunk):
                header, data = chunks.read(coords)
                digest.update(header + (b"A" if data is None else b"S"))
                if data is not None:
                    digest.update(np.asarray([len(data)], dtype="<i8").tobytes())
                    digest.update(data)
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: the stored chunks of rows {first * size}..{last * size - 1} "
            f"cannot be read ({locations.failure(exc, ref.storage_options)})"
        ) from None
    decoded += _update_decoded(digest, ref, last * size, stop)
    return RangeDigest(digest.hexdigest(), (last - first) * size, decoded)


def csr_digest(ref: ArrayRef, start: int, stop: int) -> RangeDigest:
    """Digest rows ``[start, stop)`` of a CSR group: its ``indptr`` entries
    ``[start, stop]`` and the ``data`` and ``indices`` ranges they point to."""
    require_csr_chunks(ref, start, stop)  # a missing chunk is named by the rows owning it
    parts = _csr_parts(ref)
    pointers = range_digest(parts["indptr"], start, stop + 1)
    ends = np.asarray(read_rows(parts["indptr"], start, stop + 1, purpose="digest-rows"))
    lo, hi = (int(ends[0]), int(ends[-1])) if ends.size else (0, 0)
    hi = max(lo, hi)
    pieces = [pointers, range_digest(parts["data"], lo, hi), range_digest(parts["indices"], lo, hi)]
    digest = blake3.blake3(b"rowfold-csr-v1")
    for piece in pieces:
        digest.update(bytes.fromhex(piece.digest))
    stored = sum(piece.stored for piece in pieces)
    return RangeDigest(digest.hexdigest(), stored, sum(piece.decoded for piece in pieces))


def block_digests(
    sources: tuple[tuple[ArrayRef, bool], ...], start: int, stop: int
) -> tuple[RangeDigest, ...]:
    """Digest rows ``[start, stop)`` of each input (a task: it gets references, opens them).

    Parameters
    ----------
    sources : tuple of (ArrayRef, bool)
        Each input and whether it is a CSR group.
    start, stop : int
        The row block.
    """
    return tuple(
        csr_digest(ref, start, stop) if csr else range_digest(ref, start, stop)
        for ref, csr in sources
    )


# ---------------------------------------------------------------- records in a result store


PRIVATE_KEYS = ("block_digests", "bounds")
"""Keys of an input record that go into the store's ``state/`` arrays, not its attributes."""


def input_record(
    ref: ArrayRef,
    csr: bool,
    shape: tuple[int, ...],
    bounds: list[tuple[int, int]],
    digests: list[RangeDigest],
) -> dict[str, Any]:
    """The record of one input: a summary (for the store's ``inputs`` attribute and the
    report) and, under :data:`PRIVATE_KEYS`, the per-block bounds and digests."""
    return {
        "path": ref.path,
        "dataset": ref.name,
        "shape": list(shape),
        "format": "csr" if csr else "dense",
        "rows": bounds[-1][1] if bounds else 0,
        "hash": HASH,
        "layout": input_layout(ref, csr),
        "blocks": len(bounds),
        "content": content_digest(bounds, [d.digest for d in digests]),
        "hashed": {
            "stored_chunk_items": sum(d.stored for d in digests),
            "decoded_items": sum(d.decoded for d in digests),
        },
        "bounds": [list(b) for b in bounds],
        "block_digests": [d.digest for d in digests],
    }


def content_digest(bounds: list[tuple[int, int]] | list[list[int]], digests: list[str]) -> str:
    """One digest of a whole record: its bounds and its block digests, in order."""
    digest = blake3.blake3(b"rowfold-record-v1")
    for (start, stop), block in zip(bounds, digests, strict=True):
        digest.update(np.asarray([start, stop], dtype="<i8").tobytes() + bytes.fromhex(block))
    return str(digest.hexdigest())


def public_record(inputs: dict[str, Any]) -> dict[str, Any]:
    """The records without their per-block lists (what the attributes and the report hold)."""
    return {
        name: {key: value for key, value in record.items() if key not in PRIVATE_KEYS}
        for name, record in inputs.items()
    }


def digest_arrays(inputs: dict[str, Any]) -> dict[str, np.ndarray]:
    """The per-block bounds and digests as arrays for a result store's ``state/`` group:
    ``digest_bounds`` (k x 2, int64, shared by every input) and ``digest_<input>`` (k x 32,
    uint8)."""
    arrays: dict[str, np.ndarray] = {}
    for name, record in inputs.items():
        bounds = np.asarray(record["bounds"], dtype=np.int64).reshape(-1, 2)
        if "digest_bounds" in arrays and not np.array_equal(arrays["digest_bounds"], bounds):
            raise ValueError("every input's digests must cover the same row blocks")
        arrays["digest_bounds"] = bounds
        raw = b"".join(bytes.fromhex(d) for d in record["block_digests"])
        arrays[f"digest_{name}"] = np.frombuffer(raw, dtype=np.uint8).reshape(-1, DIGEST_BYTES)
    return arrays


def stored_records(state: dict[str, np.ndarray], attrs: dict[str, Any]) -> dict[str, Any] | None:
    """The records a result store holds (its ``inputs`` attribute and ``state/`` arrays), or
    None when it holds no per-block digests (written before rowfold recorded them)."""
    summaries = attrs.get("inputs")
    if not isinstance(summaries, dict) or "digest_bounds" not in state:
        return None
    bounds = [[int(a), int(b)] for a, b in np.asarray(state["digest_bounds"]).reshape(-1, 2)]
    records: dict[str, Any] = {}
    for name, summary in summaries.items():
        raw = state.get(f"digest_{name}")
        if raw is None or not isinstance(summary, dict) or summary.get("hash") != HASH:
            return None
        digests = [bytes(row).hex() for row in np.asarray(raw, dtype=np.uint8)]
        if len(digests) != len(bounds):
            return None
        records[name] = {**summary, "bounds": bounds, "block_digests": digests}
    return records


def extend_records(old: dict[str, Any], new: dict[str, Any]) -> dict[str, Any]:
    """Records covering the old blocks followed by the new ones (after an update)."""
    out: dict[str, Any] = {}
    for name, added in new.items():
        before = old[name]
        bounds = before["bounds"] + added["bounds"]
        digests = before["block_digests"] + added["block_digests"]
        hashed = {key: before["hashed"][key] + added["hashed"][key] for key in added["hashed"]}
        out[name] = {
            **added,
            "rows": bounds[-1][1],
            "blocks": len(bounds),
            "content": content_digest(bounds, digests),
            "hashed": hashed,
            "bounds": bounds,
            "block_digests": digests,
        }
    return out


def replace_blocks(
    old: dict[str, Any], positions: list[int], digests: dict[str, list[RangeDigest]]
) -> dict[str, Any]:
    """Records with the digests of some blocks (at ``positions``) replaced by new ones
    (after their rows were replaced in place and read again); bounds stay as they were."""
    out: dict[str, Any] = {}
    for name, before in old.items():
        blocks = list(before["block_digests"])
        for position, digest in zip(positions, digests[name], strict=True):
            blocks[position] = digest.digest
        out[name] = {
            **before,
            "content": content_digest(before["bounds"], blocks),
            "block_digests": blocks,
        }
    return out


__all__ = [
    "DIGEST_BYTES",
    "HASH",
    "PRIVATE_KEYS",
    "RangeDigest",
    "array_layout",
    "block_digests",
    "content_digest",
    "csr_digest",
    "digest_arrays",
    "extend_records",
    "input_layout",
    "input_record",
    "layout_change",
    "public_record",
    "range_digest",
    "replace_blocks",
    "stored_records",
]
