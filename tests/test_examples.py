"""The example jobs and configs in the repository stay valid and equal to what the code writes."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from rowfold import demo
from rowfold.spec import load_job

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.parametrize("job", sorted((ROOT / "jobs").glob("*.yaml")), ids=lambda p: p.name)
def test_example_jobs_parse(job: Path) -> None:
    parsed = load_job(job)
    assert parsed.input.path.is_absolute()
    assert parsed.output.path.is_absolute()


@pytest.mark.parametrize(
    ("example", "text"),
    [
        ("tarnholm_zero_points_tsqr.yaml", demo.JOB_TSQR),
        ("tarnholm_zero_points_cholqr2.yaml", demo.JOB_CHOLQR2),
        ("brackenholt_levelling_cholqr2.yaml", demo.JOB_LEVELLING),
        ("tarnholm_zero_points_nightly.yaml", demo.JOB_NIGHTLY),
    ],
)
def test_demo_jobs_match_the_examples(example: str, text: str) -> None:
    assert (ROOT / "jobs" / example).read_text(encoding="utf-8") == text


def _auto(value: Any) -> Any:
    """A profile's ``auto`` (or an absent key) is None in the parsed job (spec.ClusterSpec)."""
    return None if value in ("auto", None) else value


@pytest.mark.parametrize("profile", sorted((ROOT / "configs").glob("*.yaml")), ids=lambda p: p.name)
def test_cluster_profiles_load(profile: Path, tmp_path: Path) -> None:
    """A job naming a profile gets every setting the profile file writes down."""
    job = tmp_path / "job.yaml"
    job.write_text(
        f"input: {{path: a.h5, matrix: A}}\noutput: {{path: o.h5}}\n"
        f"cluster: {{profile: {profile}}}\n",
        encoding="utf-8",
    )
    cluster = load_job(job).cluster
    written = yaml.safe_load(profile.read_text(encoding="utf-8"))["cluster"]
    assert cluster.address == written.get("address")
    assert cluster.workers == _auto(written.get("workers"))
    assert cluster.threads_per_worker == _auto(written.get("threads_per_worker"))
    assert cluster.processes == _auto(written.get("processes"))
    assert cluster.scheduler == written.get("scheduler", "auto")


def test_demo_recovers_its_true_parameters(tmp_path: Path) -> None:
    """The demo's synthetic data were drawn from known parameters; tsqr must recover them
    to within a few standard errors (a statistical sanity check of the whole pipeline)."""
    import h5py
    import numpy as np

    from rowfold import runner

    job_path = demo.write_scenario(tmp_path, rows=20_000)[0]
    outcome = runner.run_job(load_job(job_path), inline=True)
    assert outcome.status == 0
    with h5py.File(outcome.output, "r") as store:
        x, stderr = store["x"][...], store["x_stderr"][...]
    z = np.abs(x - demo.true_parameters()) / stderr
    assert np.max(z) < 5.0
    assert abs(outcome.report["residual_std"] - demo.NOISE_MAG) < 0.1 * demo.NOISE_MAG


def test_quick_start_demo_command_runs_end_to_end(tmp_path: Path) -> None:
    """The README's first command, as a user runs it (default embedded cluster of worker
    processes), at a smaller size: every demo job exits 0 and writes its store and reports."""
    import subprocess
    import sys

    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "rowfold",
            "--quiet",
            "demo",
            str(tmp_path / "demo"),
            "--rows",
            "20000",
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr
    results = tmp_path / "demo" / "results"
    reports = sorted(p.name for p in results.glob("*.report.json"))
    assert len(reports) == len(list((tmp_path / "demo").glob("*.yaml")))
    assert "wrote" in done.stdout


def test_template_lists_every_key() -> None:
    """jobs/template.yaml names every key of the sections it shows (README: "lists every
    key with its default"); method options of other methods are listed as comments."""
    from dataclasses import fields

    import yaml

    from rowfold import spec

    template = yaml.safe_load((ROOT / "jobs" / "template.yaml").read_text(encoding="utf-8"))
    sections = {
        "input": spec.InputSpec,
        "output": spec.OutputSpec,
        "solve": spec.SolveSpec,
        "gates": spec.GateSpec,
        "cluster": spec.ClusterSpec,
    }
    for section, kind in sections.items():
        expected = {f.name for f in fields(kind)} | ({"profile"} if section == "cluster" else set())
        assert set(template[section]) == expected, section
    text = (ROOT / "jobs" / "template.yaml").read_text(encoding="utf-8")
    for option in {f.name for f in fields(spec.MethodSpec)}:
        assert f"{option}:" in text, option
