"""Nightly operation: update by appended rows, several jobs per run, provenance.

References: a full refactorization by rowfold itself and numpy/scipy LAPACK. The update and
the full run are two backward-stable factorizations of the same matrix with different
reduction trees, so they are compared to the perturbation bounds of tests/bounds.py (R:
``r_factor``; x: ``lstsq_solution``; residual SD: ``residual_std``; standard errors:
``standard_errors``), never to each other's bits; the read log shows which rows were read.
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.linalg
import yaml

from rowfold import storage
from rowfold.cli import main

import bounds
from support import prescribed


def make_input(folder: Path, A: np.ndarray, b: np.ndarray, suffix: str) -> Path:
    """Write A and b as growable arrays (HDF5 maxshape None; Zarr arrays can grow)."""
    path = folder / f"obs{suffix}"
    if suffix == ".h5":
        with h5py.File(path, "w") as handle:
            handle.create_dataset(
                "A", data=A, maxshape=(None, A.shape[1]), chunks=(100, A.shape[1])
            )
            handle.create_dataset("b", data=b, maxshape=(None,), chunks=(100,))
    else:
        storage.write_arrays(path, {"A": A, "b": b}, chunk_rows=100)
    return path


def append_rows(path: Path, A_new: np.ndarray, b_new: np.ndarray) -> None:
    if path.suffix == ".h5":
        with h5py.File(path, "a") as handle:
            m = handle["A"].shape[0]
            handle["A"].resize((m + len(A_new), A_new.shape[1]))
            handle["A"][m:] = A_new
            handle["b"].resize((m + len(b_new),))
            handle["b"][m:] = b_new
        return
    import zarr

    group = zarr.open_group(str(path), mode="a")
    group["A"].append(A_new, axis=0)
    group["b"].append(b_new, axis=0)


def write_job(folder: Path, data: Path, **extra: object) -> Path:
    job = {
        "input": {"path": data.name, "matrix": "A", "rhs": "b", "rows_per_block": 150},
        "output": {"path": "result.h5", "overwrite": True},
        **extra,
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def result(folder: Path) -> tuple[dict[str, np.ndarray], dict[str, object]]:
    arrays = storage.read_result(folder / "result.h5")
    report = json.loads((folder / "result.report.json").read_text(encoding="utf-8"))
    return arrays, report


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_update_equals_a_full_run_and_reads_only_new_rows(
    tmp_path: Path, suffix: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(41)
    A = prescribed(1050, 6, 1e4, seed=41)
    b = A @ rng.standard_normal(6) + 1e-3 * rng.standard_normal(1050)
    data = make_input(tmp_path, A[:1000], b[:1000], suffix)
    job = write_job(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    append_rows(data, A[1000:], b[1000:])  # 5% more rows
    log = tmp_path / "reads.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    monkeypatch.delenv("ROWFOLD_READ_LOG")
    data_reads = [
        line.split("\t") for line in log.read_text().splitlines() if line.startswith("data")
    ]
    assert data_reads and all(int(start) >= 1000 for _, _, _, start, _ in data_reads)
    updated, report = result(tmp_path)
    assert report["update"] == {"rows_before": 1000, "rows_added": 50}
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    full, full_report = result(tmp_path)
    n, kappa = 6, 1e4
    x_ref = scipy.linalg.lstsq(A, b)[0]
    residual = np.linalg.norm(b - A @ x_ref)
    ratio = residual / (np.linalg.norm(A, 2) * np.linalg.norm(x_ref))
    rhs_over_residual = np.linalg.norm(b) / residual
    r_error = np.linalg.norm(updated["R"] - full["R"]) / np.linalg.norm(A, 2)
    assert r_error <= bounds.r_factor(n, kappa)
    for x in (full["x"], x_ref):
        assert bounds.relative_error(updated["x"], x) <= bounds.lstsq_solution(n, kappa, ratio)
    sd_error = abs(report["residual_std"] / full_report["residual_std"] - 1)
    assert sd_error <= bounds.residual_std(n, kappa, rhs_over_residual)
    se_error = np.max(np.abs(updated["x_stderr"] / full["x_stderr"] - 1))
    assert se_error <= bounds.standard_errors(n, kappa, rhs_over_residual)


def test_update_refuses_changed_old_rows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A = prescribed(600, 4, 10.0, seed=42)
    data = make_input(tmp_path, A, A[:, 0].copy(), ".h5")
    job = write_job(tmp_path, data)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before = (tmp_path / "result.h5").read_bytes()
    with h5py.File(data, "a") as handle:
        handle["A"][10, 2] += 1.0
    append_rows(data, A[:20], A[:20, 0])
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    err = capsys.readouterr().err
    assert "run `rowfold run` instead" in err and "obs.h5:A" in err
    assert (tmp_path / "result.h5").read_bytes() == before


def test_update_without_new_rows_changes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A = prescribed(300, 3, 10.0, seed=43)
    job = write_job(tmp_path, make_input(tmp_path, A, A[:, 0].copy(), ".h5"))
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    before = (tmp_path / "result.h5").read_bytes()
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    assert "nothing to do" in capsys.readouterr().out
    assert (tmp_path / "result.h5").read_bytes() == before


def test_update_without_earlier_result_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A = prescribed(300, 3, 10.0, seed=44)
    job = write_job(tmp_path, make_input(tmp_path, A, A[:, 0].copy(), ".h5"))
    assert main(["--quiet", "update", str(job), "--inline"]) == 2
    assert "no earlier result" in capsys.readouterr().err


def test_several_jobs_run_on_and_exit_with_the_worst_status(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A job that fails while running (a gate: exit 3) does not stop the others; an invalid
    job stops the whole run before anything computes (exit 2)."""
    A = prescribed(300, 3, 10.0, seed=45)
    data = make_input(tmp_path, A, A[:, 0].copy(), ".h5")
    jobs = tmp_path / "jobs"
    jobs.mkdir()
    good = {"input": {"path": str(data), "matrix": "A"}, "output": {"overwrite": True}}
    for name, extra in [
        ("a_good", {}),
        ("b_gate_fails", {"gates": {"orthogonality": 1e-300}}),
        ("c_good", {}),
    ]:
        spec = {
            **good,
            **extra,
            "output": {"path": str(tmp_path / f"{name}.h5"), "overwrite": True},
        }
        (jobs / f"{name}.yaml").write_text(yaml.safe_dump(spec), encoding="utf-8")
    assert main(["--quiet", "run", str(jobs), "--inline"]) == 3
    out = capsys.readouterr().out
    assert "job summary:" in out
    assert (tmp_path / "a_good.h5").exists() and (tmp_path / "c_good.h5").exists()
    (tmp_path / "c_good.h5").unlink()
    assert main(["--quiet", "run", str(jobs), "--inline", "--fail-fast"]) == 3
    assert not (tmp_path / "c_good.h5").exists()
    spec = {**good, "input": {"path": str(data), "matrix": "nope"}}
    (jobs / "b_gate_fails.yaml").write_text(yaml.safe_dump(spec), encoding="utf-8")
    (tmp_path / "a_good.h5").unlink()
    assert main(["--quiet", "run", str(jobs), "--inline"]) == 2
    assert "none was run" in capsys.readouterr().err
    assert not (tmp_path / "a_good.h5").exists()


def test_inspect_shows_provenance(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    A = prescribed(300, 3, 10.0, seed=46)
    job = write_job(tmp_path, make_input(tmp_path, A, A[:, 0].copy(), ".h5"))
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    capsys.readouterr()
    assert main(["inspect", "--json", str(tmp_path / "result.h5")]) == 0
    shown = json.loads(capsys.readouterr().out)
    prov = shown["attrs"]["provenance"]
    for key in ("rowfold", "numpy", "scipy", "dask", "h5py", "zarr", "blas", "host", "started"):
        assert key in prov
    matrix = shown["attrs"]["inputs"]["matrix"]
    assert matrix["hash"] == "blake3" and len(matrix["content"]) == 64
    assert matrix["blocks"] == 2 and matrix["rows"] == 300  # 150 rows per block


def test_killed_run_resumes_without_rereading_finished_blocks(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """SIGKILL mid-way through the first pass; `run --resume` reuses the checkpointed
    blocks (the read log shows they are not read again) and gives the same R as a fresh run,
    to the R-factor bound: the checkpoints were written by a worker thread (BLAS on one
    thread), the fresh run is in-line, so the two may round differently.
    """
    import os
    import signal
    import subprocess
    import sys
    import time

    rng = np.random.default_rng(47)
    A = rng.standard_normal((240_000, 40))
    data = make_input(tmp_path, A, A[:, 0].copy(), ".h5")
    job = write_job(tmp_path, data)
    text = job.read_text().replace("rows_per_block: 150", "rows_per_block: 8000")
    job.write_text(text)
    folder = tmp_path / ".rowfold-checkpoints-result.h5"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "rowfold",
            "--quiet",
            "run",
            str(job),
            "--set",
            "cluster.processes=false",
            "--set",
            "cluster.workers=1",
        ],
        cwd=tmp_path,
        start_new_session=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None:
            if folder.is_dir() and len(list(folder.glob("tsqr-leaf-*.npz"))) >= 3:
                break
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before it could be killed"
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    saved = sorted(int(p.stem.split("-")[-1]) for p in folder.glob("tsqr-leaf-*.npz"))
    assert saved and not (tmp_path / "result.h5").exists()
    log = tmp_path / "reads.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    assert main(["--quiet", "run", str(job), "--inline", "--resume"]) == 0
    monkeypatch.delenv("ROWFOLD_READ_LOG")
    first_pass = [
        int(line.split("\t")[3]) // 8000
        for line in log.read_text().splitlines()
        if line.startswith("data") and line.split("\t")[2] == "A"
    ]
    # each block is read once by the verification pass; saved blocks are not read by pass 1
    reads = {block: first_pass.count(block) for block in range(30)}
    assert all(reads[block] == 1 for block in saved)
    assert all(reads[block] == 2 for block in range(30) if block not in saved)
    resumed, report = result(tmp_path)
    assert report["method_details"]["resumed_blocks"] == len(saved)
    assert not folder.exists()
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    fresh, _ = result(tmp_path)
    sigma = np.linalg.svd(A, compute_uv=False)
    r_error = np.linalg.norm(resumed["R"] - fresh["R"]) / sigma[0]
    assert r_error <= bounds.r_factor(40, sigma[0] / sigma[-1])


def test_log_file_gets_time_stamped_summary_and_errors(tmp_path: Path) -> None:
    A = prescribed(300, 3, 10.0, seed=48)
    job = write_job(tmp_path, make_input(tmp_path, A, A[:, 0].copy(), ".h5"))
    log = tmp_path / "night.log"
    assert main(["--quiet", "--log-file", str(log), "run", str(job), "--inline"]) == 0
    assert main(["--quiet", "--log-file", str(log), "update", str(tmp_path / "nope.yaml")]) == 2
    lines = log.read_text().splitlines()
    assert any("wrote" in line for line in lines)
    assert any("rowfold: error:" in line and "nope.yaml" in line for line in lines)
    assert all(line[:4].isdigit() and "T" in line[:11] for line in lines)


def test_update_keeps_its_gates_and_a_gate_it_cannot_evaluate_gives_exit_3(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """update does not form Q, so an orthogonality gate cannot be measured: it is reported
    as not evaluated, with the reason, and the exit status is 3, never 0 (a cron job reads
    0 as "every gate held"). The gram gate is measured and still held."""
    rng = np.random.default_rng(45)
    A = prescribed(650, 4, 10.0, seed=45)
    b = A @ rng.standard_normal(4) + 1e-3 * rng.standard_normal(650)
    data = make_input(tmp_path, A[:600], b[:600], ".h5")
    gates = {"orthogonality": 1e-10, "gram": 1e-10}
    job = write_job(
        tmp_path, data, output={"path": "result.h5", "overwrite": True, "q": True}, gates=gates
    )
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    _, before = result(tmp_path)
    assert before["gates"]["orthogonality"]["evaluated"] is True
    append_rows(data, A[600:], b[600:])
    capsys.readouterr()
    assert main(["--quiet", "update", str(job), "--inline"]) == 3
    out = capsys.readouterr().out
    assert "not evaluated: orthogonality" in out
    _, report = result(tmp_path)
    gate = report["gates"]["orthogonality"]
    assert gate == {
        "limit": 1e-10,
        "value": None,
        "held": None,
        "evaluated": False,
        "reason": gate["reason"],
        "rule": "value <= limit",
    }
    assert "Q not formed by update" in gate["reason"]
    assert report["gates"]["gram"]["held"] is True and report["gates"]["gram"]["evaluated"]
    # the global test of the model needs only e^T e, which update folds in
    assert report["model_test"]["evaluated"] is True
    assert report["model_test"]["degrees_of_freedom"] == 650 - 4
    assert report["gates_status"] == "not evaluated" and report["exit_status"] == 3
    page = (tmp_path / "result.report.html").read_text(encoding="utf-8")
    assert "NOT EVALUATED" in page and "Q not formed by update" in page
