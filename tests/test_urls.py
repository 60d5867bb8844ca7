"""Zarr inputs by fsspec URL (``memory://``, ``file://``) and as zip stores (``.zarr.zip``);
output URLs refused with one line; storage option values never recorded.

``memory://`` is fsspec's in-process file system: it goes through the same code path as
``s3://`` or ``gs://`` (zarr's fsspec store opened from the URL and the storage options by the
task that reads), without a server. Each test uses its own memory folder and removes it.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from rowfold.cli import main
from rowfold.storage import read_result, write_arrays

import bounds
from support import S3_SECRET as SECRET
from support import S3Server, prescribed

ROWS, COLS, CHUNK = 600, 5, 100
KAPPA = 1e4
TOKEN = "fake-token-51d2e8"


@pytest.fixture
def memory_folder() -> Iterator[str]:
    """A fresh folder of fsspec's in-process memory file system, removed afterwards."""
    import fsspec

    folder = f"/rowfold-tests/{uuid.uuid4().hex[:12]}"
    fs = fsspec.filesystem("memory")
    yield folder
    if fs.exists(folder):
        fs.rm(folder, recursive=True)


def problem(rows: int = ROWS) -> tuple[np.ndarray, np.ndarray]:
    A = prescribed(ROWS, COLS, KAPPA, seed=11)
    rng = np.random.default_rng(12)
    b = A @ rng.standard_normal(COLS) + 1e-3 * rng.standard_normal(ROWS)
    return A[:rows], b[:rows]


def write_zarr_at(location: str, arrays: dict[str, np.ndarray]) -> None:
    """Write arrays into a Zarr store at a URL or into a zip store (chunked like
    :func:`rowfold.storage.write_arrays`, every chunk stored)."""
    import zarr
    from zarr.storage import ZipStore

    zip_store = ZipStore(location, mode="w") if location.endswith(".zarr.zip") else None
    group = zarr.open_group(store=zip_store or location, mode="w")
    for name, array in arrays.items():
        created = group.create_array(
            name,
            shape=array.shape,
            dtype=array.dtype,
            chunks=(CHUNK, *array.shape[1:]),
            config={"write_empty_chunks": True},
        )
        created[...] = array
    if zip_store is not None:
        zip_store.close()


def job_file(folder: Path, path: str, **input_keys: Any) -> Path:
    job = {
        "name": "survey-url",
        "input": {"path": path, "matrix": "obs/A", "rhs": "obs/b", **input_keys},
        "method": {"name": "tsqr"},
        "output": {"path": str(folder / "out.zarr"), "overwrite": True},
    }
    target = folder / "job.yaml"
    target.write_text(yaml.safe_dump(job), encoding="utf-8")
    return target


def place_input(kind: str, tmp_path: Path, memory: str, A: np.ndarray, b: np.ndarray) -> str:
    """Write the input as ``kind`` and return what input.path names."""
    arrays = {"obs/A": A, "obs/b": b}
    if kind == "memory":
        write_zarr_at(f"memory://{memory}/obs.zarr", arrays)
        return f"memory://{memory}/obs.zarr"
    if kind == "zip":
        write_zarr_at(str(tmp_path / "obs.zarr.zip"), arrays)
        return "obs.zarr.zip"
    write_arrays(tmp_path / "obs.zarr", arrays, chunk_rows=CHUNK)
    return (tmp_path / "obs.zarr").as_uri() if kind == "file" else "obs.zarr"


def assert_solves(x: np.ndarray, A: np.ndarray, b: np.ndarray) -> None:
    """x against numpy's LAPACK least squares, within the least-squares perturbation bound
    (Wedin 1973; Higham 2002, Thm 20.1: tests/bounds.py::lstsq_solution)."""
    reference = np.linalg.lstsq(A, b, rcond=None)[0]
    r = b - A @ reference
    ratio = float(np.linalg.norm(r) / (np.linalg.norm(A, 2) * np.linalg.norm(reference)))
    assert bounds.relative_error(x, reference) <= bounds.lstsq_solution(COLS, KAPPA, ratio)


@pytest.mark.parametrize("kind", ["local", "memory", "file", "zip"])
def test_url_and_zip_inputs_give_the_least_squares_answer(
    tmp_path: Path, memory_folder: str, kind: str
) -> None:
    A, b = problem()
    path = place_input(kind, tmp_path, memory_folder, A, b)
    assert main(["--quiet", "run", str(job_file(tmp_path, path)), "--inline"]) == 0
    stored = read_result(tmp_path / "out.zarr")
    assert_solves(stored["x"], A, b)
    report = json.loads((tmp_path / "out.report.json").read_text(encoding="utf-8"))
    recorded = {entry["path"] for entry in report["inputs"].values()}
    if kind == "memory":
        assert recorded == {path}, "a URL input is recorded as its URL"


def test_update_reads_the_old_rows_digests_through_the_url(
    tmp_path: Path, memory_folder: str
) -> None:
    A, b = problem()
    url = f"memory://{memory_folder}/obs.zarr"
    write_zarr_at(url, {"obs/A": A[:400], "obs/b": b[:400]})
    job = job_file(tmp_path, url)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    write_zarr_at(url, {"obs/A": A, "obs/b": b})  # the same first rows, 200 appended
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)


def one_error_line(capsys: pytest.CaptureFixture[str]) -> str:
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err + captured.out
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1, captured.err
    return lines[0]


@pytest.mark.parametrize(
    ("path", "says"),
    [
        ("nofs://bucket/obs.zarr", "fsspec knows no file system for nofs://"),
        ("memory://{memory}/missing.zarr", "input store not found"),
        ("memory://{memory}/obs.csv", "expected the URL of a Zarr store ending in .zarr"),
        ("file://elsewhere/obs.zarr", "expected a file URL of an absolute path"),
        ("missing.zarr.zip", "input file not found"),
    ],
)
def test_bad_input_locations_exit_2_naming_the_url_and_the_key(
    tmp_path: Path, memory_folder: str, capsys: pytest.CaptureFixture[str], path: str, says: str
) -> None:
    path = path.format(memory=memory_folder)
    assert main(["run", str(job_file(tmp_path, path)), "--inline"]) == 2
    line = one_error_line(capsys)
    assert says in line and "input.path" in line
    assert Path(path).name in line
    assert not (tmp_path / "out.zarr").exists()


def url_output_job(folder: Path, data: str, url: str, **output: Any) -> Path:
    job = job_file(folder, data)
    spec = yaml.safe_load(job.read_text(encoding="utf-8"))
    spec["output"] = {"path": url, **output}
    job.write_text(yaml.safe_dump(spec), encoding="utf-8")
    return job


def pointed_x(url: str, options: dict[str, Any] | None = None) -> tuple[str, np.ndarray]:
    """The commit the pointer of ``url`` names, and its x (read the way a user follows it)."""
    import fsspec
    import zarr

    with fsspec.open(url + ".current.json", "rb", **(options or {})) as handle:
        pointer = json.loads(handle.read())
    group = zarr.open_group(pointer["store"], mode="r", storage_options=options)
    assert group.attrs["rowfold_commit"] == pointer["rowfold_commit"]
    return pointer["rowfold_commit"], np.asarray(group["x"][...])


def commits_under(url: str, options: dict[str, Any] | None = None) -> list[str]:
    import fsspec

    fs, root = fsspec.core.url_to_fs(url + ".commits", **(options or {}))
    fs.invalidate_cache()
    return sorted(p.rstrip("/").rpartition("/")[2] for p in fs.ls(root, detail=False))


def test_url_output_is_committed_by_pointer_and_old_prefixes_removed(
    tmp_path: Path, memory_folder: str, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    data = place_input("local", tmp_path, memory_folder, A, b)
    url = f"memory://{memory_folder}/results/levelling.zarr"
    job = url_output_job(tmp_path, data, url, storage_options={"secret": SECRET})
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    first, x = pointed_x(url)
    assert_solves(x, A, b)
    assert commits_under(url) == [first]
    assert main(["run", str(job), "--inline"]) == 2  # no overwrite
    line = one_error_line(capsys)
    assert url in line and "output.overwrite" in line and SECRET not in line
    assert main(["--quiet", "run", str(job), "--inline", "--set", "output.overwrite=true"]) == 0
    second, x = pointed_x(url)
    assert second != first and commits_under(url) == [second]
    assert_solves(x, A, b)
    capsys.readouterr()
    assert main(["update", str(job), "--inline"]) == 0  # no rows added: nothing to publish
    said = capsys.readouterr()
    assert f"{url}: no rows added" in said.out and SECRET not in said.out + said.err
    assert pointed_x(url)[0] == second and commits_under(url) == [second]
    assert main(["inspect", url, "--json"]) == 0  # follows the pointer
    info = json.loads(capsys.readouterr().out)
    assert info["pointer"]["rowfold_commit"] == second == info["report"]["commit"]
    assert info["path"] == info["pointer"]["store"]
    assert main(["inspect", url.replace("levelling", "nothing-here")]) == 2
    assert "no result published" in one_error_line(capsys)


@pytest.mark.parametrize(
    ("url", "says"),
    [
        ("memory://results/out.h5", "HDF5 results are written to local paths"),
        ("nofs://results/out.zarr", "fsspec knows no file system for nofs://"),
    ],
)
def test_bad_output_urls_exit_2_naming_the_url_and_the_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], url: str, says: str
) -> None:
    assert main(["run", str(url_output_job(tmp_path, "obs.zarr", url)), "--inline"]) == 2
    line = one_error_line(capsys)
    assert url in line and "output.path" in line and says in line


def test_credentials_in_a_url_are_refused_without_repeating_them(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = job_file(tmp_path, f"s3://surveyor:{SECRET}@bucket/obs.zarr")
    assert main(["run", str(job), "--inline"]) == 2
    line = one_error_line(capsys)
    assert "input.path" in line and SECRET not in line


@pytest.mark.parametrize(
    ("options", "says"),
    [
        (SECRET, "expected a mapping of option names to values, found text"),
        ({"key": "id", "secret": float("nan")}, "expected plain values"),
    ],
)
def test_malformed_storage_options_exit_2_without_their_values(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], options: Any, says: str
) -> None:
    job = job_file(tmp_path, "memory://somewhere/obs.zarr", storage_options=options)
    assert main(["run", str(job), "--inline"]) == 2
    line = one_error_line(capsys)
    assert says in line and "input.storage_options" in line and SECRET not in line


def test_storage_options_with_a_local_path_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = job_file(tmp_path, "obs.zarr", storage_options={"anon": True})
    assert main(["run", str(job), "--inline"]) == 2
    assert "input.storage_options" in one_error_line(capsys)


def test_storage_option_values_are_never_written(
    tmp_path: Path,
    memory_folder: str,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    A, b = problem()
    url = place_input("memory", tmp_path, memory_folder, A, b)
    options = {"secret": SECRET, "client_kwargs": {"token": TOKEN}}
    job = job_file(tmp_path, url, storage_options=options)
    log = tmp_path / "read.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    assert main(["run", str(job), "--inline"]) == 0
    assert main(["inspect", str(tmp_path / "out.zarr")]) == 0
    captured = capsys.readouterr()
    assert SECRET not in captured.out + captured.err and TOKEN not in captured.out + captured.err
    written = [p for p in tmp_path.rglob("*") if p.is_file() and p != job]
    assert log in written and any(p.name == "zarr.json" for p in written)
    for path in written:
        data = path.read_bytes()
        assert SECRET.encode() not in data and TOKEN.encode() not in data, path
    import zarr

    recorded = zarr.open_group(str(tmp_path / "out.zarr"), mode="r").attrs["job"]["input"]
    assert recorded["storage_options"] == ["client_kwargs", "secret"]
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)


# ---------------------------------------------------------------- a local S3 server


def write_s3(url: str, options: dict[str, Any], arrays: dict[str, np.ndarray]) -> None:
    import zarr

    group = zarr.open_group(url, mode="w", storage_options=options)
    for name, array in arrays.items():
        created = group.create_array(
            name,
            shape=array.shape,
            dtype=array.dtype,
            chunks=(CHUNK, *array.shape[1:]),
            config={"write_empty_chunks": True},
        )
        created[...] = array


def test_s3_input_on_a_local_server_gives_the_least_squares_answer(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    options = s3_server.options()
    url = f"s3://{s3_server.bucket()}/campaign/obs.zarr"
    write_s3(url, options, {"obs/A": A, "obs/b": b})
    job = job_file(tmp_path, url, storage_options=options)
    assert main(["run", str(job), "--inline"]) == 0
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)
    captured = capsys.readouterr()
    assert SECRET not in captured.out + captured.err
    for path in (p for p in tmp_path.rglob("*") if p.is_file() and p != job):
        assert SECRET.encode() not in path.read_bytes(), path


def test_s3_missing_bucket_exits_2_naming_the_url_and_the_key(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    url = "s3://no-such-survey-bucket/obs.zarr"
    job = job_file(tmp_path, url, storage_options=s3_server.options())
    assert main(["run", str(job), "--inline"]) == 2
    line = one_error_line(capsys)
    assert url in line and "input.path" in line and SECRET not in line


def readme_s3_job() -> dict[str, Any]:
    """The s3:// job of the README's "Inputs and results by URL, zip stores" section."""
    import re

    text = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    section = text.split("## Inputs and results by URL, zip stores", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```yaml\n(.*?)```", section, re.S)
    assert len(blocks) == 1, "the section shows one job"
    job: dict[str, Any] = yaml.safe_load(blocks[0])
    return job


def test_readme_s3_job_runs_against_the_local_server(tmp_path: Path, s3_server: S3Server) -> None:
    """The README's job as written, its endpoint pointed at the local server."""
    job = readme_s3_job()
    url = job["input"]["path"]
    assert url.startswith("s3://")
    bucket = url.removeprefix("s3://").split("/", 1)[0]
    options = job["input"]["storage_options"]
    options = {**options, **s3_server.options()}
    s3_server.bucket(bucket)
    A, b = problem()
    write_s3(url, options, {job["input"]["matrix"]: A, job["input"]["rhs"]: b})
    job["input"]["storage_options"] = options
    job["output"] = {"path": str(tmp_path / "out.zarr")}
    path = tmp_path / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    assert main(["--quiet", "run", str(path), "--inline"]) == 0
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)


def rowfold_killed_at(
    job: Path, point: str, verb: str = "run", tmpdir: Path | None = None
) -> subprocess.CompletedProcess[str]:
    """Run the verb on the job in a real process that ends at ``point`` as a kill would
    (os._exit, no clean-up; rowfold.testhooks)."""
    env = {**os.environ, "ROWFOLD_TEST_HOOK": f"{point}=exit"}
    if tmpdir is not None:
        env["TMPDIR"] = str(tmpdir)
    command = [sys.executable, "-m", "rowfold", "--quiet", verb, str(job), "--inline"]
    return subprocess.run(command, env=env, capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("point", ["publish:upload:levelling.zarr", "publish:uploaded"])
def test_s3_output_killed_before_the_pointer_keeps_the_previous_result(
    tmp_path: Path, s3_server: S3Server, point: str
) -> None:
    A, b = problem()
    data = place_input("local", tmp_path, "", A, b)
    options = s3_server.options()
    url = f"s3://{s3_server.bucket()}/results/levelling.zarr"
    job = url_output_job(tmp_path, data, url, overwrite=True, storage_options=options)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before, x_before = pointed_x(url, options)
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": 2 * b}, chunk_rows=CHUNK)
    killed = rowfold_killed_at(job, point)
    assert killed.returncode == 99, killed.stderr
    assert SECRET not in killed.stdout + killed.stderr
    after, x_after = pointed_x(url, options)
    assert after == before
    np.testing.assert_array_equal(x_after, x_before)  # the same stored bytes, untouched
    assert len(commits_under(url, options)) == 2  # the killed run's upload, not yet removed
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    latest, x = pointed_x(url, options)
    assert latest != before and commits_under(url, options) == [latest]
    assert_solves(x, A, 2 * b)


def test_s3_output_killed_after_the_pointer_has_the_new_result(
    tmp_path: Path, s3_server: S3Server
) -> None:
    A, b = problem()
    data = place_input("local", tmp_path, "", A, b)
    options = s3_server.options()
    url = f"s3://{s3_server.bucket()}/results/levelling.zarr"
    job = url_output_job(tmp_path, data, url, overwrite=True, storage_options=options)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before, _ = pointed_x(url, options)
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": 2 * b}, chunk_rows=CHUNK)
    assert rowfold_killed_at(job, "publish:pointer").returncode == 99
    after, x = pointed_x(url, options)
    assert after != before
    assert_solves(x, A, 2 * b)


# ---------------------------------------------------------------- segment verbs on a URL


def night_jobs(tmp_path: Path, s3_server: S3Server) -> tuple[Path, Path, str, dict[str, Any]]:
    """The same job twice, one result on the local server and one local Zarr result."""
    options = s3_server.options()
    url = f"s3://{s3_server.bucket()}/results/levelling.zarr"
    on_s3 = url_output_job(tmp_path, "obs.zarr", url, overwrite=True, storage_options=options)
    local = tmp_path / "local-job.yaml"
    local.write_text(on_s3.read_text(encoding="utf-8"), encoding="utf-8")
    on_s3 = on_s3.rename(tmp_path / "s3-job.yaml")
    spec = yaml.safe_load(local.read_text(encoding="utf-8"))
    spec["output"] = {"path": str(tmp_path / "levelling.zarr"), "overwrite": True}
    local.write_text(yaml.safe_dump(spec), encoding="utf-8")
    return on_s3, local, url, options


def assert_equal_answers(
    x: np.ndarray, R: np.ndarray, local: dict[str, np.ndarray], A: np.ndarray, b: np.ndarray
) -> None:
    """x and R of the URL result against LAPACK and against the local result of the same
    verbs, each within its perturbation bound (R: Sun 1991 with Higham 2002 Thm 19.4,
    tests/bounds.py::r_factor; x: Wedin 1973, Higham Thm 20.1, ::lstsq_solution), as
    tests/test_segments.py compares an update with a full run."""
    assert_solves(x, A, b)
    reference = np.linalg.lstsq(A, b, rcond=None)[0]
    ratio = float(
        np.linalg.norm(b - A @ reference) / (np.linalg.norm(A, 2) * np.linalg.norm(reference))
    )
    assert bounds.relative_error(x, local["x"]) <= bounds.lstsq_solution(COLS, KAPPA, ratio)
    scale = np.linalg.norm(A, 2)
    assert np.linalg.norm(R - local["R"]) / scale <= bounds.r_factor(COLS, KAPPA)


def pointed_store(url: str, options: dict[str, Any]) -> dict[str, np.ndarray]:
    """x and R of the result the pointer names."""
    import fsspec
    import zarr

    with fsspec.open(url + ".current.json", "rb", **options) as handle:
        pointer = json.loads(handle.read())
    group = zarr.open_group(pointer["store"], mode="r", storage_options=options)
    return {name: np.asarray(group[name][...]) for name in ("x", "R")}


def test_s3_update_and_retire_equal_the_same_verbs_on_a_local_result(
    tmp_path: Path, s3_server: S3Server
) -> None:
    A, b = problem()
    on_s3, local, url, options = night_jobs(tmp_path, s3_server)
    jobs = (str(on_s3), str(local))
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A[:200], "obs/b": b[:200]}, chunk_rows=CHUNK)
    for job in jobs:
        assert main(["--quiet", "run", job, "--inline", "--set", "update.label=night-1"]) == 0
    for night, rows in ((2, 400), (3, 600)):
        write_arrays(
            tmp_path / "obs.zarr", {"obs/A": A[:rows], "obs/b": b[:rows]}, chunk_rows=CHUNK
        )
        for job in jobs:
            assert main(["--quiet", "update", job, "--inline", "--label", f"night-{night}"]) == 0
    first, _ = pointed_x(url, options)
    assert commits_under(url, options) == [first]
    assert_equal_answers(
        **pointed_store(url, options), local=read_result(tmp_path / "levelling.zarr"), A=A, b=b
    )
    for job in jobs:
        assert main(["--quiet", "retire", job, "night-1"]) == 0
    retired = pointed_store(url, options)
    assert_equal_answers(
        **retired, local=read_result(tmp_path / "levelling.zarr"), A=A[200:], b=b[200:]
    )
    latest, _ = pointed_x(url, options)
    assert latest != first and commits_under(url, options) == [latest]
    report = json.loads(s3_text(url, options, "levelling.report.json"))
    assert [s["label"] for s in report["segments"]["covered"]] == ["night-2", "night-3"]


def s3_text(url: str, options: dict[str, Any], part: str) -> str:
    """A part of the current result, read through its pointer."""
    import fsspec

    with fsspec.open(url + ".current.json", "rb", **options) as handle:
        pointer = json.loads(handle.read())
    with fsspec.open(pointer["parts"][part], "rb", **options) as handle:
        return str(handle.read().decode("utf-8"))


def test_s3_update_without_an_earlier_result_exits_2_naming_the_url(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    place_input("local", tmp_path, "", A, b)
    on_s3, _, url, _ = night_jobs(tmp_path, s3_server)
    assert main(["update", str(on_s3), "--inline"]) == 2
    line = one_error_line(capsys)
    assert url in line and "output.path" in line and "no earlier result" in line
    assert SECRET not in line


@pytest.mark.parametrize("point", ["publish:upload:levelling.zarr", "publish:uploaded"])
def test_s3_update_killed_during_its_commit_keeps_the_previous_result(
    tmp_path: Path, s3_server: S3Server, point: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    A, b = problem()
    on_s3, _, url, options = night_jobs(tmp_path, s3_server)
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A[:400], "obs/b": b[:400]}, chunk_rows=CHUNK)
    assert main(["--quiet", "run", str(on_s3), "--inline"]) == 0
    before, x_before = pointed_x(url, options)
    report_before = s3_text(url, options, "levelling.report.json")
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": b}, chunk_rows=CHUNK)
    (tmp_path / "tmp").mkdir()
    killed = rowfold_killed_at(on_s3, point, "update", tmp_path / "tmp")
    assert killed.returncode == 99, killed.stderr
    assert SECRET not in killed.stdout + killed.stderr
    after, x_after = pointed_x(url, options)
    assert after == before
    np.testing.assert_array_equal(x_after, x_before)  # the same stored bytes, untouched
    assert s3_text(url, options, "levelling.report.json") == report_before
    left = list((tmp_path / "tmp").glob("rowfold-publish-*"))
    assert len(left) == 1  # the killed run's private folder, with its store
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "tmp"))
    assert main(["--quiet", "update", str(on_s3), "--inline"]) == 0
    assert not left[0].exists(), "the next run removes a dead process's folder"
    latest, x = pointed_x(url, options)
    assert latest != before and commits_under(url, options) == [latest]
    assert_solves(x, A, b)


def test_a_pointer_moved_by_another_writer_is_not_overwritten(
    tmp_path: Path,
    s3_server: S3Server,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Another writer commits between this update's read of the pointer and its write."""
    from rowfold import testhooks

    A, b = problem()
    on_s3, _, url, options = night_jobs(tmp_path, s3_server)
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A[:400], "obs/b": b[:400]}, chunk_rows=CHUNK)
    assert main(["--quiet", "run", str(on_s3), "--inline"]) == 0
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": b}, chunk_rows=CHUNK)
    reached = testhooks.reached
    other: list[str] = []

    def another_writer(point: str) -> None:
        reached(point)
        if point == "publish:uploaded" and not other:  # the other writer, once
            other.append(point)
            assert main(["--quiet", "run", str(on_s3), "--inline"]) == 0
            other.append(pointed_x(url, options)[0])

    monkeypatch.setattr(testhooks, "reached", another_writer)
    capsys.readouterr()
    assert main(["update", str(on_s3), "--inline"]) == 2
    line = one_error_line(capsys)
    assert url in line and "another writer" in line and SECRET not in line
    assert pointed_x(url, options)[0] == other[1]  # the other writer's result stands
    assert commits_under(url, options) == [other[1]]


def test_compare_on_s3_publishes_the_comparison_by_pointer(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    import fsspec

    A, b = problem()
    place_input("local", tmp_path, "", A, b)
    on_s3, _, url, options = night_jobs(tmp_path, s3_server)
    assert main(["compare", str(on_s3), "--methods", "tsqr,cholqr2", "--inline"]) == 0
    said = capsys.readouterr()
    assert SECRET not in said.out + said.err
    base = url.removesuffix(".zarr") + ".compare"
    with fsspec.open(base + ".current.json", "rb", **options) as handle:
        pointer = json.loads(handle.read())
    assert f"wrote {pointer['parts']['levelling.compare.json']}" in said.out
    with fsspec.open(pointer["parts"]["levelling.compare.json"], "rb", **options) as handle:
        payload = json.loads(handle.read())
    records = payload["methods"]
    assert [r["method"] for r in records] == ["tsqr", "cholqr2"]
    assert all(r["status"] == "ok" for r in records)
    import zarr

    for method in ("tsqr", "cholqr2"):
        group = zarr.open_group(
            f"{pointer['store']}/{method}.zarr", mode="r", storage_options=options
        )
        assert_solves(np.asarray(group["x"][...]), A, b)


def test_only_private_folders_of_dead_processes_on_this_host_are_removed(tmp_path: Path) -> None:
    import socket

    from rowfold.storage import published

    ended = subprocess.run(
        [sys.executable, "-c", "import os; print(os.getpid())"],
        capture_output=True,
        text=True,
        check=True,
    )
    dead = int(ended.stdout)
    owners = {
        "dead": {"host": socket.gethostname(), "pid": dead},
        "alive": {"host": socket.gethostname(), "pid": os.getpid()},
        "elsewhere": {"host": "tarnholm-node-7.invalid", "pid": dead},
    }
    for name, owner in owners.items():
        folder = tmp_path / f"rowfold-publish-{name}"
        folder.mkdir()
        (folder / published.OWNER_MARK).write_text(json.dumps(owner), encoding="utf-8")
    (tmp_path / "rowfold-publish-unmarked").mkdir()
    (tmp_path / "unrelated-dead").mkdir()
    removed = published.remove_abandoned(tmp_path)
    assert removed == [tmp_path / "rowfold-publish-dead"]
    left = sorted(p.name for p in tmp_path.iterdir())
    assert left == [
        "rowfold-publish-alive",
        "rowfold-publish-elsewhere",
        "rowfold-publish-unmarked",
        "unrelated-dead",
    ]


# ---------------------------------------------------------------- HDF5 and NetCDF-4 by URL


def netcdf_bytes(tmp_path: Path, A: np.ndarray, b: np.ndarray) -> bytes:
    """A NetCDF-4 file (written by xarray through h5netcdf) holding A and b, chunked."""
    import xarray

    data = xarray.Dataset({"A": (("obs", "param"), A), "b": (("obs",), b)})
    path = tmp_path / "made.nc"
    encoding = {"A": {"chunksizes": (CHUNK, COLS)}, "b": {"chunksizes": (CHUNK,)}}
    data.to_netcdf(path, engine="h5netcdf", encoding=encoding)
    return path.read_bytes()


def hdf5_bytes(tmp_path: Path, A: np.ndarray, b: np.ndarray) -> bytes:
    write_arrays(tmp_path / "made.h5", {"obs/A": A, "obs/b": b}, chunk_rows=CHUNK)
    return (tmp_path / "made.h5").read_bytes()


def hdf5_job(folder: Path, url: str, netcdf: bool, **input_keys: Any) -> Path:
    job = job_file(folder, url, **input_keys)
    if netcdf:
        spec = yaml.safe_load(job.read_text(encoding="utf-8"))
        spec["input"].update(matrix="A", rhs="b")
        job.write_text(yaml.safe_dump(spec), encoding="utf-8")
    return job


@pytest.mark.parametrize("netcdf", [False, True], ids=["h5", "nc"])
def test_hdf5_and_netcdf_inputs_by_memory_url_warn_once_and_solve(
    tmp_path: Path, memory_folder: str, capsys: pytest.CaptureFixture[str], netcdf: bool
) -> None:
    import fsspec

    A, b = problem()
    url = f"memory://{memory_folder}/obs.{'nc' if netcdf else 'h5'}"
    made = netcdf_bytes(tmp_path, A, b) if netcdf else hdf5_bytes(tmp_path, A, b)
    fsspec.filesystem("memory").pipe_file(url.removeprefix("memory://"), made)
    job = hdf5_job(tmp_path, url, netcdf)
    spec = yaml.safe_load(job.read_text(encoding="utf-8"))
    spec["cluster"] = {"scheduler": "threads"}  # memory:// is shared by threads, not processes
    job.write_text(yaml.safe_dump(spec), encoding="utf-8")
    assert main(["run", str(job)]) == 0
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)
    err = capsys.readouterr().err
    assert err.count("an HDF5 file read by URL costs a ranged request") == 1, err
    report = json.loads((tmp_path / "out.report.json").read_text(encoding="utf-8"))
    assert any("convert it to Zarr" in w for w in report["warnings"])


def test_hdf5_input_on_the_local_s3_server_solves_and_updates(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    import fsspec

    A, b = problem()
    options = s3_server.options()
    url = f"s3://{s3_server.bucket()}/campaign/obs.h5"
    fs = fsspec.filesystem("s3", **options)
    fs.pipe_file(url.removeprefix("s3://"), hdf5_bytes(tmp_path, A[:400], b[:400]))
    job = hdf5_job(tmp_path, url, False, storage_options=options)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    fs.pipe_file(url.removeprefix("s3://"), hdf5_bytes(tmp_path, A, b))  # 200 rows appended
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)
    said = capsys.readouterr()
    assert SECRET not in said.out + said.err


# ---------------------------------------------------------------- wrong credentials, no bucket

WRONG = "wrong-secret-0c41d7"  # an invented wrong secret: must appear in no output


def assert_nothing_holds(folder: Path, *secrets: str) -> None:
    """No file under ``folder`` but the job files (stores, reports, logs) holds any of
    ``secrets``."""
    for path in (p for p in folder.rglob("*") if p.is_file() and p.suffix != ".yaml"):
        data = path.read_bytes()
        for secret in secrets:
            assert secret.encode() not in data, path


def test_wrong_credentials_for_an_input_exit_2_naming_the_url_and_the_key(
    tmp_path: Path, s3_signed_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    server = s3_signed_server
    url = f"s3://{server.bucket()}/campaign/obs.zarr"
    write_s3(url, server.options(), {"obs/A": A, "obs/b": b})
    right = job_file(tmp_path, url, storage_options=server.options())
    assert main(["--quiet", "run", str(right), "--inline"]) == 0  # the right key reads it
    assert_solves(read_result(tmp_path / "out.zarr")["x"], A, b)
    capsys.readouterr()
    wrong = job_file(tmp_path, url, storage_options=server.options(secret=WRONG))
    status = main(["run", str(wrong), "--inline", "--set", "output.path=refused.zarr"])
    assert status in (2, 4)
    line = one_error_line(capsys)
    assert url in line and "input.path" in line
    assert WRONG not in line and server.secret not in line
    assert not (tmp_path / "refused.zarr").exists()
    assert_nothing_holds(tmp_path, WRONG, server.secret)


def test_wrong_credentials_for_an_output_exit_2_and_keep_the_result(
    tmp_path: Path, s3_signed_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    server = s3_signed_server
    data = place_input("local", tmp_path, "", A, b)
    url = f"s3://{server.bucket()}/results/levelling.zarr"
    right = url_output_job(tmp_path, data, url, overwrite=True, storage_options=server.options())
    assert main(["--quiet", "run", str(right), "--inline"]) == 0
    before, x_before = pointed_x(url, server.options())
    capsys.readouterr()
    wrong = url_output_job(
        tmp_path, data, url, overwrite=True, storage_options=server.options(secret=WRONG)
    )
    commands = [
        ["run", str(wrong), "--inline"],
        ["update", str(wrong), "--inline"],
        ["retire", str(wrong), "night-1"],
        ["compare", str(wrong), "--methods", "tsqr", "--inline"],
    ]
    for command in commands:
        assert main(command) == 2, command
        line = one_error_line(capsys)
        assert url in line and "output.path" in line, line
        assert WRONG not in line and server.secret not in line
    after, x_after = pointed_x(url, server.options())
    assert after == before
    np.testing.assert_array_equal(x_after, x_before)
    for name in ("levelling.report.json", "levelling.report.html"):
        text = s3_text(url, server.options(), name)
        assert WRONG not in text and server.secret not in text
    assert_nothing_holds(tmp_path, WRONG, server.secret)


def test_an_output_bucket_that_does_not_exist_exits_2_naming_the_url_and_the_key(
    tmp_path: Path, s3_server: S3Server, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem()
    data = place_input("local", tmp_path, "", A, b)
    url = "s3://no-such-results-bucket/levelling.zarr"
    job = url_output_job(tmp_path, data, url, storage_options=s3_server.options())
    assert main(["run", str(job), "--inline"]) == 2
    line = one_error_line(capsys)
    assert url in line and "output.path" in line and SECRET not in line


def test_replace_on_a_url_result_refactors_its_segment(tmp_path: Path, memory_folder: str) -> None:
    A, b = problem()
    url = f"memory://{memory_folder}/results/levelling.zarr"
    job = url_output_job(tmp_path, "obs.zarr", url, overwrite=True)
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A[:300], "obs/b": b[:300]}, chunk_rows=CHUNK)
    assert main(["--quiet", "run", str(job), "--inline", "--set", "update.label=night-1"]) == 0
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": b}, chunk_rows=CHUNK)
    assert main(["--quiet", "update", str(job), "--inline", "--label", "night-2"]) == 0
    before, _ = pointed_x(url)
    b_now = b.copy()
    b_now[:300] += 0.01 * np.arange(300) / 300  # night 1 re-reduced: new values, same rows
    write_arrays(tmp_path / "obs.zarr", {"obs/A": A, "obs/b": b_now}, chunk_rows=CHUNK)
    assert main(["--quiet", "replace", str(job), "night-1", "--inline"]) == 0
    after, x = pointed_x(url)
    assert after != before and commits_under(url) == [after]
    assert_solves(x, A, b_now)
