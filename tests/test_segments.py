"""Segments: update adds one, replace reads one segment's rows again, retire drops segments
reading no rows, ``update.window`` keeps the last N. Each answer must equal a full run over
exactly the rows that remain, to the perturbation bounds of Householder QR and least
squares (tests/bounds.py: Higham 2002 Thm 19.4 for the QR's backward error, Thm 20.1 for
least squares; the tree reduction of the segments' factors is TSQR, backward stable with
any tree, Demmel, Grigori, Hoemmen & Langou, SISC 34(1) 2012).
"""

from __future__ import annotations

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
import scipy.linalg
import scipy.sparse as sp
import yaml

from rowfold import storage, testhooks
from rowfold.cli import main
from rowfold.storage import write_arrays, write_csr

import bounds
from support import lapack_r, prescribed

N = 4
NIGHT = 100  # rows per segment in the main test
BLOCK = 50  # rows per block: every segment boundary falls on a block boundary


@pytest.fixture(autouse=True)
def fresh_hooks() -> Any:
    testhooks.reset()
    yield
    testhooks.reset()


def write_input(path: Path, A: np.ndarray, b: np.ndarray, csr: bool) -> None:
    """Write (or rewrite, with more rows or changed rows) the job's input."""
    if csr:
        if path.exists():
            import shutil

            shutil.rmtree(path) if path.is_dir() else path.unlink()
        write_csr(path, "A", sp.csr_matrix(A), {"b": b})
        return
    write_arrays(path, {"A": A, "b": b}, chunk_rows=BLOCK)


def write_job(folder: Path, data: Path, out: str, method: str = "tsqr", **update: Any) -> Path:
    job: dict[str, Any] = {
        "name": "segments-test",
        "input": {"path": data.name, "matrix": "A", "rhs": "b", "rows_per_block": BLOCK},
        "method": {"name": method},
        "output": {"path": out, "overwrite": True},
        "gates": {"gram": 1e-10},
    }
    if update:
        job["update"] = update
    path = folder / f"job-{Path(out).stem}.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def report_of(out: Path) -> dict[str, Any]:
    json_path, _ = storage.report_paths(out)
    return dict(json.loads(json_path.read_text(encoding="utf-8")))


def rows_of(rng: np.random.Generator, A: np.ndarray) -> np.ndarray:
    x_true = np.arange(1.0, N + 1)
    return A @ x_true + 1e-3 * rng.standard_normal(A.shape[0])


def assert_equals_lstsq(out: Path, A: np.ndarray, b: np.ndarray, reference: Path) -> None:
    """The store at ``out`` holds the answer for exactly the rows ``A``, ``b``: its R and x
    against LAPACK (numpy QR, scipy lstsq) and its statistics against a full run over those
    rows (``reference``), each to its perturbation bound."""
    store, report = storage.read_result(out), report_of(out)
    full, full_report = storage.read_result(reference), report_of(reference)
    kappa = float(np.linalg.cond(A))
    x_ref = scipy.linalg.lstsq(A, b)[0]
    residual = float(np.linalg.norm(b - A @ x_ref))
    ratio = residual / (np.linalg.norm(A, 2) * np.linalg.norm(x_ref))
    # R factor perturbation (Sun 1991; Chang, Paige & Stewart 1997) with Higham Thm 19.4
    for R in (lapack_r(A), full["R"]):
        assert np.linalg.norm(store["R"] - R) / np.linalg.norm(A, 2) <= bounds.r_factor(N, kappa)
    # least-squares perturbation (Wedin 1973; Higham Thm 20.1)
    for x in (x_ref, full["x"]):
        assert bounds.relative_error(store["x"], x) <= bounds.lstsq_solution(N, kappa, ratio)
    rhs_over_residual = float(np.linalg.norm(b)) / residual
    sd_ref = residual / np.sqrt(A.shape[0] - N)
    for sd in (sd_ref, full_report["residual_std"]):
        error = abs(report["residual_std"] / sd - 1)
        assert error <= bounds.residual_std(N, kappa, rhs_over_residual)
    se_error = np.max(np.abs(store["x_stderr"] / full["x_stderr"] - 1))
    assert se_error <= bounds.standard_errors(N, kappa, rhs_over_residual)
    assert report["rows"] == A.shape[0] == full_report["rows"]
    assert report["degrees_of_freedom"] == A.shape[0] - N == full_report["degrees_of_freedom"]


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
@pytest.mark.parametrize("csr", [False, True], ids=["dense", "csr"])
@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_add_three_retire_the_first_replace_the_second_equals_a_full_run(
    tmp_path: Path, method: str, csr: bool, suffix: str
) -> None:
    rng = np.random.default_rng(18)
    A = prescribed(4 * NIGHT, N, 1e3, seed=18)
    if csr:
        A[np.abs(A) < 0.01] = 0.0  # some structural zeros
    b = rows_of(rng, A)
    data = tmp_path / f"obs{suffix}"
    out = tmp_path / f"result{suffix}"
    write_input(data, A[:NIGHT], b[:NIGHT], csr)
    job = write_job(tmp_path, data, out.name, method)
    assert main(["--quiet", "run", str(job), "--inline", "--set", "update.label=night-1"]) == 0
    for night in (2, 3, 4):
        rows = night * NIGHT
        write_input(data, A[:rows], b[:rows], csr)
        label = f"night-{night}"
        assert main(["--quiet", "update", str(job), "--inline", "--label", label]) == 0
    assert main(["--quiet", "retire", str(job), "night-1"]) == 0
    A2 = prescribed(NIGHT, N, 1e2, seed=99)  # night 2 re-calibrated: new values, same rows
    A_now, b_now = A.copy(), b.copy()
    A_now[NIGHT : 2 * NIGHT], b_now[NIGHT : 2 * NIGHT] = A2, rows_of(rng, A2)
    write_input(data, A_now, b_now, csr)
    assert main(["--quiet", "replace", str(job), "night-2", "--inline"]) == 0
    report = report_of(out)
    covered = report["segments"]["covered"]
    assert [s["label"] for s in covered] == ["night-2", "night-3", "night-4"]
    assert [s["how"] for s in covered] == ["replace", "update", "update"]
    assert report["segments"]["step"]["rows_changed"] is True
    assert [s["label"] for s in report["segments"]["retired"]] == ["night-1"]
    kept_A, kept_b = A_now[NIGHT:], b_now[NIGHT:]
    ref_data = tmp_path / f"kept{suffix}"
    write_input(ref_data, kept_A, kept_b, csr)
    reference = tmp_path / f"reference{suffix}"
    assert main(["--quiet", "run", str(write_job(tmp_path, ref_data, reference.name, method))]) == 0
    assert_equals_lstsq(out, kept_A, kept_b, reference)


def test_retire_reads_no_rows_and_replace_reads_only_its_segment(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(5)
    A = prescribed(3 * NIGHT, N, 10.0, seed=5)
    b = rows_of(rng, A)
    data, out = tmp_path / "obs.zarr", tmp_path / "result.h5"
    write_input(data, A[:NIGHT], b[:NIGHT], False)
    job = write_job(tmp_path, data, out.name)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    for night in (2, 3):
        write_input(data, A[: night * NIGHT], b[: night * NIGHT], False)
        assert main(["--quiet", "update", str(job), "--inline"]) == 0
    log = tmp_path / "reads.log"
    monkeypatch.setenv("ROWFOLD_READ_LOG", str(log))
    assert main(["--quiet", "retire", str(job), "rows-0-99"]) == 0
    assert not log.exists() or log.read_text() == ""  # not one row, nor one digest
    assert report_of(out)["segments"]["step"]["rows_read_count"] == 0
    assert main(["--quiet", "replace", str(job), "rows-200-299", "--inline"]) == 0
    monkeypatch.delenv("ROWFOLD_READ_LOG")
    reads = [line.split("\t") for line in log.read_text().splitlines()]
    assert reads, "replace read nothing"
    assert {purpose for purpose, *_ in reads} >= {"data"}
    for _, _, _, start, stop in reads:
        assert int(start) >= 200 and int(stop) <= 300, f"read rows {start}..{stop} outside"


def test_a_window_over_ten_nights_equals_a_full_run_over_the_last_nights(tmp_path: Path) -> None:
    nights, rows, window = 10, 40, 3
    rng = np.random.default_rng(10)
    A = prescribed(nights * rows, N, 1e2, seed=10)
    b = rows_of(rng, A)
    data, out = tmp_path / "obs.h5", tmp_path / "result.h5"
    write_input(data, A[:rows], b[:rows], False)
    job = write_job(tmp_path, data, out.name, window=window)
    job_text = job.read_text().replace(f"rows_per_block: {BLOCK}", f"rows_per_block: {rows}")
    job.write_text(job_text)
    assert main(["--quiet", "run", str(job), "--inline", "--set", "update.label=n01"]) == 0
    for night in range(2, nights + 1):
        write_input(data, A[: night * rows], b[: night * rows], False)
        assert main(["--quiet", "update", str(job), "--inline", "--label", f"n{night:02d}"]) == 0
        labels = [s["label"] for s in report_of(out)["segments"]["covered"]]
        first = max(1, night - window + 1)
        assert labels == [f"n{i:02d}" for i in range(first, night + 1)]
    retired = report_of(out)["segments"]["retired"]
    assert [r["label"] for r in retired] == [f"n{i:02d}" for i in range(1, nights - window + 1)]
    assert all(r["retired_by"] == f"update.window: {window}" for r in retired)
    kept_A, kept_b = A[-window * rows :], b[-window * rows :]
    ref_data = tmp_path / "kept.h5"
    write_input(ref_data, kept_A, kept_b, False)
    reference = tmp_path / "reference.h5"
    assert main(["--quiet", "run", str(write_job(tmp_path, ref_data, reference.name))]) == 0
    assert_equals_lstsq(out, kept_A, kept_b, reference)


def test_weights_and_fixed_columns_are_kept_by_every_segment(tmp_path: Path) -> None:
    """A weighted job with a datum: retire and replace give the weighted solution of the
    remaining rows with the fixed column at 0 (Higham Thm 20.1 on diag(sqrt(w)) [A | b])."""
    rng = np.random.default_rng(7)
    A = prescribed(3 * NIGHT, N + 1, 1e2, seed=7)
    b = A @ np.arange(N + 1.0) + 1e-3 * rng.standard_normal(3 * NIGHT)
    w = rng.uniform(0.5, 2.0, 3 * NIGHT)
    w[::17] = 0.0  # some rows unused
    data, out = tmp_path / "obs.h5", tmp_path / "result.h5"
    write_arrays(data, {"A": A[:NIGHT], "b": b[:NIGHT], "w": w[:NIGHT]}, chunk_rows=BLOCK)
    job = write_job(tmp_path, data, out.name)
    doc = yaml.safe_load(job.read_text())
    doc["input"].update({"weights": "w", "fixed_columns": [0]})
    job.write_text(yaml.safe_dump(doc))
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    for night in (2, 3):
        stop = night * NIGHT
        write_arrays(data, {"A": A[:stop], "b": b[:stop], "w": w[:stop]}, chunk_rows=BLOCK)
        assert main(["--quiet", "update", str(job), "--inline"]) == 0
    assert main(["--quiet", "retire", str(job), "rows-100-199"]) == 0
    store, report = storage.read_result(out), report_of(out)
    keep = np.r_[0:NIGHT, 2 * NIGHT : 3 * NIGHT]
    root = np.sqrt(w[keep])
    Aw, bw = root[:, None] * A[keep][:, 1:], root * b[keep]
    x_ref = scipy.linalg.lstsq(Aw, bw)[0]
    kappa = float(np.linalg.cond(Aw))
    ratio = np.linalg.norm(bw - Aw @ x_ref) / (np.linalg.norm(Aw, 2) * np.linalg.norm(x_ref))
    assert store["x"][0] == 0.0
    assert bounds.relative_error(store["x"][1:], x_ref) <= bounds.lstsq_solution(N, kappa, ratio)
    assert report["degrees_of_freedom"] == int(np.count_nonzero(w[keep])) - N


# ------------------------------------------------------------------------ refusals


def three_segments(
    tmp_path: Path, suffix: str = ".h5", more: bool = False
) -> tuple[Path, Path, Path]:
    """A result of three segments (rows-0-99, rows-100-199, rows-200-299); with ``more``,
    the input then gains a fourth night's rows to update with."""
    rng = np.random.default_rng(3)
    A = prescribed(4 * NIGHT, N, 10.0, seed=3)
    b = rows_of(rng, A)
    data, out = tmp_path / f"obs{suffix}", tmp_path / f"result{suffix}"
    write_input(data, A[:NIGHT], b[:NIGHT], False)
    job = write_job(tmp_path, data, out.name)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    for night in (2, 3):
        write_input(data, A[: night * NIGHT], b[: night * NIGHT], False)
        assert main(["--quiet", "update", str(job), "--inline"]) == 0
    if more:
        write_input(data, A, b, False)
    return job, data, out


def snapshot(out: Path) -> dict[str, bytes]:
    """Every byte of a result store and its reports, by relative path."""
    paths = [out, *storage.report_paths(out)]
    files: dict[str, bytes] = {}
    for path in paths:
        if path.is_dir():
            for item in sorted(path.rglob("*")):
                if item.is_file():
                    files[str(item.relative_to(out.parent))] = item.read_bytes()
        else:
            files[path.name] = path.read_bytes()
    return files


@pytest.mark.parametrize(
    ("args", "expected"),
    [
        (["retire", "{job}", "rows-0-99", "rows-100-199", "rows-200-299"], "every live segment"),
        (["retire", "{job}", "night-7"], "no live segment is labelled 'night-7'"),
        (["replace", "{job}", "night-7", "--inline"], "no live segment is labelled 'night-7'"),
        (["update", "{job}", "--inline", "--label", "rows-0-99"], "already has this label"),
    ],
)
def test_refusals_exit_2_with_one_line_and_keep_the_result(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], expected: str
) -> None:
    job, data, out = three_segments(tmp_path)
    if args[0] == "update":  # rows to add, so that only the label is wrong
        A = prescribed(20, N, 10.0, seed=4)
        with h5py.File(data, "a") as handle:
            for name, rows in (("A", A), ("b", A[:, 0])):
                handle[name].resize(3 * NIGHT + 20, axis=0)
                handle[name][3 * NIGHT :] = rows
    before = snapshot(out)
    capsys.readouterr()
    assert main(["--quiet", *(a.format(job=job) for a in args)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and expected in err[0], err
    assert snapshot(out) == before


@pytest.mark.parametrize("change", ["grown", "shrunk"])
def test_replace_refuses_a_changed_row_count(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], change: str
) -> None:
    job, data, out = three_segments(tmp_path)
    with h5py.File(data, "a") as handle:
        rows = 3 * NIGHT + (5 if change == "grown" else -5)
        for name in ("A", "b"):
            handle[name].resize(rows, axis=0)
    before = snapshot(out)
    capsys.readouterr()
    assert main(["--quiet", "replace", str(job), "rows-100-199", "--inline"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "must stay where they were" in err[0], err
    assert snapshot(out) == before


def test_a_store_without_segments_is_one_segment(tmp_path: Path) -> None:
    """A store written before segments (no ``segments`` group or attribute) is taken as one
    segment from its augmented factor; without that factor, exit 2 with one line."""
    job, data, out = three_segments(tmp_path)
    with h5py.File(out, "a") as handle:
        del handle["segments"]
        del handle.attrs["segments"]
        del handle.attrs["retired_segments"]
    A = prescribed(NIGHT, N, 10.0, seed=8)
    with h5py.File(data, "a") as handle:
        for name, rows in (("A", A), ("b", A @ np.ones(N))):
            handle[name].resize(4 * NIGHT, axis=0)
            handle[name][3 * NIGHT :] = rows
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    labels = [s["label"] for s in report_of(out)["segments"]["covered"]]
    assert labels == ["rows-0-299", "rows-300-399"]
    with h5py.File(out, "a") as handle:
        del handle["segments"]
        del handle.attrs["segments"]
        del handle["state/residual_factor"]
    assert main(["--quiet", "retire", str(job), "rows-0-299"]) == 2


# ------------------------------------------------------------------------ kills


def cli(folder: Path, *args: str, env: dict[str, str]) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "rowfold", "--quiet", *args],
        cwd=folder,
        env={**os.environ, **env},
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
@pytest.mark.parametrize("verb", ["update", "replace", "retire"])
def test_kill_9_during_each_verb_leaves_the_previous_result_byte_identical(
    tmp_path: Path, verb: str, suffix: str
) -> None:
    """SIGKILL while the new result is staged and synced, just before its commit point
    (``commit:synced``): the store and reports on disk are the previous ones, byte for
    byte, and stay so when ``inspect`` clears what the killed process left."""
    job, _, out = three_segments(tmp_path, suffix, more=verb == "update")
    args = {
        "update": ["update", str(job), "--inline"],
        "replace": ["replace", str(job), "rows-100-199", "--inline"],
        "retire": ["retire", str(job), "rows-0-99"],
    }[verb]
    before = snapshot(out)
    ready = tmp_path / "paused"
    env = {"ROWFOLD_TEST_HOOK": "commit:synced=pause", "ROWFOLD_TEST_HOOK_READY": str(ready)}
    proc = cli(tmp_path, *args, env=env)
    try:
        deadline = time.monotonic() + 120
        while not ready.exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert ready.exists(), proc.stderr.read() if proc.stderr else ""
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(30)
    assert proc.returncode == -signal.SIGKILL
    assert snapshot(out) == before
    assert main(["--quiet", "inspect", str(out)]) == 0
    assert snapshot(out) == before
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".rowfold-")]


def test_tree_reduction_of_factors_equals_the_factor_of_the_stacked_rows() -> None:
    """Seven segments' R factors reduced by the binary tree give the R of all their rows:
    within the R-factor perturbation bound (Sun 1991; Higham Thm 19.4 for each of the
    Householder QRs, TSQR's tree stability: Demmel et al., SISC 34(1) 2012)."""
    from rowfold.kernels.tree import reduce_factors, triangular

    A = prescribed(7 * 30, 6, 1e4, seed=21)
    parts = [triangular(A[i : i + 30]) for i in range(0, A.shape[0], 30)]
    R = reduce_factors(iter(parts))
    assert np.array_equal(R, np.triu(R)) and np.all(np.diagonal(R) >= 0)
    error = np.linalg.norm(R - lapack_r(A)) / np.linalg.norm(A, 2)
    assert error <= bounds.r_factor(6, 1e4)


@pytest.mark.parametrize("verb", ["update", "replace", "retire"])
def test_a_gate_on_a_figure_not_recomputed_is_not_evaluated_and_exits_3(
    tmp_path: Path, verb: str
) -> None:
    job, _, out = three_segments(tmp_path, more=verb == "update")
    args = {
        "update": ["update", str(job), "--inline"],
        "replace": ["replace", str(job), "rows-100-199", "--inline"],
        "retire": ["retire", str(job), "rows-0-99"],
    }[verb]
    assert main(["--quiet", *args, "--set", "gates.orthogonality=1.0e-12"]) == 3
    report = report_of(out)
    gate = report["gates"]["orthogonality"]
    assert gate["evaluated"] is False and gate["held"] is None
    assert report["exit_status"] == 3 and report["orthogonality_loss"] is None
    assert set(report["segments"]["not_recomputed"]) >= {
        "orthogonality_loss",
        "factorization_residual",
        "residual_screening",
    }
    assert report["gates"]["gram"]["held"] is True  # recomputed from the segments
