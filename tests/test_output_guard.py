"""What an output may replace, and the temporary names beside it.

An output equal to an input (also through a link or a hard link), inside an input store or
holding the input, an existing output that is not a rowfold result, and a file at a report
path that is not a rowfold report, are refused with exit 2 and one line naming the path, by
``run``, ``update`` and ``check`` alike, before any data is read; the input (or that file)
stays byte-identical. Temporary names are created exclusively with random
parts, so links planted at the names the earlier code predicted (``.rowfold-tmp-<pid>-...``)
are never written through, and clean-up removes links, never what they point to.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import yaml

from rowfold.cli import main
from rowfold.storage import describe_path, write_arrays, write_text_atomic


def tree_digest(path: Path) -> str:
    """sha256 over the names and bytes of a file or a folder tree."""
    sha = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for item in files:
        sha.update(str(item.relative_to(path.parent)).encode())
        sha.update(item.read_bytes())
    return sha.hexdigest()


def is_result(path: Path) -> bool:
    """A rowfold result carries the rowfold_version attribute (README, "Outputs")."""
    return "rowfold_version" in describe_path(path)["attrs"]


def make_input(folder: Path, name: str) -> Path:
    rng = np.random.default_rng(11)
    A = rng.standard_normal((120, 4))
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    write_arrays(path, {"A": A, "b": A @ np.ones(4)}, chunk_rows=40)
    return path


def job_file(folder: Path, data: Path, output: str | Path, method: str = "tsqr") -> Path:
    job = {
        "input": {"path": str(data), "matrix": "A", "rhs": "b", "rows_per_block": 40},
        "method": {"name": method},
        "output": {"path": str(output), "overwrite": True},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def same_h5(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    return data, data, data


def same_zarr(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.zarr")
    return data, data, data


def link_to_input(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    (folder / "latest.h5").symlink_to(data)
    return data, folder / "latest.h5", data


def hard_link_to_input(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    os.link(data, folder / "copy.h5")
    return data, folder / "copy.h5", data


def inside_input_store(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.zarr")
    return data, data / "result.h5", data


def input_inside_output(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "bundle.zarr/obs.h5")
    return data, folder / "bundle.zarr", folder / "bundle.zarr"


def unrelated_folder(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    other = folder / "photos.zarr"
    (other / "2024").mkdir(parents=True)
    (other / "2024" / "ridge.jpg").write_bytes(b"\xff\xd8 not a result")
    return data, other, other


def unrelated_hdf5(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    other = make_input(folder, "survey.h5")  # an HDF5 file, but not a rowfold result
    return data, other, other


def foreign_json_report(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    notes = folder / "fit.report.json"
    notes.write_text('{"ridge": "levelling notes, season 3"}')
    return data, folder / "fit.h5", notes


def foreign_html_report(folder: Path) -> tuple[Path, Path, Path]:
    data = make_input(folder, "obs.h5")
    page = folder / "fit.report.html"
    page.write_text("<html><title>Fen board minutes</title></html>")
    return data, folder / "fit.zarr", page


CASES: list[tuple[str, Callable[[Path], tuple[Path, Path, Path]], str]] = [
    ("output-is-the-hdf5-input", same_h5, "is the input"),
    ("output-is-the-zarr-input", same_zarr, "is the input"),
    ("output-links-to-the-input", link_to_input, "is the input"),
    ("output-is-a-hard-link-of-the-input", hard_link_to_input, "is the input"),
    ("output-inside-the-input-store", inside_input_store, "lies inside the input store"),
    ("input-inside-the-output", input_inside_output, "lies inside output.path"),
    ("unrelated-folder-at-a-zarr-output", unrelated_folder, "is not a rowfold result"),
    ("unrelated-hdf5-at-the-output", unrelated_hdf5, "is not a rowfold result"),
    ("unrelated-json-at-the-report-path", foreign_json_report, "is not a rowfold report"),
    ("unrelated-html-at-the-report-path", foreign_html_report, "is not a rowfold report"),
]


@pytest.mark.parametrize("verb", ["check", "run", "update"])
@pytest.mark.parametrize(("case", "build", "words"), CASES, ids=[c[0] for c in CASES])
def test_output_that_would_destroy_something_is_refused(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    verb: str,
    case: str,
    build: Callable[[Path], tuple[Path, Path, Path]],
    words: str,
) -> None:
    data, output, kept = build(tmp_path)
    job = job_file(tmp_path, data, output)
    before = tree_digest(kept)
    log = tmp_path / "reads.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    capsys.readouterr()
    args = ["--quiet", verb, str(job)] + (["--inline"] if verb != "check" else [])
    status = main(args)
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2, err
    assert len(err) == 1 and words in err[0] and output.name in err[0], err
    assert tree_digest(kept) == before
    reads = log.read_text().splitlines() if log.exists() else []
    assert not [line for line in reads if line.startswith("data")], "data read before refusing"
    litter = [p.name for p in tmp_path.rglob(".rowfold-*")]
    assert litter == []


def test_an_earlier_result_is_still_replaced(tmp_path: Path) -> None:
    """The guard lets a rowfold result be replaced, at a Zarr output too."""
    data = make_input(tmp_path, "obs.h5")
    job = job_file(tmp_path, data, tmp_path / "fit.zarr")
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert is_result(tmp_path / "fit.zarr")
    assert main(["--quiet", "check", str(job)]) == 0
    assert main(["--quiet", "run", str(job), "--inline"]) == 0


# ---------------------------------------------------------------- planted links


def test_links_planted_at_predictable_temporary_names_are_not_followed(tmp_path: Path) -> None:
    """Links at the names the earlier code used for this process (store, report, scratch)
    must not receive the result: the victims stay as they were and the output is a real
    file. bcgs2 uses the scratch folder."""
    data = make_input(tmp_path, "obs.h5")
    job = job_file(tmp_path, data, tmp_path / "out.h5", method="bcgs2")
    victims = tmp_path / "elsewhere"
    victims.mkdir()
    store_victim, report_victim, folder_victim = (
        victims / "ledger.h5",
        victims / "notes.txt",
        victims / "box",
    )
    store_victim.write_bytes(b"precious ledger")
    report_victim.write_text("precious notes")
    folder_victim.mkdir()
    pid = os.getpid()
    for name, target in [
        (f".rowfold-tmp-{pid}-out.h5", store_victim),
        (f".rowfold-tmp-{pid}-out.report.json", report_victim),
        (f".rowfold-tmp-{pid}-out.report.html", report_victim),
        (f".rowfold-tmp-{pid}-work-out.h5", folder_victim),
    ]:
        (tmp_path / name).symlink_to(target)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert store_victim.read_bytes() == b"precious ledger"
    assert report_victim.read_text() == "precious notes"
    assert list(folder_victim.iterdir()) == []
    out = tmp_path / "out.h5"
    assert not out.is_symlink() and is_result(out)
    assert not (tmp_path / "out.report.json").is_symlink()


def test_clean_up_removes_planted_links_not_their_targets(tmp_path: Path) -> None:
    """Links under names recovery cleans (a staging folder, a set-aside old store) point
    at a folder of someone's files: the links go, the files stay."""
    data = make_input(tmp_path, "obs.h5")
    job = job_file(tmp_path, data, tmp_path / "out.zarr")
    victim = tmp_path / "archive"
    victim.mkdir()
    (victim / "keep.txt").write_text("keep me")
    (tmp_path / ".rowfold-stage-0123456789abcdef-out.zarr").symlink_to(victim)
    (tmp_path / ".rowfold-work-0123456789abcdef-out.zarr").symlink_to(victim)
    (tmp_path / ".rowfold-old-4242-out.zarr").symlink_to(victim)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert (victim / "keep.txt").read_text() == "keep me"
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".rowfold-")) == []
    assert is_result(tmp_path / "out.zarr") and not (tmp_path / "out.zarr").is_symlink()


def test_write_text_atomic_does_not_follow_a_planted_link(tmp_path: Path) -> None:
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    (tmp_path / f".rowfold-tmp-{os.getpid()}-table.json").symlink_to(victim)
    write_text_atomic(tmp_path / "table.json", "{}\n")
    assert victim.read_text() == "precious"
    assert (tmp_path / "table.json").read_text() == "{}\n"


def test_scratch_array_refuses_a_linked_folder(tmp_path: Path) -> None:
    from rowfold.errors import RunError
    from rowfold.storage.work import create_work_array

    victim = tmp_path / "box"
    victim.mkdir()
    (tmp_path / "scratch").symlink_to(victim)
    with pytest.raises(RunError, match="link"):
        create_work_array(tmp_path / "scratch", "Q", 10, 3, np.float64, 5)
    assert list(victim.iterdir()) == []


def test_a_link_planted_at_the_lock_file_is_refused_not_followed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The lock file has a fixed name (it must, to be found): a link there is refused with
    exit 2 naming it, and its target stays as it was."""
    data = make_input(tmp_path, "obs.h5")
    job = job_file(tmp_path, data, tmp_path / "out.h5")
    victim = tmp_path / "diary.txt"
    victim.write_text("precious diary")
    (tmp_path / ".rowfold-lock-out.h5").symlink_to(victim)
    capsys.readouterr()
    assert main(["--quiet", "run", str(job), "--inline"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and ".rowfold-lock-out.h5 is a symbolic link" in err[0], err
    assert victim.read_text() == "precious diary"
    assert not (tmp_path / "out.h5").exists()
