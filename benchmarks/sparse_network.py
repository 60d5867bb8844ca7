"""Time rowfold on a sparse levelling network: densified tsqr against sparse-aware cholqr2.

Run from the repository root::

    python benchmarks/sparse_network.py --rows 3000000 --cols 200

The input is the demo's levelling network (``rowfold.demo.network``) at benchmark size: each
row is one height difference between two of ``cols`` benchmarks (+1 and -1, so two stored
values a row), with its weight 1 / distance, written as a CSR group into
``benchmarks/data/network_<rows>x<cols>.h5``. Benchmark 0 is held fixed
(``input.fixed_columns: [0]``) so the problem has full rank.

Each method runs as ``python -m rowfold run JOB`` in its own subprocess on the embedded local
Dask cluster (no cluster keys). The parent measures wall time and the peak resident memory
of the whole process tree with the helpers of ``compare_baselines.py`` (psutil polling every
0.1 s, summing RSS over the process and its descendants). The table goes to stdout, the record
to ``benchmarks/results/sparse_network_<rows>x<cols>.json``.

By default the jobs are full adjustments (rhs, weights, the datum), so the solution is checked
in a verification pass as users run them; ``--r-only`` drops rhs and weights (R only).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from compare_baselines import (  # noqa: E402  (a sibling script, not a package)
    DATA_DIR,
    MB,
    RESULTS_DIR,
    environment,
    measure,
)

METHODS = ("tsqr", "cholqr2")
PEAK_GOAL_MB = 1536.0
SPEEDUP_GOAL = 3.0


@dataclass
class Row:
    """One measured method.

    Attributes
    ----------
    method : str
        ``tsqr`` (densifies each row block) or ``cholqr2`` (sparse first pass and products).
    seconds : float or None
        Wall time of ``rowfold run`` as seen by the parent (None when it failed).
    peak_tree_mb : float or None
        Peak RSS summed over the process tree, MiB.
    max_single_rss_mb : float or None
        ``ru_maxrss`` of the largest single process (a cross-check on the poller).
    returncode : int
        Exit status of ``rowfold run``.
    report : dict
        Figures from rowfold's own report (stage seconds, blocks, residual figures).
    note : str
        The end of stderr when the run failed.
    """

    method: str
    seconds: float | None
    peak_tree_mb: float | None
    max_single_rss_mb: float | None
    returncode: int
    report: dict[str, Any]
    note: str = ""


def data_path(rows: int, cols: int) -> Path:
    """The generated CSR input for a shape."""
    return DATA_DIR / f"network_{rows}x{cols}.h5"


def ensure_data(rows: int, cols: int) -> Path:
    """Generate the network in a subprocess (so this process stays small) unless present."""
    path = data_path(rows, cols)
    if path.exists():
        import h5py

        with h5py.File(path, "r") as handle:
            shape = tuple(int(v) for v in handle["network/A"].attrs["shape"])
        if shape != (rows, cols):
            raise SystemExit(f"{path.name}: holds a {shape} network; delete it to regenerate")
        return path
    DATA_DIR.mkdir(parents=True, exist_ok=True)
    partial = path.with_name(f".{path.stem}.partial.h5")
    partial.unlink(missing_ok=True)
    _log(f"generating {path.name} ...")
    started = time.perf_counter()
    script = str(Path(__file__).resolve())
    shape = ["--rows", str(rows), "--cols", str(cols)]
    subprocess.run([sys.executable, script, "--child-generate", str(partial), *shape], check=True)
    partial.replace(path)
    _log(f"  done in {time.perf_counter() - started:.1f} s")
    return path


def generate(path: Path, rows: int, cols: int) -> None:
    """Write the network (A as CSR, dh, w) into the HDF5 file ``path``."""
    from rowfold.demo import network
    from rowfold.storage import write_csr

    A, dh, w = network(rows, benchmarks=cols, seed=20260301)
    write_csr(path, "network/A", A, {"network/dh": dh, "network/w": w})


def write_job(method: str, data: Path, rows: int, cols: int, opts: argparse.Namespace) -> Path:
    """Write the rowfold job for one method into the results folder; return its path."""
    import yaml

    stem = f"sparse_{method}_{rows}x{cols}"
    job_input: dict[str, Any] = {
        "path": os.path.relpath(data, RESULTS_DIR),
        "matrix": "network/A",
        "fixed_columns": [0],
        "rows_per_block": opts.rows_per_block,
    }
    if not opts.r_only:
        job_input.update({"rhs": "network/dh", "weights": "network/w"})
    job = {
        "name": f"benchmark-sparse-{method}-{rows}x{cols}",
        "input": job_input,
        "method": {"name": method},
        "output": {"path": f"{stem}.h5", "q": False, "overwrite": True},
    }
    if opts.scheduler != "distributed":
        job["cluster"] = {"scheduler": opts.scheduler}
    path = RESULTS_DIR / f"{stem}.job.yaml"
    path.write_text(yaml.safe_dump(job, sort_keys=False), encoding="utf-8")
    return path


def report_figures(rows: int, cols: int, method: str) -> dict[str, Any]:
    """Figures from a finished run's report."""
    path = RESULTS_DIR / f"sparse_{method}_{rows}x{cols}.report.json"
    if not path.exists():
        return {}
    data = json.loads(path.read_text(encoding="utf-8"))
    keys = (
        "seconds",
        "blocks",
        "rows_per_block",
        "passes_over_input",
        "peak_memory_bytes",
        "gram_residual",
        "r_condition",
        "residual_std",
        "normal_equations_residual",
        "method_details",
    )
    return {key: data.get(key) for key in keys}


def run_method(method: str, data: Path, rows: int, cols: int, opts: argparse.Namespace) -> Row:
    """Run one method in a subprocess and measure it."""
    job = write_job(method, data, rows, cols, opts)
    command = [sys.executable, "-m", "rowfold", "--quiet", "run", str(job)]
    _log(f"running {method} ...")
    got = measure(command, RESULTS_DIR / "logs" / f"sparse_{method}_{rows}x{cols}", opts.timeout)
    ok = got.returncode == 0
    single = got.max_single_rss_bytes
    _log(f"  rc={got.returncode} {got.seconds:.1f} s, peak tree {got.peak_tree_bytes / MB:.0f} MiB")
    return Row(
        method=method,
        seconds=got.seconds if ok else None,
        peak_tree_mb=got.peak_tree_bytes / MB,
        max_single_rss_mb=None if single is None else single / MB,
        returncode=got.returncode,
        report=report_figures(rows, cols, method) if ok else {},
        note=got.stderr_tail,
    )


def r_agreement(rows: int, cols: int) -> float | None:
    """max |R_tsqr - R_cholqr2| / max |R_tsqr| from the two stores (None if one is missing)."""
    import h5py
    import numpy as np

    found = []
    for method in METHODS:
        path = RESULTS_DIR / f"sparse_{method}_{rows}x{cols}.h5"
        if not path.exists():
            return None
        with h5py.File(path, "r") as handle:
            found.append(handle["R"][...])
    return float(np.max(np.abs(found[0] - found[1])) / np.max(np.abs(found[0])))


def format_table(table: list[Row], rows: int, cols: int, agreement: float | None) -> str:
    """The printed table, the ratio and the goals."""
    lines = [
        f"sparse levelling network, {rows} x {cols}, 2 stored values a row (CSR, HDF5)",
        f"{'method':<10} {'seconds':>9} {'peak tree MiB':>14} {'factor s':>9} {'verify s':>9}",
    ]
    for row in table:
        if row.seconds is None:
            lines.append(f"{row.method:<10} FAILED rc={row.returncode}")
            continue
        stages = row.report.get("seconds") or {}
        factor, verify = stages.get("factor", float("nan")), stages.get("verify", float("nan"))
        lines.append(
            f"{row.method:<10} {row.seconds:9.2f} {row.peak_tree_mb or 0:14.0f} "
            f"{factor:9.2f} {verify:9.2f}"
        )
    by = {row.method: row for row in table}
    tsqr, chol = by.get("tsqr"), by.get("cholqr2")
    if tsqr and chol and tsqr.seconds and chol.seconds:
        ratio = tsqr.seconds / chol.seconds
        lines.append(f"tsqr / cholqr2 wall time: {ratio:.2f}x (goal >= {SPEEDUP_GOAL:.0f}x)")
    peaks = [row.peak_tree_mb for row in table if row.peak_tree_mb is not None]
    if peaks:
        lines.append(f"largest peak tree: {max(peaks):.0f} MiB (goal < {PEAK_GOAL_MB:.0f} MiB)")
    if agreement is not None:
        lines.append(f"R agreement, max|R_tsqr - R_cholqr2| / max|R_tsqr|: {agreement:.2e}")
    return "\n".join(lines)


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    """Parse the command line."""
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--rows", type=int, default=3_000_000, help="height differences (3000000)")
    p.add_argument("--cols", type=int, default=200, help="benchmarks (default 200)")
    p.add_argument("--only", help="comma-separated methods (tsqr, cholqr2)")
    p.add_argument("--r-only", action="store_true", help="R only: no rhs and no weights")
    p.add_argument("--rows-per-block", default="auto", help="input.rows_per_block (auto)")
    p.add_argument(
        "--scheduler",
        choices=("distributed", "threads"),
        default="distributed",
        help="cluster.scheduler of the jobs (default distributed: the embedded LocalCluster)",
    )
    p.add_argument("--timeout", type=float, default=3600.0, help="seconds per run")
    p.add_argument("--child-generate", help=argparse.SUPPRESS)
    opts = p.parse_args(argv)
    if opts.rows_per_block != "auto":
        opts.rows_per_block = int(opts.rows_per_block)
    return opts


def main(argv: Sequence[str] | None = None) -> int:
    """Generate the input if needed, run each method, print the table, write the JSON."""
    opts = parse_args(argv)
    if opts.child_generate:
        generate(Path(opts.child_generate), opts.rows, opts.cols)
        return 0
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    data = ensure_data(opts.rows, opts.cols)
    methods = [m.strip() for m in (opts.only or ",".join(METHODS)).split(",") if m.strip()]
    table = [run_method(m, data, opts.rows, opts.cols, opts) for m in methods]
    agreement = r_agreement(opts.rows, opts.cols) if len(table) == len(METHODS) else None
    text = format_table(table, opts.rows, opts.cols, agreement)
    print(text)
    record = {
        "rows": opts.rows,
        "cols": opts.cols,
        "r_only": opts.r_only,
        "rows_per_block": opts.rows_per_block,
        "scheduler": opts.scheduler,
        "table": [asdict(row) for row in table],
        "r_agreement": agreement,
        "goals": {"peak_tree_mb_below": PEAK_GOAL_MB, "speedup_at_least": SPEEDUP_GOAL},
        "environment": environment(),
        "printed": text,
    }
    suffix = ("_r_only" if opts.r_only else "") + (
        "" if opts.scheduler == "distributed" else f"_{opts.scheduler}"
    )
    out = RESULTS_DIR / f"sparse_network_{opts.rows}x{opts.cols}{suffix}.json"
    out.write_text(json.dumps(record, indent=2, default=str), encoding="utf-8")
    _log(f"wrote {out.relative_to(HERE.parent)}")
    return 0 if all(row.returncode == 0 for row in table) else 1


def _log(message: str) -> None:
    """Progress on stderr, so stdout holds only the table."""
    print(message, file=sys.stderr, flush=True)


if __name__ == "__main__":
    raise SystemExit(main())
