"""What `update` and `run --resume` must prove before they reuse earlier work.

- `update` folds new rows into a stored factor only when every old row block of every input
  (matrix, rhs, weights; dense or CSR; HDF5 or Zarr) still hashes as recorded, and only when
  every job key that changes the answer is the one the stored result was computed with;
  otherwise it refuses with exit 2, naming the array and the row block, or the key.
- `run --resume` reuses a checkpoint only when its rows are unchanged and its content matches
  its digest; anything else is recomputed, with a warning naming the file.

References: numpy/LAPACK QR of the same rows (``support.lapack_r``) compared with the
published perturbation bound of R (``bounds.r_factor``).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.sparse as sp
import yaml

from rowfold import runner, storage
from rowfold.cli import main

import bounds
from support import lapack_r, prescribed

M, N, CHUNK, BLOCK, ADDED = 20_250, 4, 500, 3000, 500
"""Old rows, columns, rows per on-disk chunk, rows per block, appended rows. 20,250 is not a
whole number of chunks, so the last old chunk is partial (appending rewrites it)."""

CHANGED_ROW = 10_400
"""A row in block 3 (rows 9000..11999), away from the windows the first version sampled."""


def full_data(seed: int = 60) -> dict[str, np.ndarray]:
    """A, b and w with room for two appends of ADDED rows."""
    rows = M + 2 * ADDED
    rng = np.random.default_rng(seed)
    A = prescribed(rows, N, 100.0, seed=seed)
    b = A @ rng.standard_normal(N) + 1e-3 * rng.standard_normal(rows)
    w = rng.uniform(0.5, 2.0, rows)
    return {"A": A, "b": b, "w": w}


def write_dense(path: Path, arrays: dict[str, np.ndarray], rows: int) -> None:
    """Growable arrays chunked by CHUNK rows (HDF5 maxshape None; Zarr arrays can grow)."""
    if path.suffix == ".h5":
        with h5py.File(path, "w") as handle:
            for name, array in arrays.items():
                handle.create_dataset(
                    name,
                    data=array[:rows],
                    maxshape=(None, *array.shape[1:]),
                    chunks=(CHUNK, *array.shape[1:]),
                )
        return
    storage.write_arrays(path, {name: a[:rows] for name, a in arrays.items()}, chunk_rows=CHUNK)


def append_dense(path: Path, arrays: dict[str, np.ndarray], start: int, stop: int) -> None:
    """Append rows ``[start, stop)`` of every array (in place, as an ingestion does)."""
    if path.suffix == ".h5":
        with h5py.File(path, "a") as handle:
            for name, array in arrays.items():
                handle[name].resize((stop, *array.shape[1:]))
                handle[name][start:] = array[start:stop]
        return
    import zarr

    group = zarr.open_group(str(path), mode="a")
    for name, array in arrays.items():
        group[name].append(array[start:stop], axis=0)


def change_dense(path: Path, name: str, row: int) -> None:
    if path.suffix == ".h5":
        with h5py.File(path, "a") as handle:
            values = handle[name][row]
            handle[name][row] = values + 1.0
        return
    import zarr

    array = zarr.open_group(str(path), mode="a")[name]
    array[row] = array[row] + 1.0


def write_sparse(path: Path, arrays: dict[str, np.ndarray], rows: int) -> None:
    """A CSR group (the whole group is written again, as a nightly export would)."""
    matrix = sp.csr_array(np.where(np.abs(arrays["A"][:rows]) > 0.004, arrays["A"][:rows], 0))
    storage.write_csr(path, "A", matrix, {"b": arrays["b"][:rows], "w": arrays["w"][:rows]})


def job_file(folder: Path, data: Path, **extra: Any) -> Path:
    job: dict[str, Any] = {
        "input": {
            "path": data.name,
            "matrix": "A",
            "rhs": "b",
            "weights": "w",
            "rows_per_block": BLOCK,
        },
        "output": {"path": "result.h5", "overwrite": True},
    }
    for section, values in extra.items():
        job.setdefault(section, {}).update(values)
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def report(folder: Path) -> dict[str, Any]:
    loaded: dict[str, Any] = json.loads((folder / "result.report.json").read_text())
    return loaded


FORMATS = [".h5", ".zarr", "csr.h5", "csr.zarr"]


def prepare(folder: Path, fmt: str, arrays: dict[str, np.ndarray]) -> Path:
    """Write the first M rows in format ``fmt``; return the input path."""
    path = folder / f"obs{fmt.removeprefix('csr')}"
    (write_sparse if fmt.startswith("csr") else write_dense)(path, arrays, M)
    return path


def grow(path: Path, fmt: str, arrays: dict[str, np.ndarray]) -> None:
    """Append ADDED rows to every input array."""
    if fmt.startswith("csr"):
        write_sparse(path, arrays, M + ADDED)
    else:
        append_dense(path, arrays, M, M + ADDED)


@pytest.mark.parametrize(
    ("fmt", "name"),
    [
        (".h5", "A"),
        (".h5", "b"),
        (".h5", "w"),
        (".zarr", "A"),
        (".zarr", "b"),
        (".zarr", "w"),
        ("csr.h5", "A"),
        ("csr.zarr", "A"),
        ("csr.h5", "b"),
    ],
)
def test_update_refuses_one_changed_old_row_anywhere(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str, name: str
) -> None:
    """Before: exit 0 with a wrong x (only five 1024-row windows were hashed). Now: exit 2
    naming the array and the first row block that changed; the result stays as it was."""
    arrays = full_data()
    data = prepare(tmp_path, fmt, arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before = (tmp_path / "result.report.json").read_bytes()
    changed = {key: value.copy() for key, value in arrays.items()}
    if fmt.startswith("csr") and name == "A":
        changed["A"][CHANGED_ROW, np.argmax(np.abs(changed["A"][CHANGED_ROW]))] += 1.0
    else:
        changed[name][CHANGED_ROW] += 1.0
        if not fmt.startswith("csr"):
            change_dense(data, name, CHANGED_ROW)
    grow(data, fmt, changed)
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    err = capsys.readouterr().err
    assert f"{data.name}:{name}: row block 3 (rows 9000..11999)" in err, err
    assert "run `rowfold run`" in err
    assert (tmp_path / "result.report.json").read_bytes() == before


@pytest.mark.parametrize("fmt", FORMATS)
def test_update_report_says_what_was_verified(tmp_path: Path, fmt: str) -> None:
    """Every old row is checked by default, from the stored chunk bytes where the chunk lies
    wholly inside the old rows, and decoded where it does not (the partial last chunk)."""
    arrays = full_data(61)
    data = prepare(tmp_path, fmt, arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    grow(data, fmt, arrays)
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    check = report(tmp_path)["prefix_check"]
    assert check["verify"] == "all"
    assert check["rows_checked"] == M and check["rows_before"] == M
    assert check["fraction_checked"] == 1.0 and check["rows_not_checked"] == 0
    assert check["blocks_checked"] == check["blocks"] == -(-M // BLOCK)
    assert set(check["inputs"]) == {"matrix", "rhs", "weights"}
    if not fmt.startswith("csr"):
        for entry in check["inputs"].values():
            assert entry["unit"] == "rows"
            # 40 whole chunks of 500 rows as stored; the 250 rows of the partial chunk decoded
            assert entry["stored_chunk_items"] == (M // CHUNK) * CHUNK
            assert entry["decoded_items"] == M % CHUNK
    else:  # every indptr entry of every block (one shared between neighbours) and 2 nnz
        nnz = int(np.count_nonzero(np.abs(arrays["A"][:M]) > 0.004))
        matrix = check["inputs"]["matrix"]
        assert matrix["unit"] == "elements"
        assert matrix["stored_chunk_items"] + matrix["decoded_items"] == M + 7 + 2 * nnz


def test_update_twice_checks_the_rows_the_first_update_added(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The digests an update records for the rows it added are checked by the next one."""
    arrays = full_data(62)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    grow(data, ".h5", arrays)
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    change_dense(data, "A", M + 10)  # one of the rows the update folded in
    append_dense(data, arrays, M + ADDED, M + 2 * ADDED)
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    assert f"rows {M}..{M + ADDED - 1}" in capsys.readouterr().err


def test_sampled_check_is_opt_in_and_reported_as_such(tmp_path: Path) -> None:
    """`update.verify: sample` checks a fraction of the old blocks (always the last one) and
    the report and warnings say how many rows were not checked."""
    arrays = full_data(63)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    grow(data, ".h5", arrays)
    overrides = ["--set", "update.verify=sample", "--set", "update.sample_fraction=0.25"]
    assert main(["--quiet", "update", str(job), "--inline", *overrides]) == 0
    found = report(tmp_path)
    check = found["prefix_check"]
    blocks = -(-M // BLOCK)
    assert check["verify"] == "sample" and check["sample_fraction"] == 0.25
    assert check["blocks_checked"] == 2 and blocks - 1 in check["checked_blocks"]
    assert 0 < check["rows_checked"] < M
    assert check["rows_not_checked"] == M - check["rows_checked"]
    assert any(f"{check['rows_not_checked']} of the {M} old rows" in w for w in found["warnings"])


def test_sampled_check_still_refuses_a_change_in_the_last_old_block(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    arrays = full_data(64)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    change_dense(data, "b", M - 1)
    grow(data, ".h5", arrays)
    capsys.readouterr()
    overrides = ["--set", "update.verify=sample", "--set", "update.sample_fraction=0.01"]
    assert main(["--quiet", "update", str(job), "--inline", *overrides]) == 2
    assert "obs.h5:b: row block 6 (rows 18000..20249)" in capsys.readouterr().err


def test_contiguous_hdf5_is_checked_by_decoded_rows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A contiguous dataset has no chunks to hash as stored: every row is decoded, the report
    says so, and a changed row is still found."""
    arrays = full_data(65)
    data = tmp_path / "obs.h5"

    def write(rows: int, bump: float = 0.0) -> None:
        with h5py.File(data, "w") as handle:
            for name, array in arrays.items():
                values = array[:rows].copy()
                values[CHANGED_ROW] += bump
                handle.create_dataset(name, data=values)  # contiguous

    write(M)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    write(M + ADDED)
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    entry = report(tmp_path)["prefix_check"]["inputs"]["matrix"]
    assert entry["stored_chunk_items"] == 0 and entry["decoded_items"] == M
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    write(M + 2 * ADDED, bump=1.0)  # the row changed in place, and more rows
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    assert "row block 3 (rows 9000..11999)" in capsys.readouterr().err


def test_update_refuses_when_the_chunk_layout_changed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Stored bytes under another chunking cannot be compared: refused, naming the layout."""
    arrays = full_data(66)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    with h5py.File(data, "w") as handle:
        for name, array in arrays.items():
            handle.create_dataset(name, data=array, chunks=(250, *array.shape[1:]))
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    err = capsys.readouterr().err
    assert "obs.h5:A" in err and "layout" in err and "[500, 4] -> [250, 4]" in err


def test_update_refuses_a_result_without_block_digests(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    arrays = full_data(67)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    with h5py.File(tmp_path / "result.h5", "a") as handle:
        for name in list(handle["state"]):
            if name.startswith("digest"):
                del handle["state"][name]
    grow(data, ".h5", arrays)
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    assert "no row-block digests" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("override", "key", "stored", "new"),
    [
        ("input.fixed_columns=[1]", "input.fixed_columns", "[0]", "[1]"),
        ("input.rhs=b2", "input.rhs", '"b"', '"b2"'),
        ("input.weights=w2", "input.weights", '"w"', '"w2"'),
        ("input.matrix=A2", "input.matrix", '"A"', '"A2"'),
        ("solve.scale_columns=true", "solve.scale_columns", "false", "true"),
        ("solve.rank_tolerance=0.001", "solve.rank_tolerance", "null", "0.001"),
        ("method.precision=native", "method.precision", '"float64"', '"native"'),
    ],
)
def test_update_refuses_another_answer_changing_key(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    override: str,
    key: str,
    stored: str,
    new: str,
) -> None:
    """Before: `update --set input.fixed_columns=[1]` exited 0 with a wrong x. Now every key
    that changes the answer must equal the stored one, or exit 2 names key and both values."""
    arrays = full_data(68)
    extra = {"A2": arrays["A"] * 2, "b2": arrays["b"] * 2, "w2": arrays["w"] * 2}
    data = tmp_path / "obs.h5"
    write_dense(data, {**arrays, **extra}, M)
    job = job_file(tmp_path, data, input={"fixed_columns": [0]})
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before = (tmp_path / "result.h5").read_bytes()
    append_dense(data, {**arrays, **extra}, M, M + ADDED)
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline", "--set", override]) == 2
    err = capsys.readouterr().err
    assert f"key '{key}'" in err and stored in err and new in err, err
    assert (tmp_path / "result.h5").read_bytes() == before


def test_update_accepts_keys_that_do_not_change_the_answer(tmp_path: Path) -> None:
    """rows_per_block, the method and the outputs asked for may differ from the stored run."""
    arrays = full_data(69)
    data = prepare(tmp_path, ".h5", arrays)
    job = job_file(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    grow(data, ".h5", arrays)
    overrides = ["input.rows_per_block=1700", "method.name=cholqr2", "solve.covariance=true"]
    args = [arg for item in overrides for arg in ("--set", item)]
    assert main(["--quiet", "update", str(job), "--inline", *args]) == 0
    assert report(tmp_path)["prefix_check"]["rows_checked"] == M


# ---------------------------------------------------------------- run --resume


def checkpointed_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> tuple[Path, Path]:
    """A finished tsqr run whose checkpoints are left in place (as a killed run leaves them)."""
    arrays = full_data(70)
    data = tmp_path / "obs.h5"
    write_dense(data, arrays, M)
    job = job_file(tmp_path, data)
    with monkeypatch.context() as patch:
        patch.setattr(runner, "close_checkpoints", lambda output: None)
        assert main(["--quiet", "run", str(job), "--inline"]) == 0
    folder = tmp_path / ".rowfold-checkpoints-result.h5"
    assert len(list(folder.glob("tsqr-leaf-*.npz"))) == -(-M // BLOCK)
    return job, folder


def weighted_reference(data: Path) -> np.ndarray:
    with h5py.File(data, "r") as handle:
        A, w = handle["A"][...], handle["w"][...]
    return lapack_r(A * np.sqrt(w)[:, None])


def assert_r_of(tmp_path: Path) -> None:
    """The stored R is that of the rows on disk now, within the perturbation bound of R."""
    R = storage.read_result(tmp_path / "result.h5")["R"]
    reference = weighted_reference(tmp_path / "obs.h5")
    kappa = float(np.linalg.cond(reference))
    error = np.linalg.norm(R - reference) / np.linalg.norm(reference, 2)
    assert error <= bounds.r_factor(N, kappa), error  # Sun 1991; Chang, Paige, Stewart 1997


def test_resume_recomputes_a_block_whose_rows_changed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Before: R 86% off and exit 0 (the stale checkpoint was trusted). Now: that block is
    recomputed, the others are reused, and a warning names the checkpoint."""
    job, _ = checkpointed_run(tmp_path, monkeypatch)
    change_dense(tmp_path / "obs.h5", "A", CHANGED_ROW)
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    assert_r_of(tmp_path)
    found = report(tmp_path)
    assert found["method_details"]["resumed_blocks"] == -(-M // BLOCK) - 1
    assert any("tsqr-leaf-0000003.npz" in w and "rows 9000..11999" in w for w in found["warnings"])


def test_resume_discards_a_tampered_checkpoint(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    job, folder = checkpointed_run(tmp_path, monkeypatch)
    target = folder / "tsqr-leaf-0000002.npz"
    with np.load(target) as saved:
        arrays = {name: saved[name] for name in saved.files}
    arrays["R"] = arrays["R"] * 3.0
    with open(target, "wb") as handle:
        np.savez(handle, **arrays)
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    assert_r_of(tmp_path)
    found = report(tmp_path)
    assert any("tsqr-leaf-0000002.npz" in w and "digest" in w for w in found["warnings"])
    assert found["method_details"]["resumed_blocks"] == -(-M // BLOCK) - 1


def test_resume_discards_a_corrupt_checkpoint(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Before: exit 4 without naming the file, on every later resume. Now: a warning naming
    it, the block recomputed, exit 0."""
    job, folder = checkpointed_run(tmp_path, monkeypatch)
    target = folder / "tsqr-leaf-0000004.npz"
    target.write_bytes(target.read_bytes()[:100])
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    assert_r_of(tmp_path)
    assert any("tsqr-leaf-0000004.npz" in w for w in report(tmp_path)["warnings"])


def test_checkpoint_write_never_follows_a_planted_symlink(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A symlink planted at the temporary name the first version wrote a checkpoint through
    leaves its target untouched."""
    job, folder = checkpointed_run(tmp_path, monkeypatch)
    victim = tmp_path / "victim.txt"
    victim.write_text("keep me", encoding="utf-8")
    (folder / "tsqr-leaf-0000001.npz").unlink()  # so block 1 is computed and saved again
    (folder / f".tmp-{os.getpid()}-tsqr-leaf-0000001.npz").symlink_to(victim)
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    assert victim.read_text(encoding="utf-8") == "keep me"
    assert_r_of(tmp_path)


def test_manifest_write_never_follows_a_planted_symlink(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    job, folder = checkpointed_run(tmp_path, monkeypatch)
    victim = tmp_path / "victim.json"
    victim.write_bytes((folder / "manifest.json").read_bytes())
    written = victim.stat().st_mtime_ns
    (folder / "manifest.json").unlink()
    (folder / "manifest.json").symlink_to(victim)
    os.utime(victim, ns=(written - 10**9, written - 10**9))
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    assert victim.stat().st_mtime_ns == written - 10**9
    assert_r_of(tmp_path)


def test_checkpoint_folder_planted_as_a_symlink_is_not_written_through(
    tmp_path: Path,
) -> None:
    arrays = full_data(71)
    data = tmp_path / "obs.h5"
    write_dense(data, arrays, M)
    job = job_file(tmp_path, data)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (tmp_path / ".rowfold-checkpoints-result.h5").symlink_to(elsewhere)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert list(elsewhere.iterdir()) == []
    assert_r_of(tmp_path)
