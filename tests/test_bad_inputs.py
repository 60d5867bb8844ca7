"""The catalogue of bad inputs: each gives its exit status and one stderr line naming the
file, key, row block or row, and leaves any earlier result byte-identical (SPEC.md,
"Command line": 2 = invalid, nothing written; 4 = failed while running, nothing replaced)."""

from __future__ import annotations

import errno
import hashlib
import os
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import yaml
import zarr

from rowfold.cli import main
from rowfold.storage import ResultWriter, write_arrays

from support import U, lapack_r


def make(folder: Path, A: np.ndarray, b: np.ndarray, output: str = "out.h5") -> Path:
    write_arrays(folder / "in.h5", {"A": A, "b": b}, chunk_rows=16)
    job = {
        "input": {"path": "in.h5", "matrix": "A", "rhs": "b", "rows_per_block": 20},
        "output": {"path": output, "overwrite": True},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def good() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(81)
    return rng.standard_normal((100, 4)), rng.standard_normal(100)


def run(capsys: pytest.CaptureFixture[str], job: Path) -> tuple[int, str]:
    capsys.readouterr()
    status = main(["--quiet", "run", str(job), "--inline"])
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("rowfold: ") and "Traceback" not in err[0], err
    return status, err[0]


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def not_2d(folder: Path) -> Path:
    A, b = good()
    return make(folder, A[:, 0], b)


def empty(folder: Path) -> Path:
    return make(folder, np.zeros((0, 4)), np.zeros(0))


def nan_in_b(folder: Path) -> Path:
    A, b = good()
    b[42] = np.nan
    return make(folder, A, b)


def inf_in_a(folder: Path) -> Path:
    A, b = good()
    A[77, 1] = -np.inf
    return make(folder, A, b)


def wider_than_tall(folder: Path) -> Path:
    rng = np.random.default_rng(1)
    return make(folder, rng.standard_normal((3, 5)), np.ones(3))


def output_folder_missing(folder: Path) -> Path:
    A, b = good()
    return make(folder, A, b, output="no/such/folder/out.h5")


def output_parent_is_a_file(folder: Path) -> Path:
    A, b = good()
    (folder / "plain").write_text("x")
    return make(folder, A, b, output="plain/out.h5")


def corrupted_chunk(folder: Path) -> Path:
    """A gzip-compressed chunk overwritten with garbage: HDF5 cannot decode it."""
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "w") as handle:
        handle.create_dataset("A", data=A, chunks=(16, 4), compression="gzip")
        handle.create_dataset("b", data=b)
        info = handle["A"].id.get_chunk_info(3)
    with open(folder / "in.h5", "r+b") as raw:
        raw.seek(info.byte_offset)
        raw.write(b"\xff" * info.size)
    return job


def with_keys(job: Path, **sections: dict[str, Any]) -> Path:
    """Merge keys into the sections of a job file (e.g. ``solve={"flag_above": 1}``)."""
    data = yaml.safe_load(job.read_text(encoding="utf-8"))
    for section, values in sections.items():
        data.setdefault(section, {}).update(values)
    job.write_text(yaml.safe_dump(data), encoding="utf-8")
    return job


def zarr_input(folder: Path, zarr_format: int, weights: bool = False) -> Path:
    """The good A and b (and weights) as a Zarr store of 16-row chunks, and its job."""
    A, b = good()
    group = zarr.open_group(str(folder / "in.zarr"), mode="w", zarr_format=zarr_format)
    arrays = {"A": A, "b": b, **({"w": np.full(A.shape[0], 2.0)} if weights else {})}
    for name, array in arrays.items():
        created = group.create_array(
            name, shape=array.shape, dtype=array.dtype, chunks=(16, *array.shape[1:])
        )
        created[...] = array
    job = {
        "input": {"path": "in.zarr", "matrix": "A", "rhs": "b", "rows_per_block": 20},
        "output": {"path": "out.h5", "overwrite": True},
    }
    if weights:
        job["input"]["weights"] = "w"
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def drop(store: Path, key: str) -> None:
    """Delete one chunk object (a file) of a Zarr store, as a partial copy would."""
    target = store / key
    assert target.is_file(), f"{key} is not a chunk of {store}"
    target.unlink()


def zarr2_chunk_of_a_missing(folder: Path) -> Path:
    job = zarr_input(folder, 2)
    drop(folder / "in.zarr", "A/3.0")
    return job


def zarr3_chunk_of_a_missing(folder: Path) -> Path:
    job = zarr_input(folder, 3)
    drop(folder / "in.zarr", "A/c/3/0")
    return job


def zarr3_shard_of_a_missing(folder: Path) -> Path:
    """A sharded v3 array (8-row chunks in 32-row shards) that lost its second shard."""
    job = zarr_input(folder, 3)
    A, _ = good()
    group = zarr.open_group(str(folder / "in.zarr"), mode="a")
    created = group.create_array(
        "A", shape=A.shape, dtype=A.dtype, chunks=(8, 4), shards=(32, 4), overwrite=True
    )
    created[...] = A
    drop(folder / "in.zarr", "A/c/1/0")
    return job


def zarr3_chunk_of_rhs_missing(folder: Path) -> Path:
    job = zarr_input(folder, 3)
    drop(folder / "in.zarr", "b/c/5")
    return job


def zarr2_chunk_of_weights_missing(folder: Path) -> Path:
    job = zarr_input(folder, 2, weights=True)
    drop(folder / "in.zarr", "w/1")
    return job


def csr_input(folder: Path, zarr_format: int) -> Path:
    """A 100 x 4 CSR group with two values a row in 16-entry chunks, and its job."""
    rng = np.random.default_rng(5)
    rows = 100
    indptr = np.arange(0, 2 * rows + 1, 2, dtype=np.int64)
    indices = np.stack([np.zeros(rows, int), rng.integers(1, 4, rows)], axis=1).ravel()
    group = zarr.open_group(str(folder / "in.zarr"), mode="w", zarr_format=zarr_format)
    matrix = group.require_group("S")
    matrix.attrs["shape"] = [rows, 4]
    arrays = {
        "S/data": rng.standard_normal(2 * rows),
        "S/indices": indices.astype(np.int64),
        "S/indptr": indptr,
        "b": rng.standard_normal(rows),
    }
    for name, array in arrays.items():
        created = group.create_array(name, shape=array.shape, dtype=array.dtype, chunks=(16,))
        created[...] = array
    job = {
        "input": {"path": "in.zarr", "matrix": "S", "rhs": "b", "rows_per_block": 20},
        "output": {"path": "out.h5", "overwrite": True},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def csr_chunk_of_data_missing(folder: Path) -> Path:
    job = csr_input(folder, 3)
    drop(folder / "in.zarr", "S/data/c/4")  # entries 64..79: rows 32..39
    return job


def csr_chunk_of_indices_missing(folder: Path) -> Path:
    job = csr_input(folder, 2)
    drop(folder / "in.zarr", "S/indices/7")  # entries 112..127: rows 56..63 (a block may hold part)
    return job


def csr_chunk_of_indptr_missing(folder: Path) -> Path:
    job = csr_input(folder, 3)
    drop(folder / "in.zarr", "S/indptr/c/2")  # offsets 32..47: rows 32..47
    return job


def hdf5_chunk_never_written(folder: Path) -> Path:
    """A chunked dataset grown to 100 rows whose rows 48..63 were never written."""
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "w") as handle:
        created = handle.create_dataset("A", shape=A.shape, chunks=(16, 4), dtype=A.dtype)
        created[:48] = A[:48]
        created[64:] = A[64:]
        handle.create_dataset("b", data=b)
    return job


def hdf5_dataset_never_written(folder: Path) -> Path:
    """A contiguous dataset created with its shape and never written."""
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "w") as handle:
        handle.create_dataset("A", shape=A.shape, dtype=A.dtype)
        handle.create_dataset("b", data=b)
    return job


def input_is_a_broken_link(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    (folder / "in.h5").rename(folder / "elsewhere.h5")
    os.symlink("moved-away.h5", folder / "in.h5")
    return job


def zarr_array_is_a_broken_link(folder: Path) -> Path:
    job = zarr_input(folder, 3)
    shutil.rmtree(folder / "in.zarr" / "A")
    os.symlink(folder / "archive" / "A", folder / "in.zarr" / "A")
    return job


def hdf5_soft_link_broken(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "a") as handle:
        handle["kept"] = handle["A"]
        del handle["A"]
        handle["A"] = h5py.SoftLink("/old/A")
    return job


def hdf5_external_link_broken(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "a") as handle:
        del handle["A"]
        handle["A"] = h5py.ExternalLink("night-2.h5", "/A")
    return job


def output_is_a_directory(folder: Path) -> Path:
    A, b = good()
    (folder / "res.h5").mkdir()
    return make(folder, A, b, output="res.h5")


def zarr_output_is_a_file(folder: Path) -> Path:
    A, b = good()
    (folder / "res.zarr").write_text("x")
    return make(folder, A, b, output="res.zarr")


def huge_sketch(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    return with_keys(job, method={"name": "rcholqr", "sketch_rows": 100_000_000})


def sketch_below_columns(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    return with_keys(job, method={"name": "rcholqr", "sketch_rows": 3})


def infinite_flag_above(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), solve={"residuals": True, "flag_above": float("inf")})


def significance_one(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), solve={"alpha": 1.0})


def sigma0_zero(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), solve={"residuals": True, "sigma0": 0})


def rank_tolerance_ten(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), solve={"rank_tolerance": 10})


def address_not_a_url(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), cluster={"address": "not a url"})


def absurd_worker_count(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), cluster={"workers": 100_000})


def names_too_few(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), input={"parameter_names": ["a", "b", "c"]})


def names_repeated(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), input={"parameter_names": ["a", "b", "a", "d"]})


def names_dataset_too_long(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "a") as handle:
        handle.create_dataset("names", data=["p", "q", "r", "s", "t"], dtype=h5py.string_dtype())
    return with_keys(job, input={"parameter_names": "names"})


def names_dataset_of_numbers(folder: Path) -> Path:
    A, b = good()
    job = make(folder, A, b)
    with h5py.File(folder / "in.h5", "a") as handle:
        handle.create_dataset("names", data=np.arange(4.0))
    return with_keys(job, input={"parameter_names": "names"})


def names_dataset_missing(folder: Path) -> Path:
    A, b = good()
    return with_keys(make(folder, A, b), input={"parameter_names": "labels"})


CATALOGUE: list[tuple[str, Callable[[Path], Path], tuple[str, ...]]] = [
    ("a-not-2d", not_2d, ("in.h5:A", "2-D")),
    ("empty-matrix", empty, ("in.h5:A", "empty")),
    ("m-less-than-n", wider_than_tall, ("in.h5:A", "3 x 5")),
    ("nan-in-rhs", nan_in_b, ("in.h5:b", "row block 2", "row 42")),
    ("inf-in-matrix", inf_in_a, ("in.h5:A", "row block 3", "row 77")),
    ("corrupted-chunk", corrupted_chunk, ("in.h5:A", "rows ")),
    ("output-folder-missing", output_folder_missing, ("does not exist",)),
    ("output-parent-is-a-file", output_parent_is_a_file, ("plain",)),
    # a chunk missing from the store would read as the fill value (input.missing_chunks)
    ("zarr2-chunk-missing", zarr2_chunk_of_a_missing, ("in.zarr:A", "chunk 3.0", "rows 48..63")),
    ("zarr3-chunk-missing", zarr3_chunk_of_a_missing, ("in.zarr:A", "chunk c/3/0", "rows 48..63")),
    ("rhs-chunk-missing", zarr3_chunk_of_rhs_missing, ("in.zarr:b", "chunk c/5", "rows 80..95")),
    ("weights-chunk-missing", zarr2_chunk_of_weights_missing, ("in.zarr:w", "chunk 1", "rows 16")),
    ("zarr3-shard-missing", zarr3_shard_of_a_missing, ("in.zarr:A", "chunk c/1/0", "rows 32..63")),
    ("csr-data-missing", csr_chunk_of_data_missing, ("in.zarr:S/data", "chunk c/4", "rows 32..39")),
    (
        "csr-indices-missing",
        csr_chunk_of_indices_missing,
        ("S/indices", "chunk 7", "entries 1", ", rows "),
    ),
    ("csr-indptr-missing", csr_chunk_of_indptr_missing, ("S/indptr", "chunk c/2", "rows 32..")),
    ("hdf5-chunk-unwritten", hdf5_chunk_never_written, ("in.h5:A", "chunk", "rows 48..63")),
    ("hdf5-never-written", hdf5_dataset_never_written, ("in.h5:A", "never written")),
    # links that point nowhere say so, and where they point
    ("input-broken-link", input_is_a_broken_link, ("input.path", "broken", "moved-away.h5")),
    ("zarr-array-broken-link", zarr_array_is_a_broken_link, ("in.zarr:A", "broken", "archive")),
    ("hdf5-soft-link-broken", hdf5_soft_link_broken, ("in.h5:A", "soft link", "/old/A")),
    ("hdf5-external-link-broken", hdf5_external_link_broken, ("in.h5:A", "night-2.h5")),
    # refused before any compute, naming the key and its line
    ("output-is-a-directory", output_is_a_directory, ("job.yaml line", "output.path", "folder")),
    ("zarr-output-is-a-file", zarr_output_is_a_file, ("job.yaml line", "output.path", "file")),
    ("sketch-rows-huge", huge_sketch, ("job.yaml line", "method.sketch_rows", "100000000")),
    ("sketch-rows-below-n", sketch_below_columns, ("job.yaml line", "method.sketch_rows", "4")),
    ("flag-above-inf", infinite_flag_above, ("job.yaml line", "solve.flag_above", "finite")),
    ("rank-tolerance-10", rank_tolerance_ten, ("job.yaml line", "solve.rank_tolerance")),
    ("alpha-one", significance_one, ("job.yaml line", "solve.alpha", "between 0 and 1")),
    ("sigma0-zero", sigma0_zero, ("job.yaml line", "solve.sigma0", "positive")),
    ("address-not-a-url", address_not_a_url, ("job.yaml line", "cluster.address", "not a url")),
    ("workers-100000", absurd_worker_count, ("job.yaml line", "cluster.workers", "cores")),
    # parameter names: one distinct text per input column
    ("names-too-few", names_too_few, ("job.yaml line", "input.parameter_names", "3 names", "4")),
    ("names-repeated", names_repeated, ("input.parameter_names", "'a' is entries 0 and 2")),
    ("names-dataset-long", names_dataset_too_long, ("dataset in.h5:names", "5 names", "4")),
    ("names-not-text", names_dataset_of_numbers, ("in.h5:names", "must be text")),
    ("names-dataset-missing", names_dataset_missing, ("in.h5", "'labels' not found")),
]


@pytest.mark.parametrize(("case", "build", "words"), CATALOGUE, ids=[c[0] for c in CATALOGUE])
def test_bad_input_exits_2_with_one_line(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    case: str,
    build: Callable[[Path], Path],
    words: tuple[str, ...],
) -> None:
    job = build(tmp_path)
    status, line = run(capsys, job)
    assert status == 2, line
    for word in words:
        assert word in line, (word, line)
    assert not (tmp_path / "out.h5").exists()
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".rowfold-")]


def test_all_zero_column_is_legal_and_reported_as_rank_deficient(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = good()
    A[:, 2] = 0.0
    job = make(tmp_path, A, b)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert "rank 3" in capsys.readouterr().out


def test_disk_full_while_writing_keeps_the_previous_result(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """ENOSPC in the middle of writing: exit 4, one line, the earlier result untouched."""
    A, b = good()
    job = make(tmp_path, A, b)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before = digest(tmp_path / "out.h5")
    original = ResultWriter.put

    def full(self: ResultWriter, name: str, array: np.ndarray) -> None:
        if name == "x_stderr":
            raise OSError(errno.ENOSPC, "No space left on device")
        original(self, name, array)

    monkeypatch.setattr(ResultWriter, "put", full)
    status, line = run(capsys, job)
    assert status == 4
    assert "No space left on device" in line and "previous result is kept" in line
    assert digest(tmp_path / "out.h5") == before
    temporary = (".rowfold-stage-", ".rowfold-work-", ".rowfold-lock-")  # storage/commit.py
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(temporary)]


def test_missing_chunks_fill_value_reads_the_fill_value(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """input.missing_chunks: fill_value: a left-out chunk is read as its fill value (zeros),
    and R is that of the matrix with those rows zero (Trefethen & Bau Thm 7.2 uniqueness,
    to a kappa u perturbation bound as in test_cluster.py; kappa of this A is about 2)."""
    job = with_keys(zarr3_chunk_of_a_missing(tmp_path), input={"missing_chunks": "fill_value"})
    status = main(["--quiet", "run", str(job), "--inline"])
    assert status == 0, capsys.readouterr().err
    A, _ = good()
    A[48:64] = 0.0
    with h5py.File(tmp_path / "out.h5", "r") as store:
        R = store["R"][...]
    kappa = np.linalg.cond(A)
    assert np.linalg.norm(R - lapack_r(A)) <= 100 * 4 * kappa * U * np.linalg.norm(A)


@pytest.mark.parametrize("suffix", [".zarr", ".h5"])
def test_chunks_equal_to_the_fill_value_are_written_by_rowfold(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], suffix: str
) -> None:
    """write_arrays keeps every chunk, also one equal to the fill value, so its stores pass
    the missing-chunk check (zarr leaves such chunks out unless told otherwise)."""
    A, b = good()
    A[48:64] = 0.0
    b[48:64] = 0.0
    write_arrays(tmp_path / f"in{suffix}", {"A": A, "b": b}, chunk_rows=16)
    job = tmp_path / "job.yaml"
    job.write_text(
        yaml.safe_dump(
            {
                "input": {"path": f"in{suffix}", "matrix": "A", "rhs": "b"},
                "output": {"path": "out.h5", "overwrite": True},
            }
        ),
        encoding="utf-8",
    )
    assert main(["--quiet", "run", str(job), "--inline"]) == 0, capsys.readouterr().err
