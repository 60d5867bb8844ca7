"""Time rowfold's start-up: a tiny job end to end, and ``rowfold --help``.

Run from the repository root::

    python benchmarks/startup.py

Writes a 1000 x 5 float64 matrix with one right-hand side (HDF5, invented numbers) and a job
file with every default (``tsqr``, the embedded default engine, report and all) into a
temporary folder, then runs ``python -m rowfold run JOB`` and ``python -m rowfold --help``
as fresh processes ``--repeat`` times each (best and worst wall time), and the same job with
``cluster.scheduler: threads`` and with ``cluster.scheduler: distributed`` (the embedded
``LocalCluster`` whatever the job's size). Prints seconds and the ratio to issue 17's goals:
1.0 s for the tiny job on the embedded default, 0.3 s for ``--help``.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

from rowfold.storage import write_arrays

JOB_GOAL = 1.0
HELP_GOAL = 0.3


def write_job(folder: Path, cluster: dict[str, str]) -> Path:
    """A 1000 x 5 job with a right-hand side; every other key at its default."""
    rng = np.random.default_rng(2026)
    if not (folder / "tiny.h5").exists():
        a = rng.standard_normal((1000, 5))
        b = a @ np.arange(1.0, 6.0) + 0.01 * rng.standard_normal(1000)
        write_arrays(folder / "tiny.h5", {"A": a, "b": b})
    name = "-".join(cluster.values()) or "default"
    job = {
        "name": f"startup-{name}",
        "input": {"path": "tiny.h5", "matrix": "A", "rhs": "b"},
        "output": {"path": f"out-{name}.h5", "overwrite": True},
    }
    if cluster:
        job["cluster"] = dict(cluster)
    path = folder / f"job-{name}.yaml"
    path.write_text(yaml.safe_dump(job, sort_keys=False), encoding="utf-8")
    return path


def timed(argv: list[str], cwd: Path) -> float:
    """Wall seconds of one fresh ``python -m rowfold`` process (it must exit 0)."""
    started = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "rowfold", *argv],
        cwd=cwd,
        check=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    return time.perf_counter() - started


def main() -> None:
    """Run each case ``--repeat`` times and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3, help="runs of each case (3)")
    opts = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="rowfold-startup-") as tmp:
        folder = Path(tmp)
        cases = [
            ("rowfold --help", ["--help"], HELP_GOAL),
            ("tiny job, embedded default", ["run", str(write_job(folder, {}))], JOB_GOAL),
            (
                "tiny job, scheduler: threads",
                ["run", str(write_job(folder, {"scheduler": "threads"}))],
                JOB_GOAL,
            ),
            (
                "tiny job, scheduler: distributed",
                ["run", str(write_job(folder, {"scheduler": "distributed"}))],
                JOB_GOAL,
            ),
        ]
        print(f"{'case':<34} {'best s':>7} {'worst s':>8} {'goal s':>7} {'best/goal':>10}")
        for name, argv, goal in cases:
            try:
                times = [timed(argv, folder) for _ in range(opts.repeat)]
            except subprocess.CalledProcessError as exc:
                print(f"{name:<34} failed (exit {exc.returncode})")
                continue
            best, worst = min(times), max(times)
            print(f"{name:<34} {best:7.2f} {worst:8.2f} {goal:7.1f} {best / goal:9.2f}x")


if __name__ == "__main__":
    main()
