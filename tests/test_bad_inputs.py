"""The catalogue of bad inputs: each gives its exit status and one stderr line naming the
file, key, row block or row, and leaves any earlier result byte-identical (SPEC.md,
"Command line": 2 = invalid, nothing written; 4 = failed while running, nothing replaced)."""

from __future__ import annotations

import errno
import hashlib
from collections.abc import Callable
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from rowfold.cli import main
from rowfold.storage import ResultWriter, write_arrays


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


CATALOGUE: list[tuple[str, Callable[[Path], Path], tuple[str, ...]]] = [
    ("a-not-2d", not_2d, ("in.h5:A", "2-D")),
    ("empty-matrix", empty, ("in.h5:A", "empty")),
    ("m-less-than-n", wider_than_tall, ("in.h5:A", "3 x 5")),
    ("nan-in-rhs", nan_in_b, ("in.h5:b", "row block 2", "row 42")),
    ("inf-in-matrix", inf_in_a, ("in.h5:A", "row block 3", "row 77")),
    ("corrupted-chunk", corrupted_chunk, ("in.h5:A", "rows ")),
    ("output-folder-missing", output_folder_missing, ("does not exist",)),
    ("output-parent-is-a-file", output_parent_is_a_file, ("plain",)),
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
