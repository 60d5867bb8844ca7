"""Row-block digests of inputs: equal while the rows are, different after any change.

One contract for every layout (HDF5 chunked, compressed, split by columns, contiguous;
Zarr v3, v2, sharded; CSR groups): appending rows leaves the digest of every range of the
old rows as it was, changing one stored value in the range changes it, and chunks lying
wholly inside the range are hashed as stored, without decoding (the read log shows it).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.sparse as sp

from rowfold.storage import ArrayRef, close_open_inputs, write_csr
from rowfold.storage.digests import csr_digest, input_layout, layout_change, range_digest

ROWS, COLS, CHUNK = 1000, 4, 100


def hdf5_file(path: Path, mode: str) -> h5py.File:
    """Open an HDF5 file for writing once the digests' kept read handles are closed (the
    runner closes them when a job ends)."""
    close_open_inputs()
    return h5py.File(path, mode)


def hdf5_writer(**options: Any) -> Callable[[Path, np.ndarray], ArrayRef]:
    def write(folder: Path, values: np.ndarray) -> ArrayRef:
        path = folder / "a.h5"
        with hdf5_file(path, "w") as handle:
            handle.create_dataset("A", data=values, maxshape=(None, COLS), **options)
        return ArrayRef(str(path), "A")

    return write


def zarr_writer(**options: Any) -> Callable[[Path, np.ndarray], ArrayRef]:
    def write(folder: Path, values: np.ndarray) -> ArrayRef:
        import zarr

        fmt = options.get("zarr_format", 3)
        group = zarr.open_group(str(folder / "a.zarr"), mode="w", zarr_format=fmt)
        extra = {k: v for k, v in options.items() if k != "zarr_format"}
        array = group.create_array("A", shape=values.shape, dtype=values.dtype, **extra)
        array[...] = values
        return ArrayRef(str(folder / "a.zarr"), "A")

    return write


LAYOUTS = {
    "hdf5": hdf5_writer(chunks=(CHUNK, COLS)),
    "hdf5-gzip": hdf5_writer(chunks=(CHUNK, COLS), compression="gzip", shuffle=True),
    "hdf5-column-chunks": hdf5_writer(chunks=(CHUNK, 3)),
    "zarr-v3": zarr_writer(chunks=(CHUNK, COLS)),
    "zarr-v2": zarr_writer(chunks=(CHUNK, COLS), zarr_format=2),
    "zarr-sharded": zarr_writer(chunks=(CHUNK // 2, 2), shards=(CHUNK, COLS)),
}


def values(rows: int = ROWS + 250) -> np.ndarray:
    return np.random.default_rng(3).standard_normal((rows, COLS))


def appended(ref: ArrayRef, more: np.ndarray, start: int) -> None:
    if ref.is_hdf5:
        with hdf5_file(Path(ref.path), "a") as handle:
            handle["A"].resize((more.shape[0], COLS))
            handle["A"][start:] = more[start:]
        return
    import zarr

    zarr.open_group(ref.path, mode="a")["A"].append(more[start:], axis=0)


def set_value(ref: ArrayRef, row: int, col: int, value: float) -> None:
    if ref.is_hdf5:
        with hdf5_file(Path(ref.path), "a") as handle:
            handle["A"][row, col] = value
        return
    import zarr

    zarr.open_group(ref.path, mode="a")["A"][row, col] = value


RANGES = [(0, 1000), (0, 950), (130, 870), (200, 300), (250, 260)]
"""Ranges of the 950 old rows: whole chunks, a partial last chunk, chunk edges on both
sides, one chunk, inside one chunk."""


@pytest.mark.parametrize("layout", sorted(LAYOUTS))
def test_digest_survives_appends_and_sees_one_changed_value(tmp_path: Path, layout: str) -> None:
    write = LAYOUTS[layout]
    data = values()
    ref = write(tmp_path, data[:950])
    before = {r: range_digest(ref, *r) for r in RANGES if r[1] <= 950}
    appended(ref, data, 950)
    for r, digest in before.items():
        assert range_digest(ref, *r) == digest, r
    for r in before:
        set_value(ref, r[1] - 1, COLS - 1, 7.0)  # the last row and column of the range
        assert range_digest(ref, *r).digest != before[r].digest, r
        set_value(ref, r[1] - 1, COLS - 1, float(data[r[1] - 1, COLS - 1]))
        assert range_digest(ref, *r).digest == before[r].digest, r


@pytest.mark.parametrize("layout", sorted(LAYOUTS))
def test_whole_chunks_are_hashed_as_stored(
    tmp_path: Path, layout: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    write = LAYOUTS[layout]
    ref = write(tmp_path, values()[:950])
    log = tmp_path / "reads.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    digest = range_digest(ref, 130, 950)
    monkeypatch.delenv("ROWFOLD_READ_LOG")
    reads = [line.split("\t") for line in log.read_text().splitlines()]
    # sharded: the stored objects are shards of 100 rows, like the other layouts' chunks
    assert (digest.stored, digest.decoded) == (700, 120)
    decoded = sorted((int(r[3]), int(r[4])) for r in reads if r[0] == "digest-rows")
    assert decoded == [(130, 200), (900, 950)]
    assert [(int(r[3]), int(r[4])) for r in reads if r[0] == "digest-chunks"] == [(200, 900)]


def test_contiguous_hdf5_is_hashed_decoded(tmp_path: Path) -> None:
    path = tmp_path / "a.h5"
    data = values()
    with hdf5_file(path, "w") as handle:
        handle.create_dataset("A", data=data)
    ref = ArrayRef(str(path), "A")
    digest = range_digest(ref, 100, 600)
    assert (digest.stored, digest.decoded) == (0, 500)
    with hdf5_file(path, "a") as handle:
        handle["A"][599, 0] += 1e-12
    assert range_digest(ref, 100, 600).digest != digest.digest


def test_unwritten_chunks_hash_as_absent_and_stay_equal(tmp_path: Path) -> None:
    path = tmp_path / "a.h5"
    with hdf5_file(path, "w") as handle:
        dataset = handle.create_dataset("A", (ROWS, COLS), "f8", chunks=(CHUNK, COLS))
        dataset[:300] = 1.0  # chunks 3.. never written
    ref = ArrayRef(str(path), "A")
    digest = range_digest(ref, 0, ROWS)
    assert digest.stored == ROWS and range_digest(ref, 0, ROWS) == digest
    with hdf5_file(path, "a") as handle:
        handle["A"][500, 1] = 2.0
    assert range_digest(ref, 0, ROWS).digest != digest.digest


def test_layout_change_names_what_changed(tmp_path: Path) -> None:
    data = values()
    first = input_layout(hdf5_writer(chunks=(CHUNK, COLS))(tmp_path, data), False)
    second = input_layout(hdf5_writer(chunks=(50, COLS))(tmp_path, data), False)
    assert layout_change(first, first) is None
    assert layout_change(first, second) == "chunks [100, 4] -> [50, 4]"


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
@pytest.mark.parametrize("change", ["value", "column", "pattern"])
def test_csr_block_digest(tmp_path: Path, suffix: str, change: str) -> None:
    """A CSR block's digest covers its values, their columns and the row pointers; rows
    written after it (the whole group rewritten with more rows) leave it unchanged."""
    rng = np.random.default_rng(5)
    dense = np.where(rng.random((3000, 6)) < 0.4, rng.standard_normal((3000, 6)), 0.0)
    path = tmp_path / f"m{suffix}"
    write_csr(path, "net/A", sp.csr_array(dense[:2000]))
    ref = ArrayRef(str(path), "net/A")
    before = csr_digest(ref, 500, 1500)
    write_csr(path, "net/A", sp.csr_array(dense))
    assert csr_digest(ref, 500, 1500) == before
    early = csr_digest(ref, 0, 500)
    row = 1499
    edited = dense.copy()
    nonzero = int(np.flatnonzero(edited[row])[0])
    if change == "value":
        edited[row, nonzero] += 1.0
    elif change == "column":  # the same value stored under another column
        zero = int(np.flatnonzero(edited[row] == 0)[0])
        edited[row, zero], edited[row, nonzero] = edited[row, nonzero], 0.0
    else:  # one more stored value in the row
        edited[row, np.flatnonzero(edited[row] == 0)[0]] = 0.5
    write_csr(path, "net/A", sp.csr_array(edited))
    assert csr_digest(ref, 500, 1500).digest != before.digest
    assert csr_digest(ref, 0, 500) == early  # rows before the edit are where they were
