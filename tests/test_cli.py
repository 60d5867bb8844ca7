"""The command line: exit statuses and one-line error messages (SPEC.md, "Command line").

Exit status: 0 success and every gate held; 2 the job or its input is invalid (nothing
computed, nothing written); 3 computed and written but a quality gate failed; 4 failed while
running, with no earlier result replaced. Errors are one plain line on stderr naming the
file, key or row block. Most tests call :func:`rowfold.cli.main` in this process; two start
``python -m rowfold`` as a real subprocess, one of which is killed while writing.

Reference values: R and x are compared with numpy's LAPACK-backed ``numpy.linalg.qr`` and
``numpy.linalg.lstsq``; R is unique once its diagonal is made positive (Trefethen & Bau,
Numerical Linear Algebra, 1997, Thm 7.2, see CHECKS.md "Uniqueness and sign"), to the
perturbation bounds of tests/bounds.py (``r_factor``, ``lstsq_solution``).
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import yaml

from rowfold import runner
from rowfold.cli import main
from rowfold.storage import write_arrays

import bounds
from support import write_job

STAGE_PREFIX = ".rowfold-stage-"  # the staging folder of a commit (storage/commit.py)
ROWS, COLS = 100, 5


# ---------------------------------------------------------------- helpers


def matrix(rows: int = ROWS, cols: int = COLS, seed: int = 0) -> np.ndarray:
    """A well-conditioned random matrix (Gaussian; condition a few units)."""
    return np.random.default_rng(seed).standard_normal((rows, cols))


def prescribed(rows: int, cols: int, condition: float, seed: int = 0) -> np.ndarray:
    """A = U diag(s) V^T with random orthonormal U, V and s from 1 down to 1/condition.

    The construction of CHECKS.md, "Matrices with prescribed singular values".
    """
    rng = np.random.default_rng(seed)
    u, _ = np.linalg.qr(rng.standard_normal((rows, cols)))
    v, _ = np.linalg.qr(rng.standard_normal((cols, cols)))
    a: np.ndarray = (u * np.geomspace(1.0, 1.0 / condition, cols)) @ v.T
    return a


def setup_job(
    folder: Path,
    a: np.ndarray | None = None,
    b: np.ndarray | None = None,
    extra: dict[str, dict[str, Any]] | None = None,
    **sections: dict[str, Any],
) -> Path:
    """Write ``input.h5`` (datasets ``model/A`` and ``model/b``) and ``job.yaml``.

    ``extra`` and ``sections`` are merged over a small valid job that writes ``out.h5``.
    """
    lhs = matrix() if a is None else a
    rhs = np.random.default_rng(1).standard_normal((lhs.shape[0],)) if b is None else b
    write_arrays(folder / "input.h5", {"model/A": lhs, "model/b": rhs}, chunk_rows=16)
    job: dict[str, Any] = {
        "name": "cli-test",
        "input": {"path": "input.h5", "matrix": "model/A", "rhs": "model/b", "rows_per_block": 30},
        "output": {"path": "out.h5"},
    }
    for key, values in {**(extra or {}), **sections}.items():
        job.setdefault(key, {}).update(values)
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job, sort_keys=False), encoding="utf-8")
    return path


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    """Call the CLI in this process; return (status, stdout, stderr)."""
    status = main(list(argv))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def one_error_line(err: str) -> str:
    """Assert stderr is exactly one ``rowfold: ...`` line and return it."""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("rowfold: "), err
    assert "Traceback" not in err
    return lines[0]


def snapshot(folder: Path, skip: tuple[str, ...] = ()) -> dict[str, str]:
    """Name -> sha256 of every file (recursively) under ``folder``."""
    out = {}
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if path.is_file() and rel not in skip:
            out[rel] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


def positive_diagonal_r(a: np.ndarray) -> np.ndarray:
    """numpy's R with the sign fixed so the diagonal is positive."""
    r = np.linalg.qr(a, mode="r")
    signed: np.ndarray = np.sign(np.diag(r))[:, None] * r
    return signed


# ---------------------------------------------------------------- exit 2: the job file

JOB_FILE_ERRORS = [
    pytest.param(
        {"input": {"colour": "blue"}}, (), ("job.yaml line 7", "input.colour"), id="unknown-key"
    ),
    pytest.param(
        {"output": {"q": "yes"}}, (), ("job.yaml line", "output.q", "true or false"), id="text-q"
    ),
    pytest.param(
        {"input": {"rows_per_block": -3}},
        (),
        ("job.yaml line 6", "input.rows_per_block"),
        id="negative-rows-per-block",
    ),
    pytest.param(
        {"method": {"name": "qr"}}, (), ("line", "method.name", "tsqr"), id="unknown-method"
    ),
    pytest.param({}, ("--set", "method.nmae=cholqr2"), ("--set", "method.nmae"), id="set-unknown"),
    pytest.param({"output": {"path": "out.csv"}}, (), ("output.path", ".h5"), id="csv-output"),
    pytest.param(
        {"method": {"name": "cholqr2", "tree": "flat"}},
        (),
        ("method.tree", "tsqr", "cholqr2"),
        id="tree-with-cholqr2",
    ),
]


@pytest.mark.parametrize(("sections", "extra", "parts"), JOB_FILE_ERRORS)
def test_job_file_error_exits_2(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    sections: dict[str, dict[str, Any]],
    extra: tuple[str, ...],
    parts: tuple[str, ...],
) -> None:
    """A bad job file: exit 2, one line naming the key (and its line), nothing written."""
    job = setup_job(tmp_path, extra=sections)
    status, out, err = run(capsys, "run", str(job), "--inline", *extra)
    line = one_error_line(err)
    assert status == 2
    assert out == ""
    for part in parts:
        assert part in line, line
    assert not (tmp_path / "out.h5").exists()


def test_malformed_yaml_exits_2_with_line_and_column(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """Malformed YAML names the line and column."""
    job = setup_job(tmp_path)
    job.write_text(job.read_text() + "gates: {gram: 1.0e-12\n", encoding="utf-8")
    status, _, err = run(capsys, "run", str(job), "--inline")
    line = one_error_line(err)
    assert status == 2
    assert "job.yaml line" in line and "column" in line and "malformed YAML" in line


def test_missing_required_key_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """A missing input.matrix is named."""
    job = setup_job(tmp_path)
    data = yaml.safe_load(job.read_text())
    del data["input"]["matrix"]
    job.write_text(yaml.safe_dump(data), encoding="utf-8")
    status, _, err = run(capsys, "check", str(job))
    assert status == 2
    assert "input.matrix" in one_error_line(err)


def test_job_file_not_found_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """A job file that is not there."""
    status, _, err = run(capsys, "run", str(tmp_path / "absent.yaml"), "--inline")
    assert status == 2
    assert "absent.yaml" in one_error_line(err)


# ---------------------------------------------------------------- exit 2: the inputs


def test_missing_input_file_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """The input path does not exist."""
    job = setup_job(tmp_path, input={"path": "elsewhere.h5"})
    status, _, err = run(capsys, "run", str(job), "--inline")
    line = one_error_line(err)
    assert status == 2
    assert "elsewhere.h5" in line and "not found" in line


@pytest.mark.parametrize("verb", ["run", "check"])
def test_missing_dataset_lists_datasets_present(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, verb: str
) -> None:
    """A dataset that is not in the file: the message lists what is there."""
    job = setup_job(tmp_path, input={"matrix": "model/Z"})
    extra = ("--inline",) if verb == "run" else ()
    status, _, err = run(capsys, verb, str(job), *extra)
    line = one_error_line(err)
    assert status == 2
    assert "model/Z" in line and "model/A" in line and "model/b" in line
    assert not (tmp_path / "out.h5").exists()


def test_rhs_of_wrong_length_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """The rhs has 99 rows for a 100-row A."""
    job = setup_job(tmp_path, b=np.ones(ROWS - 1))
    status, _, err = run(capsys, "run", str(job), "--inline")
    line = one_error_line(err)
    assert status == 2
    assert "model/b" in line and str(ROWS - 1) in line and str(ROWS) in line


# The three ways a job can run: in-line, on the embedded LocalCluster, on the threaded scheduler.
ENGINES = [
    ("--inline",),
    ("--set", "cluster.processes=false"),
    ("--set", "cluster.scheduler=threads"),
]
ENGINE_IDS = ["inline", "cluster", "threads"]


@pytest.mark.parametrize("engine", ENGINES, ids=ENGINE_IDS)
def test_nan_names_row_block_and_row(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, engine: tuple[str, ...]
) -> None:
    """NaN at row 37 with 30-row blocks: block 1 (rows 30..59), first bad row 37."""
    a = matrix()
    a[37, 2] = np.nan
    a[50, 0] = np.inf
    job = setup_job(tmp_path, a=a)
    status, _, err = run(capsys, "--quiet", "run", str(job), *engine)
    line = err.strip().splitlines()[-1]
    assert status == 2, err
    assert "row block 1" in line and "rows 30..59" in line and "row 37" in line, line
    assert not (tmp_path / "out.h5").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".rowfold-")]


def test_fewer_rows_than_columns_exits_2(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """m < n is refused before any compute."""
    job = setup_job(tmp_path, a=matrix(3, 5), b=np.ones(3))
    status, _, err = run(capsys, "run", str(job), "--inline")
    line = one_error_line(err)
    assert status == 2
    assert "3 x 5" in line


@pytest.mark.parametrize(
    "bad",
    [np.array([[b"ab", b"cd"]] * 8, dtype="S2"), np.ones((8, 2), dtype=bool)],
    ids=["bytes", "bool"],
)
def test_non_numeric_dtype_exits_2(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, bad: np.ndarray
) -> None:
    """Text and boolean matrices are not numeric."""
    job = setup_job(tmp_path, a=bad, b=np.ones(8))
    status, _, err = run(capsys, "run", str(job), "--inline")
    line = one_error_line(err)
    assert status == 2
    assert "not numeric" in line and "model/A" in line


def test_existing_output_without_overwrite_exits_2(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """An existing result is refused without overwrite and left byte for byte as it was."""
    job = setup_job(tmp_path, output={"overwrite": True})
    assert run(capsys, "run", str(job), "--inline")[0] == 0
    before = snapshot(tmp_path)
    status, _, err = run(capsys, "run", str(job), "--inline", "--set", "output.overwrite=false")
    line = one_error_line(err)
    assert status == 2
    assert "out.h5" in line and "overwrite" in line
    assert snapshot(tmp_path) == before


# ---------------------------------------------------------------- exit 0, 3, 4


@pytest.mark.parametrize("engine", ENGINES, ids=ENGINE_IDS)
def test_good_job_exits_0_and_matches_lapack(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, engine: tuple[str, ...]
) -> None:
    """R and x agree with numpy.linalg.qr / lstsq to the R-factor and least-squares bounds
    (the three engines run BLAS on different thread counts, so they may round differently)."""
    a = matrix()
    b = np.random.default_rng(1).standard_normal(ROWS)
    job = setup_job(tmp_path, a=a, b=b, gates={"gram": 1e-12})
    status, out, err = run(capsys, "--quiet", "run", str(job), *engine)
    assert status == 0, err
    assert "out.h5" in out
    with h5py.File(tmp_path / "out.h5", "r") as store:
        r = store["R"][...]
        x = store["x"][...]
    ref_r = positive_diagonal_r(a)
    ref_x = np.linalg.lstsq(a, b, rcond=None)[0]
    kappa = float(np.linalg.cond(a))
    assert np.linalg.norm(r - ref_r) / np.linalg.norm(a, 2) <= bounds.r_factor(COLS, kappa)
    ratio = np.linalg.norm(b - a @ ref_x) / (np.linalg.norm(a, 2) * np.linalg.norm(ref_x))
    assert bounds.relative_error(x, ref_x) <= bounds.lstsq_solution(COLS, kappa, ratio)
    report = json.loads((tmp_path / "out.report.json").read_text())
    assert report["gates"]["gram"]["held"] is True


def test_failed_gate_exits_3_and_writes_result(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """gates.gram: 1e-300 cannot hold: exit 3, the result is written, the report says so."""
    job = setup_job(tmp_path, gates={"gram": 1e-300})
    status, out, _ = run(capsys, "--quiet", "run", str(job), "--inline")
    assert status == 3
    assert "gram" in out
    assert (tmp_path / "out.h5").exists()
    gate = json.loads((tmp_path / "out.report.json").read_text())["gates"]["gram"]
    assert gate["held"] is False
    assert gate["limit"] == 1e-300
    assert gate["value"] > gate["limit"]


@pytest.mark.parametrize("previous", [False, True], ids=["no-previous", "previous-kept"])
def test_cholqr2_breakdown_exits_4_and_writes_nothing(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, previous: bool
) -> None:
    """cholqr2 at condition 1e12 (beyond ~1e8, CHECKS.md) refuses and points to tsqr."""
    a = prescribed(200, 8, 1e12)
    job = setup_job(tmp_path, a=a, b=np.ones(200), output={"overwrite": True})
    if previous:
        assert run(capsys, "run", str(job), "--inline")[0] == 0
    before = snapshot(tmp_path)
    status, _, err = run(capsys, "run", str(job), "--inline", "--set", "method.name=cholqr2")
    line = one_error_line(err)
    assert status == 4
    assert "tsqr" in line
    assert snapshot(tmp_path) == before
    assert (tmp_path / "out.h5").exists() is previous


# ---------------------------------------------------------------- check and inspect


def test_check_prints_shape(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """check validates without computing or writing and prints m x n."""
    job = setup_job(tmp_path)
    status, out, _ = run(capsys, "check", str(job))
    assert status == 0
    assert f"{ROWS} x {COLS}" in out
    assert not (tmp_path / "out.h5").exists()


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_inspect_result_store(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, suffix: str
) -> None:
    """inspect prints JSON listing R (n x n) and x (n)."""
    job = setup_job(tmp_path, output={"path": f"out{suffix}"})
    assert run(capsys, "--quiet", "run", str(job), "--inline")[0] == 0
    status, out, _ = run(capsys, "inspect", "--json", str(tmp_path / f"out{suffix}"))
    assert status == 0
    info = json.loads(out)
    assert info["arrays"]["R"]["shape"] == [COLS, COLS]
    assert info["arrays"]["x"]["shape"] == [COLS]


def test_inspect_missing_path_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """inspect on nothing."""
    status, _, err = run(capsys, "inspect", str(tmp_path / "none.h5"))
    assert status == 2
    assert "none.h5" in one_error_line(err)


def test_unknown_verb_exits_2(capsys: pytest.CaptureFixture[str]) -> None:
    """A usage error is an invalid job too."""
    assert run(capsys, "frobnicate")[0] == 2


# ---------------------------------------------------------------- real subprocesses


def python_m_rowfold(folder: Path, *argv: str, **kwargs: Any) -> Any:
    """Start ``python -m rowfold ARGV`` in ``folder`` (own session, so it can be killed)."""
    return subprocess.Popen(
        [sys.executable, "-m", "rowfold", *argv],
        cwd=folder,
        start_new_session=True,
        text=True,
        **kwargs,
    )


def test_python_m_rowfold_run(tmp_path: Path) -> None:
    """``python -m rowfold run job.yaml --set cluster.processes=false`` exits 0."""
    setup_job(tmp_path)
    proc = python_m_rowfold(
        tmp_path,
        "run",
        "job.yaml",
        "--set",
        "cluster.processes=false",
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    assert (tmp_path / "out.h5").exists()
    assert "out.h5" in out


def test_subprocess_error_on_cluster_is_one_line(tmp_path: Path) -> None:
    """On the default engine an input error is still one line on stderr (no tracebacks)."""
    a = matrix()
    a[37, 2] = np.nan
    setup_job(tmp_path, a=a)
    proc = python_m_rowfold(
        tmp_path,
        "--quiet",
        "run",
        "job.yaml",
        "--set",
        "cluster.processes=false",
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 2
    assert "row 37" in one_error_line(err)


def test_killed_run_leaves_previous_result(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """SIGKILL while Q is being written: the earlier result is untouched, only temp litter.

    SPEC.md: exit 4 leaves "no partial result replaces an earlier good one"; DESIGN.md: an
    output is written to a temporary sibling and renamed into place only when complete.
    """
    folder = tmp_path / "job"
    folder.mkdir()
    job = setup_job(folder, input={"rows_per_block": "auto"}, output={"q": True, "overwrite": True})
    status, _, err = run(capsys, "--quiet", "run", str(job), "--inline")
    assert status == 0, err
    big = np.random.default_rng(5).standard_normal((400_000, 40))
    write_arrays(folder / "input.h5", {"model/A": big, "model/b": big[:, 0]})
    del big
    before = snapshot(folder, skip=("input.h5",))
    with open(tmp_path / "killed.log", "w") as log:
        proc = python_m_rowfold(
            folder, "run", "job.yaml", "--set", "cluster.processes=false", stdout=log, stderr=log
        )
        try:
            _wait_for_temp(folder, proc)
            time.sleep(0.3)
            assert proc.poll() is None, "the run ended before it could be killed"
            os.killpg(proc.pid, signal.SIGKILL)
        finally:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
    after = snapshot(folder, skip=("input.h5",))
    assert {name: after[name] for name in before} == before
    added = {p.name for p in folder.iterdir()} - set(before) - {"input.h5"}
    assert added, "the kill came before anything was written"
    ours = (STAGE_PREFIX, ".rowfold-work-", ".rowfold-lock-", ".rowfold-checkpoints-")
    assert all(name.startswith(ours) for name in added), added

    status, _, err = run(capsys, "--quiet", "run", str(job), "--inline")
    assert status == 0, err
    assert not [p.name for p in folder.iterdir() if p.name.startswith(".rowfold-")]
    assert snapshot(folder, skip=("input.h5",))["out.h5"] != before["out.h5"]


def _wait_for_temp(folder: Path, proc: Any, limit: float = 90.0) -> None:
    """Wait until the run has created its temporary result (or give up after ``limit`` s)."""
    deadline = time.monotonic() + limit
    while time.monotonic() < deadline and proc.poll() is None:
        if any(p.name.startswith(STAGE_PREFIX) for p in folder.iterdir()):
            return
        time.sleep(0.05)
    raise AssertionError("no temporary result appeared while the run was going")


@pytest.mark.parametrize("debug", [False, True], ids=["plain", "debug"])
def test_unexpected_error_hints_at_debug_only_without_it(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    debug: bool,
) -> None:
    """An unexpected exception: exit 4, one line; the hint to rerun with --debug only when
    --debug was not given (with it, the traceback comes instead)."""
    job = write_job(tmp_path, prescribed(40, 3, 10.0))

    def broken(*args: object, **kwargs: object) -> None:
        raise ValueError("unexpected state")

    monkeypatch.setattr(runner, "run_job", broken)
    status = main([*(["--debug"] if debug else []), "--quiet", "run", str(job), "--inline"])
    err = capsys.readouterr().err
    assert status == 4, err
    last = err.strip().splitlines()[-1]
    assert last.startswith("rowfold: failed: ValueError: unexpected state"), err
    assert ("rerun with --debug" in last) is not debug, err
    assert ("Traceback" in err) is debug, err
