"""Smoke test of the machine-limit benchmark's one documented command, at a toy size.

Only that the command runs and writes the JSON fields the README documents; no figure is
checked (timings belong in no test).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "machine_limit.py"


@pytest.mark.slow
def test_machine_limit_writes_its_json_fields(tmp_path: Path) -> None:
    command = [sys.executable, str(SCRIPT), "--rows", "600", "--cols", "3", "--repeat", "1"]
    command += ["--gemm-size", "64", "--workdir", str(tmp_path), "--cold"]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "vs limit" in done.stdout and "limit =" in done.stdout
    record = json.loads((tmp_path / "results" / "machine_limit_600x3_cold.json").read_text())
    for key in ("rows", "cols", "cold", "cache", "blas", "gemm", "limit", "results", "ratios"):
        assert key in record
    for key in ("read_seconds", "flop_seconds", "dgemm_gflops", "limit_seconds", "limit_is"):
        assert key in record["limit"]
    assert {row["key"] for row in record["results"]} == {"read", "tsqr", "cholqr2", "dask"}
    assert set(record["ratios"]) == {"read", "tsqr", "cholqr2", "dask"}
    assert all({"vs_limit", "vs_dask"} <= set(r) for r in record["ratios"].values())
    assert record["blas"] and "architecture" in record["blas"][0]
    _check_scaled_rerun(tmp_path)


def _check_scaled_rerun(workdir: Path) -> None:
    """``--only tsqr --scaled-from 600`` at twice the rows times the read and tsqr only and
    prints each time against twice the earlier one (no figure is checked)."""
    command = [sys.executable, str(SCRIPT), "--rows", "1200", "--cols", "3", "--cold"]
    command += ["--gemm-size", "64", "--workdir", str(workdir), "--only", "tsqr"]
    command += ["--scaled-from", "600"]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "against 2x the 600-row run" in done.stdout
    record = json.loads((workdir / "results" / "machine_limit_1200x3_cold.json").read_text())
    assert {row["key"] for row in record["results"]} == {"read", "tsqr"}
    assert set(record["scaling"]["rows"]) == {"read", "tsqr"}
    assert record["scaling"]["factor"] == 2.0
