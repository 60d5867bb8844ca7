"""How close rowfold's R-only QR comes to this machine's limit, and to dask's tsqr.

Run from the repository root::

    python benchmarks/machine_limit.py                  # 1,000,000 x 64, page cache warm
    python benchmarks/machine_limit.py --rows 4000000 --cols 64 --cold

The limit is measured on the machine that runs the command, in two child processes: a plain
streaming read of the input file, and ``2 m n^2`` flops (the leading term of a Householder QR's
R) at the dgemm rate that numpy's BLAS reaches on all cores (square matrices of ``--gemm-size``).
The limit is the larger of the two. Then rowfold ``tsqr`` and ``cholqr2`` (``rowfold run``, R
only, the embedded default cluster) and ``dask.array.linalg.tsqr`` run, each in its own process
and each timed from launch to exit (start-up included, as a user waits for it). The table
gives each time divided by the limit and by dask's. The BLAS kernel comes from threadpoolctl,
as reported inside the gemm child. Everything also goes to
``benchmarks/results/machine_limit_<rows>x<cols>[_cold].json``.

``--cold`` asks the OS to drop the file from the page cache (``posix_fadvise`` with
``POSIX_FADV_DONTNEED``) before every timed run, and says so in the table's title when it
could not. The input, its generator and the process-tree measurement are those of
``compare_baselines.py`` (same file, same seed).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from collections.abc import Sequence
from dataclasses import asdict
from pathlib import Path
from typing import Any

import compare_baselines as cb

ROWS = 1_000_000
COLS = 64
GEMM_SIZE = 2048
TABLE_KEYS = ("read", "tsqr", "cholqr2", "dask")


def gemm_rate(size: int) -> dict[str, Any]:
    """Inside a child: best-of-3 dgemm rate on all cores, and the BLAS that threadpoolctl sees."""
    import numpy as np
    from threadpoolctl import threadpool_info, threadpool_limits

    cores = os.cpu_count() or 1
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal((size, size)), rng.standard_normal((size, size))
    best = float("inf")
    with threadpool_limits(limits=cores, user_api="blas"):
        a @ b  # untimed: starts the BLAS threads
        for _ in range(3):
            start = time.perf_counter()
            a @ b
            best = min(best, time.perf_counter() - start)
        blas = [
            {k: info.get(k) for k in ("internal_api", "architecture", "version", "num_threads")}
            for info in threadpool_info()
            if info.get("user_api") == "blas"
        ]
    return {"gflops": 2.0 * size**3 / best / 1e9, "seconds": best, "size": size, "blas": blas}


def drop_from_cache(path: Path) -> str:
    """Ask the OS to drop ``path`` from the page cache; return what happened, in words."""
    if not hasattr(os, "posix_fadvise"):
        return "not dropped: this OS has no posix_fadvise"
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError as exc:
        return f"not dropped: cannot open the file ({exc})"
    try:
        os.fsync(fd)  # dirty pages are not dropped; the file is complete, so this is quick
        os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
    except OSError as exc:
        return f"not dropped: posix_fadvise failed ({exc})"
    finally:
        os.close(fd)
    return "dropped (posix_fadvise DONTNEED)"


def child_command(task: str, cols: int, out: Path, extra: Sequence[str] = ()) -> list[str]:
    """This script run as a child for ``task``, writing its JSON to ``out``."""
    here = Path(__file__).resolve()
    return [
        sys.executable,
        str(here),
        "--cols",
        str(cols),
        "--child",
        task,
        "--child-out",
        str(out),
        *extra,
    ]


def time_rows(
    tasks: list[cb.Task], data: Path, opts: argparse.Namespace
) -> tuple[list[cb.Row], list[str]]:
    """Run each task ``opts.repeat`` times (dropping the cache first with ``--cold``)."""
    rows, cache_notes = [], []
    for task in tasks:
        row = cb.Row(task.key, task.letter, task.label)
        row.command = cb.task_command(task, data, opts.rows, opts.cols, opts)
        for attempt in range(opts.repeat):
            if opts.cold:
                cache_notes.append(drop_from_cache(data))
            stem = cb.RESULTS_DIR / "logs" / f"limit_{task.key}_{opts.rows}x{opts.cols}_{attempt}"
            cb._log(f"{task.label} [{attempt + 1}/{opts.repeat}] ...")
            measured = cb.measure(row.command, stem, opts.timeout)
            if measured.returncode != 0:
                row.note = f"FAILED rc={measured.returncode}"
                row.extra["stderr_tail"] = measured.stderr_tail
                cb._log(measured.stderr_tail)
                break
            row.all_seconds.append(measured.seconds)
            row.peak_tree_mb = max(row.peak_tree_mb or 0.0, measured.peak_tree_bytes / cb.MB)
        row.seconds = min(row.all_seconds) if row.all_seconds and not row.note else None
        row.extra.update(cb.child_extra(task, opts.rows, opts.cols))
        row.extra["work_seconds"] = work_seconds(row)
        rows.append(row)
    return rows, cache_notes


def limit_figures(rows: list[cb.Row], gemm: dict[str, Any], m: int, n: int) -> dict[str, Any]:
    """The read time (the read child's own clock), the flops time and the limit."""
    read = next(r for r in rows if r.key == "read")
    read_seconds = read.extra.get("read_seconds")
    flops = 2.0 * m * n * n
    flop_seconds = flops / (gemm["gflops"] * 1e9)
    limit = max(read_seconds or 0.0, flop_seconds)
    return {
        "read_seconds": read_seconds,
        "read_mib_per_s": read.extra.get("mib_per_s"),
        "flops": flops,
        "dgemm_gflops": gemm["gflops"],
        "flop_seconds": flop_seconds,
        "limit_seconds": limit,
        "limit_is": "read" if (read_seconds or 0.0) >= flop_seconds else "flops",
    }


def work_seconds(row: cb.Row) -> float | None:
    """The run's own clock for its work, start-up left out: rowfold's ``factor`` stage (from its
    report), dask's compute, the reader's read."""
    extra = row.extra
    if "report_seconds" in extra:
        return (extra["report_seconds"] or {}).get("factor")
    return extra.get("compute_seconds", extra.get("read_seconds"))


def dgemm_share(limit: dict[str, Any], work: float) -> float:
    """The rate ``2 m n^2 / work`` as a share of the measured dgemm rate (1.0 = dgemm speed)."""
    return float(limit["flop_seconds"]) / work if work > 0 else float("nan")


def format_table(rows: list[cb.Row], limit: dict[str, Any], title: str) -> str:
    """The printed table: wall seconds and the run's own work seconds, each as a ratio to the
    limit, the wall ratio to dask, and peak tree memory."""
    dask = next((r.seconds for r in rows if r.key == "dask"), None)
    best = limit["limit_seconds"]
    lines = [
        title,
        "| what | seconds | vs limit | vs dask tsqr | work s | work vs limit | work % of dgemm "
        "| peak tree MB |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for row in rows:
        if row.seconds is None:
            lines.append(f"| {row.label} | {row.note} | | | | | | |")
            continue
        to_dask = f"{row.seconds / dask:.2f}x" if dask and row.key != "read" else ""
        work = work_seconds(row)
        work_text = "| | |" if work is None else f"| {work:.2f} | {work / best:.2f}x |"
        if work is not None:
            share = "" if row.key == "read" else f"{dgemm_share(limit, work):.0%}"
            work_text += f" {share} |"
        lines.append(
            f"| {row.label} | {row.seconds:.2f} | {row.seconds / best:.2f}x | {to_dask} "
            f"{work_text} {row.peak_tree_mb:.0f} |"
        )
    flop_text = f"2mn^2 = {limit['flops'] / 1e9:.1f} GFlop at {limit['dgemm_gflops']:.1f} GFlop/s"
    lines.append(f"| {flop_text} (dgemm, all cores) | | | | {limit['flop_seconds']:.2f} | | | |")
    lines.append(
        f"limit = {best:.2f} s = the larger of the read ({limit['read_seconds']:.2f} s, "
        f"{limit['read_mib_per_s']:.0f} MiB/s) and the flops ({limit['flop_seconds']:.2f} s)"
    )
    return "\n".join(lines)


def run(opts: argparse.Namespace) -> int:
    """Measure the limit and the rows, print the table and write the JSON."""
    if opts.workdir:
        cb.DATA_DIR = Path(opts.workdir) / "data"
        cb.RESULTS_DIR = Path(opts.workdir) / "results"
    cb.RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    opts.rows_per_block = "auto"
    data = cb.ensure_data(opts.rows, opts.cols)
    if not opts.cold:
        cb.warm_cache(data, opts.cols)
    gemm_out = cb.RESULTS_DIR / "limit_gemm.child.json"
    cb._log(f"dgemm rate on all cores ({opts.gemm_size} x {opts.gemm_size}) ...")
    subprocess.run(
        child_command("gemm", opts.cols, gemm_out, ["--gemm-size", str(opts.gemm_size)]), check=True
    )
    gemm = json.loads(gemm_out.read_text())
    tasks = [next(t for t in cb.TASKS if t.key == key) for key in table_keys(opts.only)]
    rows, cache_notes = time_rows(tasks, data, opts)
    limit = limit_figures(rows, gemm, opts.rows, opts.cols)
    kernels = ", ".join(
        f"{b['internal_api']} {b['version']} {b['architecture']}" for b in gemm["blas"]
    )
    cache = "warm page cache"
    if opts.cold:
        failed = sorted({note for note in cache_notes if not note.startswith("dropped")})
        cache = "cold: " + (
            "; ".join(failed) if failed else "file dropped from the page cache before each run"
        )
    title = (
        f"{opts.rows} x {opts.cols} float64 ({opts.rows * opts.cols * 8 / cb.MB:.0f} MiB), "
        f"best of {opts.repeat}, {os.cpu_count()} cores, {cache}; BLAS: {kernels}"
    )
    print(format_table(rows, limit, title))
    suffix = "_cold" if opts.cold else ""
    scaling = None
    if opts.scaled_from:
        scaling = scaling_figures(rows, opts, suffix)
        print(format_scaling(scaling))
    record = {
        "command": [Path(sys.argv[0]).name, *sys.argv[1:]],
        "rows": opts.rows,
        "cols": opts.cols,
        "repeat": opts.repeat,
        "cold": opts.cold,
        "cache": cache,
        "cache_notes": cache_notes,
        "blas": gemm["blas"],
        "gemm": gemm,
        "limit": limit,
        "results": [asdict(r) for r in rows],
        "ratios": ratios(rows, limit),
        "scaling": scaling,
        "environment": cb.environment(),
    }
    out = cb.RESULTS_DIR / f"machine_limit_{opts.rows}x{opts.cols}{suffix}.json"
    out.write_text(json.dumps(record, indent=2))
    cb._log(f"wrote {out}")
    return 0 if all(r.seconds is not None for r in rows) else 1


def table_keys(only: str | None) -> tuple[str, ...]:
    """The rows to time: ``--only`` (comma separated, from ``TABLE_KEYS``) plus the read, which
    the limit needs; all of them without it."""
    if not only:
        return TABLE_KEYS
    wanted = {word.strip() for word in only.split(",") if word.strip()} | {"read"}
    unknown = sorted(wanted - set(TABLE_KEYS))
    if unknown:
        raise SystemExit(
            f"--only: unknown {', '.join(unknown)}; choose from {', '.join(TABLE_KEYS)}"
        )
    return tuple(key for key in TABLE_KEYS if key in wanted)


def scaling_figures(rows: list[cb.Row], opts: argparse.Namespace, suffix: str) -> dict[str, Any]:
    """Per row: this run's seconds over ``rows / base rows`` times the earlier run's seconds
    (the earlier run's JSON at ``--scaled-from`` rows, same columns and cache state)."""
    base_rows = opts.scaled_from
    earlier = cb.RESULTS_DIR / f"machine_limit_{base_rows}x{opts.cols}{suffix}.json"
    if not earlier.exists():
        raise SystemExit(f"--scaled-from: {earlier} not found; run --rows {base_rows} first")
    before = {r["key"]: r["seconds"] for r in json.loads(earlier.read_text())["results"]}
    factor = opts.rows / base_rows
    out: dict[str, Any] = {"base_rows": base_rows, "factor": factor, "rows": {}}
    for row in rows:
        base = before.get(row.key)
        if row.seconds is None or not base:
            continue
        out["rows"][row.key] = {
            "seconds": row.seconds,
            "base_seconds": base,
            "vs_scaled": row.seconds / (factor * base),
        }
    return out


def format_scaling(scaling: dict[str, Any]) -> str:
    """The scaling lines: each row's time over ``factor`` times its time at the base size."""
    lines = [f"against {scaling['factor']:g}x the {scaling['base_rows']}-row run:"]
    for key, figures in scaling["rows"].items():
        lines.append(
            f"  {key}: {figures['seconds']:.2f} s vs {scaling['factor']:g} x "
            f"{figures['base_seconds']:.2f} s = {figures['vs_scaled']:.2f}x"
        )
    return "\n".join(lines)


def ratios(rows: list[cb.Row], limit: dict[str, Any]) -> dict[str, dict[str, float | None]]:
    """Per row: seconds over the limit and over dask's tsqr (None when either is missing)."""
    dask = next((r.seconds for r in rows if r.key == "dask"), None)
    out: dict[str, dict[str, float | None]] = {}
    for row in rows:
        seconds = row.seconds
        out[row.key] = {
            "vs_limit": None if seconds is None else seconds / limit["limit_seconds"],
            "vs_dask": None if seconds is None or not dask else seconds / dask,
        }
        work = row.extra.get("work_seconds")
        if row.key != "read" and work:
            out[row.key]["work_share_of_dgemm"] = dgemm_share(limit, work)
    return out


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    """Command-line options (the child options are for this script's own children)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=ROWS, help="rows of A (default 1000000)")
    parser.add_argument("--cols", type=int, default=COLS, help="columns of A (default 64)")
    parser.add_argument(
        "--cold", action="store_true", help="drop the file from the page cache before each run"
    )
    parser.add_argument("--repeat", type=int, default=1, help="keep the best of K runs (default 1)")
    parser.add_argument(
        "--gemm-size", type=int, default=GEMM_SIZE, help="dgemm matrix size (default 2048)"
    )
    parser.add_argument(
        "--timeout", type=float, default=1800.0, help="seconds before a run is killed"
    )
    parser.add_argument("--workdir", help="put data/ and results/ here instead of benchmarks/")
    parser.add_argument(
        "--only", help=f"comma-separated rows from {','.join(TABLE_KEYS)} (read always runs)"
    )
    parser.add_argument(
        "--scaled-from",
        type=int,
        metavar="ROWS",
        help="also print each time over (rows/ROWS) x the time of an earlier run at ROWS",
    )
    parser.add_argument("--child", choices=["gemm"], help=argparse.SUPPRESS)
    parser.add_argument("--child-out", help=argparse.SUPPRESS)
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point."""
    opts = parse_args(argv)
    if opts.child == "gemm":
        Path(opts.child_out).write_text(json.dumps(gemm_rate(opts.gemm_size)))
        return 0
    return run(opts)


if __name__ == "__main__":
    sys.exit(main())
