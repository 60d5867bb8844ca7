"""Segments of a result: the rows of one run or one update, each kept as its own factor.

A result store keeps, for every live segment, the upper triangular factor ``T`` of that
segment's ``[A | b]`` ((n+k) x (n+k), weighted, column-scaled and without the fixed
columns, exactly as the rows are folded), with ``T^H T = [A | b]^H [A | b]`` over its rows,
and the segment's Gram matrix ``A^H A`` (n x n, summed blockwise from the rows: the
independent check behind ``gram_residual``). The store's R, ``Q^H b`` and residual norms
are the blocks of the factor reduced from all live segments (:func:`reduce`, a binary tree
of stacked QRs, :mod:`rowfold.kernels.tree`), so a segment can be added (``update``),
replaced (``replace``, reading only its rows) or retired (``retire``, reading no rows)
without touching the others' rows.

Each segment records its label, its row range in the input, the rows with non-zero weight,
the fingerprint of its rows (from the row-block digests, :func:`fingerprint`), when it was
added and by which verb. The records are the store attribute ``segments`` (live, in row
order; entry ``i`` owns ``segments/factor[i]`` and ``segments/gram[i]``) and
``retired_segments``.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import blake3
import numpy as np

from rowfold import storage
from rowfold.errors import InputError
from rowfold.kernels.tree import reduce_factors, triangular

FACTORS = storage.SEGMENT_FACTORS
GRAMS = storage.SEGMENT_GRAMS

# Figures that need Q or a pass over every covered row: after update, replace or retire
# they describe no rows of the new answer, so they are not reported, and a gate on them is
# not evaluated.
NOT_RECOMPUTED = {
    "orthogonality_loss": "needs Q, which is formed only by a full run",
    "factorization_residual": "needs Q, which is formed only by a full run",
    "normal_equations_residual": "needs A^H r, a pass over every covered row",
    "residual_screening": (
        "standardized and studentized residuals, leverages, redundancy numbers and the "
        "per-observation test need a pass over every covered row"
    ),
    "refinement": "iterative refinement needs passes over every covered row",
}


def now() -> str:
    """The time stamp segments record (UTC, ISO 8601, seconds)."""
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


@dataclass(frozen=True)
class Segment:
    """One segment's record (what the store's ``segments`` attribute lists).

    Attributes
    ----------
    label : str
        Unique among the store's live and retired segments (``update.label`` or
        ``--label``; by default ``rows-<first>-<last>``).
    first_row, stop_row : int
        The rows ``[first_row, stop_row)`` of the input.
    rows_used : int
        Rows with non-zero weight (all of them without weights).
    fingerprint : str
        Digest of the segment's rows in every input (:func:`fingerprint`).
    added : str
        When the segment was added (UTC).
    how : str
        ``run``, ``update``, ``replace`` (its rows were read again) or ``earlier`` (a store
        written before segments, taken as one).
    """

    label: str
    first_row: int
    stop_row: int
    rows_used: int
    fingerprint: str
    added: str
    how: str

    @property
    def rows(self) -> int:
        """Rows in the range."""
        return self.stop_row - self.first_row

    def as_dict(self) -> dict[str, Any]:
        """The stored and reported form."""
        return {**asdict(self), "rows": self.rows}

    @classmethod
    def from_dict(cls, record: dict[str, Any]) -> Segment:
        """Read a stored record."""
        return cls(
            label=str(record["label"]),
            first_row=int(record["first_row"]),
            stop_row=int(record["stop_row"]),
            rows_used=int(record["rows_used"]),
            fingerprint=str(record.get("fingerprint", "")),
            added=str(record.get("added", "")),
            how=str(record.get("how", "")),
        )


def default_label(first_row: int, stop_row: int) -> str:
    """The label of a segment that was given none: its rows, first and last."""
    return f"rows-{first_row}-{stop_row - 1}"


@dataclass(frozen=True)
class Entry:
    """A live segment and where its factor and Gram come from (stored or just computed)."""

    segment: Segment
    load: Callable[[], tuple[np.ndarray, np.ndarray]]


def stored_entry(path: Path, index: int, segment: Segment) -> Entry:
    """A segment whose factor and Gram are item ``index`` of the store at ``path``."""

    def load() -> tuple[np.ndarray, np.ndarray]:
        return storage.read_item(path, FACTORS, index), storage.read_item(path, GRAMS, index)

    return Entry(segment, load)


def fresh_entry(segment: Segment, factor: np.ndarray, gram: np.ndarray) -> Entry:
    """A segment computed by this step (its factor is made triangular here)."""
    held = (triangular(factor), np.asarray(gram))
    return Entry(segment, lambda: held)


def augmented(R: np.ndarray, qhb: np.ndarray | None, residual: np.ndarray | None) -> np.ndarray:
    """The triangular factor ``[[R, Q^H b], [0, T_r]]`` of ``[A | b]`` from a run's R,
    ``Q^H b`` and any square root of ``r^H r`` (made triangular, ``T_r^H T_r = r^H r``)."""
    if qhb is None or residual is None:
        return np.asarray(R)
    n, k = R.shape[0], qhb.shape[1]
    out = np.zeros((n + k, n + k), dtype=np.result_type(R, qhb, residual))
    out[:n, :n], out[:n, n:], out[n:, n:] = R, qhb, triangular(residual)
    return out


def live_entries(
    path: Path, state: dict[str, np.ndarray], attrs: dict[str, Any], with_rhs: bool
) -> list[Entry]:
    """The live segments of a store; a store written before segments is one segment.

    Raises
    ------
    InputError
        When an earlier store holds no augmented factor to start from.
    """
    records = attrs.get("segments")
    if isinstance(records, list):
        return [stored_entry(path, i, Segment.from_dict(r)) for i, r in enumerate(records)]
    if "R" not in state or (with_rhs and ("qhb" not in state or "residual_factor" not in state)):
        raise InputError(
            f"{path}: the earlier result keeps no factor of [A | b] to start segments from "
            "(written before rowfold kept one); run `rowfold run` once, and update after that"
        )
    rows_done = int(attrs.get("rows_done", attrs.get("rows", 0)))
    factor = augmented(state["R"], state.get("qhb"), state.get("residual_factor"))
    segment = Segment(
        label=default_label(0, rows_done),
        first_row=0,
        stop_row=rows_done,
        rows_used=int(attrs.get("rows_used", rows_done)),
        fingerprint="",
        added=str((attrs.get("provenance") or {}).get("finished", "")),
        how="earlier",
    )
    return [fresh_entry(segment, factor, state["gram"])]


def retired_records(attrs: dict[str, Any]) -> list[dict[str, Any]]:
    """The store's record of retired segments (empty for a store without)."""
    records = attrs.get("retired_segments")
    return list(records) if isinstance(records, list) else []


def check_new_label(label: str, entries: list[Entry], retired: list[dict[str, Any]]) -> None:
    """Refuse a label that a live or retired segment already has."""
    taken = [e.segment.label for e in entries] + [str(r.get("label")) for r in retired]
    if label in taken:
        raise InputError(
            f"update.label {label!r}: a segment of the earlier result already has this label; "
            "give the new rows another (update --label LABEL)"
        )


def find(entries: list[Entry], labels: list[str], path: Path) -> list[int]:
    """Positions of the live segments with these labels.

    Raises
    ------
    InputError
        Naming the first unknown label and the live ones.
    """
    known = [e.segment.label for e in entries]
    for label in labels:
        if label not in known:
            listed = ", ".join(known) or "none"
            raise InputError(f"{path}: no live segment is labelled {label!r}; live: {listed}")
    return [known.index(label) for label in labels]


@dataclass(frozen=True)
class Reduced:
    """The factor of every live segment together, and their sums."""

    factor: np.ndarray
    gram: np.ndarray
    rows: int
    rows_used: int
    segments: int


def reduce(entries: list[Entry]) -> Reduced:
    """Reduce the live segments' factors by a binary tree and sum their Gram matrices,
    reading one segment at a time."""
    grams: list[np.ndarray] = []

    def factors() -> Iterator[np.ndarray]:
        for entry in entries:
            factor, gram = entry.load()
            grams[:] = [gram if not grams else grams[0] + gram]
            yield factor

    factor = reduce_factors(factors())
    rows = sum(e.segment.rows for e in entries)
    used = sum(e.segment.rows_used for e in entries)
    return Reduced(factor, grams[0], rows, used, len(entries))


def windowed(entries: list[Entry], window: int | None) -> tuple[list[Entry], list[Entry]]:
    """Split the live segments into the last ``window`` and the older ones to retire."""
    if window is None or len(entries) <= window:
        return entries, []
    return entries[-window:], entries[:-window]


def fingerprint(records: dict[str, Any], first_row: int, stop_row: int) -> str:
    """The digest of rows ``[first_row, stop_row)`` of every input: their row-block digests
    (whose bounds must fall on the range's ends), input by input in name order."""
    digest = blake3.blake3(b"rowfold-segment-v1")
    for name in sorted(records):
        record = records[name]
        digest.update(name.encode() + b"\0")
        for (start, stop), block in zip(record["bounds"], record["block_digests"], strict=True):
            if first_row <= int(start) and int(stop) <= stop_row:
                digest.update(np.asarray([start, stop], dtype="<i8").tobytes())
                digest.update(bytes.fromhex(block))
    return str(digest.hexdigest())


def retire_record(segment: Segment, when: str, why: str) -> dict[str, Any]:
    """The ``retired_segments`` entry of a segment retired now."""
    return {**segment.as_dict(), "retired": when, "retired_by": why}


def with_segment(entries: list[Entry], index: int, entry: Entry) -> list[Entry]:
    """The live segments with the one at ``index`` replaced."""
    return [entry if i == index else e for i, e in enumerate(entries)]


def relabelled(segment: Segment, **changes: Any) -> Segment:
    """A copy of a record with some fields changed."""
    return replace(segment, **changes)


def coverage(
    entries: list[Entry],
    retired: list[dict[str, Any]],
    step: dict[str, Any],
    recomputed: bool,
) -> dict[str, Any]:
    """The report's ``segments`` entry: what the answer covers, what this step read, and
    (after update, replace or retire) which figures were not recomputed."""
    return {
        "covered": [e.segment.as_dict() for e in entries],
        "segments_covered": len(entries),
        "rows_covered": sum(e.segment.rows for e in entries),
        "rows_used": sum(e.segment.rows_used for e in entries),
        "retired": retired,
        "step": step,
        "not_recomputed": {} if recomputed else dict(NOT_RECOMPUTED),
        "store_numbers_per_segment": "(n+k)^2 for the factor + n^2 for the Gram check",
    }
