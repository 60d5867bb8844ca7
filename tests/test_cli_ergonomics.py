"""The command line's conveniences: YAML 1.2 numbers, global options after the verb, a
multi-job run validated before it computes, the block-size warning, counted nouns, zoned
time stamps and ``inspect``'s human summary.

Sources: YAML 1.2.2 specification, section 10.3.2 (core schema: ``1e-12`` is a float);
ISO 8601-1:2019, section 5.3.4 (a UTC offset ``+hh:mm`` after the time of day).
"""

from __future__ import annotations

import re
import subprocess
import sys
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from rowfold.errors import JobError
from rowfold.spec import load_job
from rowfold.storage.csr import write_csr
from test_cli import COLS, ROWS, run, setup_job

ZONED_STAMP = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d[+-]\d\d:\d\d ")


@pytest.mark.parametrize(("text", "value"), [("1e-12", 1e-12), ("5E3", 5e3), (".5", 0.5)])
def test_yaml_12_floats_in_job_files_and_set(tmp_path: Path, text: str, value: float) -> None:
    """YAML 1.2 core-schema floats are numbers in the file and in ``--set``."""
    job = setup_job(tmp_path)
    job.write_text(job.read_text() + f"gates:\n  gram: {text}\n", encoding="utf-8")
    assert load_job(job).gates.gram == value
    assert load_job(job, (f"solve.sigma0={text}",)).solve.sigma0 == value


def test_a_negative_yaml_12_float_is_refused_as_a_number(tmp_path: Path) -> None:
    """``-2.5e+2`` is read as the number -250 (and refused as one), not as text."""
    with pytest.raises(JobError, match=r"found -250\.0$"):
        load_job(setup_job(tmp_path), ("solve.sigma0=-2.5e+2",))


def test_yaml_11_values_keep_their_meaning(tmp_path: Path) -> None:
    """Integers and 1.1 floats read as before; text stays text."""
    job = setup_job(tmp_path, input={"rows_per_block": 30})
    assert load_job(job, ("solve.sigma0=1.5",)).solve.sigma0 == 1.5
    assert load_job(job).input.rows_per_block == 30
    assert load_job(job, ("name=1e",)).name == "1e"


@pytest.mark.parametrize("place", ["before", "after"])
def test_global_options_before_or_after_the_verb(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, place: str
) -> None:
    """``--quiet`` and ``--log-file`` work on either side of the verb."""
    job = setup_job(tmp_path)
    log = tmp_path / "run.log"
    options = ["--quiet", "--log-file", str(log)]
    argv = [*options, "run", str(job), "--inline"]
    if place == "after":
        argv = ["run", str(job), "--inline", *options]
    status, _, err = run(capsys, *argv)
    assert status == 0, err
    assert err == ""
    lines = log.read_text(encoding="utf-8").splitlines()
    assert lines and all(ZONED_STAMP.match(line) for line in lines), lines


def test_log_stamp_is_iso_8601_with_zone(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """Each log line starts with a time that parses back with its UTC offset."""
    job = setup_job(tmp_path)
    log = tmp_path / "run.log"
    assert run(capsys, "--quiet", "--log-file", str(log), "check", str(job))[0] == 0
    stamp = log.read_text(encoding="utf-8").split(" ", 1)[0]
    assert datetime.fromisoformat(stamp).utcoffset() is not None


def test_multi_job_run_validates_every_job_first(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """A broken second job stops the run before the first computes (exit 2)."""
    good = setup_job(tmp_path)
    broken = tmp_path / "z_broken.yaml"
    broken.write_text(good.read_text().replace("model/A", "model/missing"), encoding="utf-8")
    status, _, err = run(capsys, "--quiet", "run", str(good), str(broken), "--inline")
    assert status == 2
    assert "model/missing" in err and "none was run" in err
    assert not (tmp_path / "out.h5").exists()


def test_small_blocks_draw_a_warning(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """Blocks of fewer than 4n rows are reported by check and by run (common practice)."""
    job = setup_job(tmp_path, input={"rows_per_block": 2 * COLS})
    status, out, _ = run(capsys, "check", str(job))
    assert status == 0
    assert f"fewer than 4n = {4 * COLS}" in out
    status, out, _ = run(capsys, "--quiet", "run", str(job), "--inline")
    assert status == 0
    assert "warning: input.rows_per_block" in out


def test_one_block_is_singular(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """The summary counts nouns: ``1 block``, not ``1 blocks``."""
    job = setup_job(tmp_path, input={"rows_per_block": ROWS})
    status, out, _ = run(capsys, "--quiet", "run", str(job), "--inline")
    assert status == 0
    assert " in 1 block," in out and "1 blocks" not in out


def test_inspect_summarizes_a_result_store(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """Short lines: each array with shape and meaning, the report's headline, no JSON."""
    job = setup_job(tmp_path)
    assert run(capsys, "--quiet", "run", str(job), "--inline")[0] == 0
    status, out, _ = run(capsys, "inspect", str(tmp_path / "out.h5"))
    assert status == 0
    assert not out.lstrip().startswith("{")
    assert len(out.splitlines()) < 40
    r_line = next(line for line in out.splitlines() if line.split()[:1] == ["R"])
    assert f"{COLS} x {COLS}" in r_line and "triangular factor" in r_line
    assert "report: job cli-test" in out


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_inspect_shows_a_csr_group_as_one_matrix(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, suffix: str
) -> None:
    """A CSR group is one sparse matrix line, not three arrays."""
    matrix = sp.random(50, 6, density=0.3, format="csr", random_state=np.random.default_rng(2))
    path = tmp_path / f"sparse{suffix}"
    write_csr(path, "net/A", matrix)
    status, out, _ = run(capsys, "inspect", str(path))
    assert status == 0
    assert f"CSR sparse 50 x 6, {matrix.nnz:,} stored values" in out
    assert "net/A/indptr" not in out


@pytest.mark.parametrize("flag", ["--help", "--version"])
def test_help_and_version_import_no_numerical_library(flag: str) -> None:
    """``--help`` and ``--version`` answer without importing numpy, scipy, dask, h5py,
    distributed or tqdm (the import time of those is what made ``--help`` slow)."""
    heavy = ("numpy", "scipy", "dask", "h5py", "distributed", "zarr", "tqdm", "matplotlib")
    code = (
        "import sys\n"
        "from rowfold.cli import main\n"
        f"status = main([{flag!r}])\n"
        f"print(status, sorted(m for m in {heavy!r} if m in sys.modules))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert done.stdout.splitlines()[-1] == "0 []", done.stdout


def test_segment_lines_and_warnings_fit_80_columns() -> None:
    """What a segment verb read, with many labels, and a long warning wrap at 80 columns
    with later lines indented; numbers carry thousands separators; labels stay whole."""
    from types import SimpleNamespace

    from rowfold import cli

    labels = [f"2026-11-{day:02d}" for day in range(1, 13)]
    report = {
        "segments": {
            "step": {
                "verb": "update",
                "rows_read": [[150_000, 225_000]],
                "rows_read_count": 75_000,
                "rows_checked_by_digest": 150_000,
                "retired": ["2026-10-31"],
            },
            "rows_covered": 900_000,
            "segments_covered": len(labels),
            "covered": [{"label": label} for label in labels],
        }
    }
    text = cli._segment_line(SimpleNamespace(report=report))  # type: ignore[arg-type]
    lines = text.splitlines()
    assert len(lines) > 1 and all(len(line) <= 80 for line in lines)
    assert all(line.startswith("    ") for line in lines[1:])
    assert "read 75,000 rows" in text and "hashed 150,000 old rows" in text
    assert all(label in text.split() or label + "," in text.split() for label in labels)
    warning = cli._wrapped("  warning: " + "a long warning about the rows " * 8)
    assert all(len(line) <= 80 for line in warning.splitlines())


def test_a_small_run_imports_neither_distributed_nor_scipy_stats(tmp_path: Path) -> None:
    """A tiny job on the default engine (``auto``: threads) imports no ``distributed`` (the
    LocalCluster's) and no ``scipy.stats`` (the model tests use scipy.special); a fresh
    process, so nothing another test imported counts."""
    from test_cli import setup_job

    job = setup_job(tmp_path)
    heavy = ("distributed", "scipy.stats")
    code = (
        "import sys\n"
        "from rowfold.cli import main\n"
        f"status = main(['--quiet', 'run', {str(job)!r}])\n"
        f"print(status, sorted(m for m in {heavy!r} if m in sys.modules))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        timeout=120,
        cwd=tmp_path,
    )
    assert done.stdout.splitlines()[-1] == "0 []", done.stdout
