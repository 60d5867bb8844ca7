"""``rowfold update`` (and ``replace``): factor a range of rows as one segment.

The earlier result keeps, per segment, the triangular factor of that segment's ``[A | b]``
(:mod:`rowfold.segments`). ``update`` factors the new rows ``[rows_done, m)`` by Householder
TSQR as ``[A_new | b_new]`` (:func:`factor_rows`) into a new segment; ``replace`` factors one
segment's rows again. The store's answer is then reduced from the live segments' factors
(a TSQR reduction), so it equals a full refactorization up to rounding, without reading the
other rows again.

Before an update, two things must hold, or it is refused (exit 2) and ``run`` is the way:

* every job key that changes the answer (:data:`ANSWER_KEYS`) equals the one the earlier
  result was computed with (:func:`check_answer_keys`);
* the inputs still hold the rows the live segments consumed: every such row block of every
  input is hashed again and compared with the digests the earlier result recorded
  (:func:`verify_prefix`; :mod:`rowfold.storage.digests`). ``update.verify: sample`` checks
  only a share of the blocks, and the report says exactly which.

Q is not carried forward: an updated store has no Q (``q_state`` says so); run ``run`` to
form it again.
"""

from __future__ import annotations

import itertools
import json
import math
import secrets
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from rowfold import storage
from rowfold.blocks import BlockPlan
from rowfold.errors import InputError
from rowfold.kernels import positive_diagonal
from rowfold.methods import tsqr
from rowfold.methods._graph import task
from rowfold.methods.base import Engine
from rowfold.spec import Job, UpdateSpec
from rowfold.storage.digests import RangeDigest


@dataclass(frozen=True)
class AugmentedSource:
    """Row blocks of ``[A | B]`` for rows of a plan (B as extra columns, no rhs)."""

    plan: BlockPlan

    @property
    def blocks(self) -> int:
        """Number of row blocks."""
        return self.plan.blocks

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Return ``[A_i | B_i]`` and no rhs."""
        block, rhs = self.plan.load(index)
        if rhs is None:
            return block, None
        return np.asfortranarray(np.hstack([block, rhs.astype(block.dtype)])), None


def count_used_rows(plan: BlockPlan, index: int) -> int:
    """Rows of a block with non-zero weight (all rows without weights)."""
    from rowfold.blocks import load_weights

    start, stop = plan.bound(index)
    if plan.weights is None:
        return stop - start
    return int(np.count_nonzero(load_weights(plan, index)))


ANSWER_KEYS: tuple[tuple[str, str], ...] = (
    ("input", "matrix"),
    ("input", "rhs"),
    ("input", "weights"),
    ("input", "fixed_columns"),
    ("method", "precision"),
    ("solve", "scale_columns"),
    ("solve", "rank_tolerance"),
)
"""Job keys whose value changes the answer: an update must use the stored ones.

The others do not: ``input.path`` (the digests prove the rows, wherever the file is),
``input.rows_per_block`` and ``method.*`` other than ``precision`` (the same R up to
rounding), the outputs, gates and cluster keys."""


def check_answer_keys(job: Job, attrs: dict[str, Any], output: Path) -> None:
    """Refuse when a key of :data:`ANSWER_KEYS` differs from the earlier result's.

    Raises
    ------
    InputError
        Naming the key, the stored value and the new one.
    """
    stored = attrs.get("job")
    if not isinstance(stored, dict):
        raise InputError(
            f"{output}: the earlier result records no job; run `rowfold run` instead of update"
        )
    for section, key in ANSWER_KEYS:
        old = (stored.get(section) or {}).get(key)
        new = job.resolved[section][key]
        if _plain(old) != _plain(new):
            raise InputError(
                f"key '{section}.{key}': the earlier result was computed with "
                f"{json.dumps(_plain(old))}, this job has {json.dumps(_plain(new))}; an update "
                "keeps every key that changes the answer; run `rowfold run` instead of update"
            )


def _plain(value: Any) -> Any:
    """A job value in plain JSON form (lists for tuples), for comparing and showing."""
    return json.loads(json.dumps(value, default=str))


def _sources(plan: BlockPlan) -> dict[str, tuple[storage.ArrayRef, bool]]:
    """The inputs of a plan by name, each with whether it is a CSR group."""
    refs = {"matrix": plan.matrix, "rhs": plan.rhs, "weights": plan.weights}
    return {
        name: (ref, name == "matrix" and plan.sparse)
        for name, ref in refs.items()
        if ref is not None
    }


@dataclass(frozen=True)
class PrefixCheck:
    """What :func:`verify_prefix` proved, and the records to extend after the update.

    Attributes
    ----------
    report : dict
        The report's ``prefix_check`` entry.
    records : dict
        The earlier result's per-input digest records.
    warnings : list of str
        What the report's warnings must say (rows not checked in sample mode).
    """

    report: dict[str, Any]
    records: dict[str, Any]
    warnings: list[str]


def verify_prefix(
    plan: BlockPlan,
    state: dict[str, np.ndarray],
    attrs: dict[str, Any],
    spec: UpdateSpec,
    engine: Engine,
    output: Path,
    live: list[tuple[int, int]] | None = None,
) -> PrefixCheck:
    """Check that the inputs still start with the rows the earlier result consumed.

    Every old row block of every input (``update.verify: all``), or a random share of them
    that always holds the last (``sample``), is hashed again on the workers and compared
    with the digests the earlier result recorded. With ``live`` (the row ranges of the
    live segments), blocks of retired segments are not checked: their rows no longer take
    part in the answer, and may have changed.

    Raises
    ------
    InputError
        When the earlier result holds no digests, an input's layout changed (stored bytes
        cannot be compared), or a block differs (naming the input and the first such block).
    """
    started = time.perf_counter()
    rows_done = int(attrs["rows_done"])
    records = storage.stored_records(state, attrs)
    if records is None:
        raise InputError(
            f"{output}: the earlier result holds no row-block digests (written before rowfold "
            "recorded them), so update cannot prove the old rows unchanged; run `rowfold run` "
            "once, and update after that"
        )
    sources = _sources(plan)
    _check_records(sources, records, rows_done)
    bounds = [(int(a), int(b)) for a, b in records["matrix"]["bounds"]]
    candidates = _live_blocks(bounds, live)
    chosen, seed = _chosen_blocks(candidates, spec)
    refs = tuple(sources.values())
    tasks = [task(storage.block_digests, refs, *bounds[i]) for i in chosen]
    found = engine.compute(tasks, "update: check the old rows")
    tallies = {name: [0, 0] for name in sources}
    for index, digests in zip(chosen, found, strict=True):
        for (name, (ref, _)), digest in zip(sources.items(), digests, strict=True):
            if digest.digest != records[name]["block_digests"][index]:
                start, stop = bounds[index]
                raise InputError(
                    f"{ref.describe()}: row block {index} (rows {start}..{stop - 1}) differs "
                    f"from the rows the earlier result consumed; update needs the input to "
                    f"still start with those {rows_done} rows; run `rowfold run` instead of "
                    "update"
                )
            tallies[name][0] += digest.stored
            tallies[name][1] += digest.decoded
    checked = sum(bounds[i][1] - bounds[i][0] for i in chosen)
    report = _check_report(sources, tallies, spec, bounds, chosen, seed, rows_done, checked)
    retired = rows_done - sum(bounds[i][1] - bounds[i][0] for i in candidates)
    report["rows_retired_not_checked"] = retired
    report["seconds"] = round(time.perf_counter() - started, 4)
    warnings = []
    if checked < rows_done - retired:
        warnings.append(
            f"update.verify: sample: {rows_done - checked} of the {rows_done} old rows were "
            f"not checked ({len(chosen)} of {len(bounds)} row blocks were); a change there "
            "goes unnoticed; use update.verify: all to check every row"
        )
    return PrefixCheck(report, records, warnings)


def _check_records(
    sources: dict[str, tuple[storage.ArrayRef, bool]], records: dict[str, Any], rows_done: int
) -> None:
    """Refuse records that cannot prove this job's inputs: missing, incomplete, or taken
    under another storage layout."""
    for name, (ref, csr) in sources.items():
        record = records.get(name)
        if record is None:
            raise InputError(
                f"{ref.describe()}: the earlier result holds no digests of input.{name}; "
                "run `rowfold run` instead of update"
            )
        bounds = record["bounds"]
        starts_ok = bool(bounds) and bounds[0][0] == 0 and bounds[-1][1] == rows_done
        if not starts_ok or any(a[1] != b[0] for a, b in itertools.pairwise(bounds)):
            raise InputError(
                f"{ref.describe()}: the earlier result's digests do not cover its "
                f"{rows_done} rows; run `rowfold run` instead of update"
            )
        if record.get("format") != ("csr" if csr else "dense"):
            raise InputError(
                f"{ref.describe()}: the earlier result read it as {record.get('format')}; "
                "run `rowfold run` instead of update"
            )
        change = storage.layout_change(record["layout"], storage.input_layout(ref, csr))
        if change is not None:
            raise InputError(
                f"{ref.describe()}: its storage layout changed since the earlier result "
                f"({change}); stored chunk bytes cannot be compared; run `rowfold run` "
                "instead of update"
            )


def _live_blocks(bounds: list[tuple[int, int]], live: list[tuple[int, int]] | None) -> list[int]:
    """The old blocks that lie in a live segment (every block without segments)."""
    if live is None:
        return list(range(len(bounds)))
    return [
        i
        for i, (start, stop) in enumerate(bounds)
        if any(first <= start and stop <= last for first, last in live)
    ]


def _chosen_blocks(candidates: list[int], spec: UpdateSpec) -> tuple[list[int], int | None]:
    """The old blocks to check: all, or a random share holding the last (and the seed)."""
    if spec.verify == "all" or not candidates:
        return list(candidates), None
    seed = secrets.randbits(63)
    blocks = len(candidates)
    wanted = max(1, math.ceil(spec.sample_fraction * blocks))
    others = np.random.default_rng(seed).permutation(blocks - 1)[: wanted - 1]
    picked = {blocks - 1, *(int(i) for i in others)}
    return sorted(candidates[i] for i in picked), seed


def _check_report(
    sources: dict[str, tuple[storage.ArrayRef, bool]],
    tallies: dict[str, list[int]],
    spec: UpdateSpec,
    bounds: list[tuple[int, int]],
    chosen: list[int],
    seed: int | None,
    rows_done: int,
    checked: int,
) -> dict[str, Any]:
    """The report's ``prefix_check`` entry: what was hashed, how, and what was not."""
    inputs = {}
    for name, (ref, csr) in sources.items():
        stored, decoded = tallies[name]
        how = [("stored chunk bytes", stored), ("decoded rows", decoded)]
        inputs[name] = {
            "array": ref.describe(),
            "unit": "elements" if csr else "rows",
            "stored_chunk_items": stored,
            "decoded_items": decoded,
            "method": " and ".join(label for label, count in how if count) or "nothing",
        }
    report: dict[str, Any] = {
        "verify": spec.verify,
        "result": "unchanged",
        "hash": "blake3",
        "rows_before": rows_done,
        "blocks": len(bounds),
        "blocks_checked": len(chosen),
        "rows_checked": checked,
        "rows_not_checked": rows_done - checked,
        "fraction_checked": checked / rows_done if rows_done else 1.0,
        "inputs": inputs,
    }
    if spec.verify == "sample":
        report.update(
            {"sample_fraction": spec.sample_fraction, "sample_seed": seed, "checked_blocks": chosen}
        )
    return report


def rows_plan(plan: BlockPlan, first_row: int, stop_row: int, scale: np.ndarray) -> BlockPlan:
    """The plan restricted to rows ``[first_row, stop_row)``, with the earlier column
    scaling (a segment's rows are folded exactly as the earlier ones were)."""
    column_scale = None if np.all(scale == 1) else tuple(float(v) for v in scale)
    return replace(plan, first_row=first_row, rows=stop_row, column_scale=column_scale)


@dataclass(frozen=True)
class SegmentFactor:
    """One segment's rows, factored: what :mod:`rowfold.segments` keeps of them.

    Attributes
    ----------
    factor : ndarray (n+k, n+k)
        Upper triangular factor of the rows' ``[A | b]`` (weighted, scaled, fixed columns
        left out), diagonal real and non-negative.
    gram : ndarray (n, n)
        ``A^H A`` of the rows, summed blockwise.
    rows_used : int
        Rows with non-zero weight.
    """

    factor: np.ndarray
    gram: np.ndarray
    rows_used: int


def factor_rows(plan: BlockPlan, engine: Engine, label: str) -> SegmentFactor:
    """Factor the rows of ``plan`` (a row range, :func:`rows_plan`) as ``[A | b]`` by
    Householder TSQR on the engine; read each of its blocks once (twice with weights,
    which are counted in a second small pass)."""
    n = plan.cols
    new = tsqr.factor_source(AugmentedSource(plan), "binary", engine, False, label)
    used = plan.rows - plan.first_row
    if plan.weights is not None:
        used_tasks = [task(count_used_rows, plan, i) for i in range(plan.blocks)]
        used = sum(engine.compute(used_tasks, f"{label}: count rows"))
    factor, _ = positive_diagonal(new.R)
    return SegmentFactor(factor, np.asarray(new.sums.gram[:n, :n]), int(used))


def block_range(bounds: list[list[int]], first_row: int, stop_row: int, what: str) -> list[int]:
    """Positions of the recorded row blocks that tile ``[first_row, stop_row)`` exactly.

    Raises
    ------
    InputError
        When the recorded blocks do not fall on the range's ends.
    """
    inside = [i for i, (a, b) in enumerate(bounds) if first_row <= a and b <= stop_row]
    covered = sum(bounds[i][1] - bounds[i][0] for i in inside)
    if covered != stop_row - first_row:
        raise InputError(
            f"{what}: the earlier result's row-block digests do not fall on rows "
            f"{first_row}..{stop_row - 1}; run `rowfold run` instead"
        )
    return inside


def check_replace_records(plan: BlockPlan, records: dict[str, Any], rows_done: int) -> None:
    """Refuse digest records that a replacement could not extend truthfully: missing,
    incomplete, or taken under another storage layout (as :func:`verify_prefix` does)."""
    _check_records(_sources(plan), records, rows_done)


def digest_blocks(
    plan: BlockPlan, bounds: list[tuple[int, int]], engine: Engine
) -> dict[str, list[RangeDigest]]:
    """Digest the given row blocks of every input of a plan (on the workers), by input."""
    sources = _sources(plan)
    refs = tuple(sources.values())
    tasks = [task(storage.block_digests, refs, start, stop) for start, stop in bounds]
    found = engine.compute(tasks, "replace: fingerprint the rows")
    return {name: [digests[i] for digests in found] for i, name in enumerate(sources)}
