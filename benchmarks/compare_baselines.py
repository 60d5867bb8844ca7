"""Compare rowfold's R-only factorization with plain baselines on one tall-skinny HDF5 matrix.

Run from the repository root::

    python benchmarks/compare_baselines.py --rows 4000000 --cols 64

Every measured thing runs in its own subprocess so that it measures one thing. The parent
records the wall time of each subprocess and the peak resident memory of its whole process tree
(the process plus all descendants, e.g. Dask worker processes), polling with psutil every 0.1 s
and keeping the largest sum seen. See ``benchmarks/README.md`` for what each row means.

The script keeps heavy imports inside functions: a child process imports only what its own
measurement needs.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import psutil

HERE = Path(__file__).resolve().parent
DATA_DIR = HERE / "data"
RESULTS_DIR = HERE / "results"

BLOCK_ROWS = 16384
"""Rows per HDF5 chunk, per Dask chunk and per block of the plain read."""

GEN_BLOCK_CHUNKS = 16
"""The generator writes this many chunks (of BLOCK_ROWS rows) per step."""

SEED = 20240601
POLL_SECONDS = 0.1
NUMPY_RAM_FRACTION = 0.4
MB = 1024.0 * 1024.0


@dataclass(frozen=True)
class Task:
    """One measured thing.

    Attributes
    ----------
    key : str
        Short name used by ``--only`` (``tsqr``, ``cholqr2``, ``tsqr-threads``,
        ``cholqr2-threads``, ``dask``, ``numpy``, ``read``).
    letter : str
        The letter used in the table and accepted by ``--only`` (``a`` .. ``g``).
    label : str
        Human-readable description printed in the table.
    """

    key: str
    letter: str
    label: str


TASKS: tuple[Task, ...] = (
    Task("tsqr", "a", "rowfold run, tsqr, R only"),
    Task("cholqr2", "b", "rowfold run, cholqr2, R only"),
    Task("tsqr-threads", "f", "rowfold run, tsqr, R only, threads"),
    Task("cholqr2-threads", "g", "rowfold run, cholqr2, R only, threads"),
    Task("dask", "c", "dask.array.linalg.tsqr, R only"),
    Task("numpy", "d", "numpy.linalg.qr(mode='r'), in memory"),
    Task("read", "e", "plain streaming read of A"),
)
# rowfold rows: task key -> (method, cluster.scheduler or None for the default LocalCluster)
ROWFOLD_METHODS = {
    "tsqr": ("tsqr", None),
    "cholqr2": ("cholqr2", None),
    "tsqr-threads": ("tsqr", "threads"),
    "cholqr2-threads": ("cholqr2", "threads"),
}


@dataclass
class Measurement:
    """What one subprocess run produced.

    Attributes
    ----------
    seconds : float
        Wall time from process start to exit, as seen by the parent.
    peak_tree_bytes : int
        Largest sum of RSS over the process tree seen by the poller.
    max_single_rss_bytes : int or None
        ``ru_maxrss`` from ``wait4``: the largest single process among the child and the
        descendants it reaped (a cross-check on the poller, not a tree sum). Linux carries the
        parent's own high-water RSS into a spawned child, so a value not above the parent's is
        no information and is recorded as None.
    returncode : int
        Exit status of the subprocess.
    stderr_tail : str
        Last lines of stderr, kept when the run failed.
    """

    seconds: float
    peak_tree_bytes: int
    max_single_rss_bytes: int | None
    returncode: int
    stderr_tail: str = ""


@dataclass
class Row:
    """One line of the output table, with everything the JSON file records about it.

    Attributes
    ----------
    key, letter, label : str
        Copied from the `Task`.
    seconds : float or None
        Best wall time over the repeats (None when skipped or failed).
    all_seconds : list of float
        Wall time of every repeat.
    peak_tree_mb : float or None
        Largest peak tree RSS over the repeats, in MiB.
    max_single_rss_mb : float or None
        Largest informative ``ru_maxrss`` over the repeats, in MiB (see `Measurement`).
    ratio_dask, ratio_read : float or None
        ``seconds`` divided by the dask tsqr row and by the plain read row.
    note : str
        Why a row was skipped, or how it failed.
    command : list of str
        The subprocess command line.
    extra : dict
        Timings the child reported about itself (and, for rowfold, from its report).
    """

    key: str
    letter: str
    label: str
    seconds: float | None = None
    all_seconds: list[float] = field(default_factory=list)
    peak_tree_mb: float | None = None
    max_single_rss_mb: float | None = None
    ratio_dask: float | None = None
    ratio_read: float | None = None
    note: str = ""
    command: list[str] = field(default_factory=list)
    extra: dict[str, Any] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------
# Input data
# --------------------------------------------------------------------------------------------


def data_path(rows: int, cols: int) -> Path:
    """Return the path of the generated input for a shape."""
    return DATA_DIR / f"tall_{rows}x{cols}.h5"


def ensure_data(rows: int, cols: int) -> Path:
    """Generate the input file if it is missing, and check its shape if it exists.

    A is standard normal (well conditioned for tall shapes) and b = A @ ones + 0.01 * noise.
    Rows are written a few chunks at a time from a per-step seeded generator, so memory stays
    small and the file is the same on every machine. The file is written under a temporary
    name and renamed when complete.

    Parameters
    ----------
    rows, cols : int
        Shape of A.

    Returns
    -------
    Path
        The HDF5 file holding datasets ``A`` (rows x cols, float64) and ``b`` (rows,).
    """
    import h5py

    path = data_path(rows, cols)
    if path.exists():
        with h5py.File(path, "r") as f:
            found = (f["A"].shape, f["A"].dtype.str, f["b"].shape)
        want = ((rows, cols), "<f8", (rows,))
        if found != want:
            raise SystemExit(
                f"{path.name}: expected A, dtype, b = {want}, found {found}; delete it"
            )
        return path
    DATA_DIR.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".h5.partial")
    _log(f"generating {path.name} ({rows * cols * 8 / MB:.0f} MiB) ...")
    t0 = time.perf_counter()
    cmd = [*_self_command(cols), "--child-task", "generate", "--child-data", str(tmp)]
    subprocess.run([*cmd, "--child-rows", str(rows)], check=True)
    tmp.replace(path)
    _log(f"  done in {time.perf_counter() - t0:.1f} s")
    return path


def _write_data(path: Path, rows: int, cols: int) -> None:
    """Write A and b to ``path`` in steps of ``GEN_BLOCK_CHUNKS`` chunks."""
    import h5py
    import numpy as np

    step = BLOCK_ROWS * GEN_BLOCK_CHUNKS
    x_true = np.ones(cols)
    with h5py.File(path, "w") as f:
        a_ds = f.create_dataset(
            "A", shape=(rows, cols), dtype="f8", chunks=(min(BLOCK_ROWS, rows), cols)
        )
        b_ds = f.create_dataset("b", shape=(rows,), dtype="f8", chunks=(min(BLOCK_ROWS, rows),))
        f.attrs["seed"] = SEED
        for index, start in enumerate(range(0, rows, step)):
            stop = min(start + step, rows)
            rng = np.random.default_rng([SEED, index])
            block = rng.standard_normal((stop - start, cols))
            a_ds[start:stop] = block
            b_ds[start:stop] = block @ x_true + 0.01 * rng.standard_normal(stop - start)


def warm_cache(path: Path, cols: int) -> None:
    """Read the file once (untimed, in a subprocess) so every run starts from a warm cache,
    and import rowfold once so its bytecode cache exists (see :func:`child_environment`)."""
    out = RESULTS_DIR / "warmup.child.json"
    cmd = [*_self_command(cols), "--child-task", "read", "--child-data", str(path)]
    subprocess.run([*cmd, "--child-out", str(out)], check=True)
    warm_imports = [sys.executable, "-c", "import rowfold.cli"]
    subprocess.run(warm_imports, check=True, env=child_environment())


def _self_command(cols: int) -> list[str]:
    """Return the command line that runs this script as a child."""
    return [sys.executable, str(Path(__file__).resolve()), "--cols", str(cols)]


# --------------------------------------------------------------------------------------------
# Children: each runs one measured thing and writes its own timings as JSON
# --------------------------------------------------------------------------------------------


def child_dask(path: Path, cols: int, r_out: Path) -> dict[str, Any]:
    """Dask's TSQR on the HDF5 dataset with the default threaded scheduler; compute R only."""
    import dask.array as da
    import h5py
    import numpy as np

    t0 = time.perf_counter()
    with h5py.File(path, "r") as f:
        a = da.from_array(f["A"], chunks=(BLOCK_ROWS, cols))
        _, r = da.linalg.tsqr(a, compute_svd=False)
        t1 = time.perf_counter()
        r_np = r.compute()
    t2 = time.perf_counter()
    np.save(r_out, r_np)
    return {"graph_seconds": t1 - t0, "compute_seconds": t2 - t1}


def child_numpy(path: Path, cols: int, r_out: Path) -> dict[str, Any]:
    """Read all of A into memory, then LAPACK QR through ``numpy.linalg.qr(mode='r')``."""
    import h5py
    import numpy as np

    t0 = time.perf_counter()
    with h5py.File(path, "r") as f:
        a = f["A"][...]
    t1 = time.perf_counter()
    r_np = np.linalg.qr(a, mode="r")
    t2 = time.perf_counter()
    np.save(r_out, r_np)
    return {"read_seconds": t1 - t0, "qr_seconds": t2 - t1}


def child_read(path: Path, cols: int, r_out: Path) -> dict[str, Any]:
    """Stream A in blocks of ``BLOCK_ROWS`` rows and discard them (I/O floor)."""
    import h5py

    t0 = time.perf_counter()
    total = 0
    with h5py.File(path, "r") as f:
        ds = f["A"]
        for start in range(0, ds.shape[0], BLOCK_ROWS):
            total += ds[start : start + BLOCK_ROWS].nbytes
    seconds = time.perf_counter() - t0
    return {"read_seconds": seconds, "bytes": total, "mib_per_s": total / MB / seconds}


CHILDREN = {"dask": child_dask, "numpy": child_numpy, "read": child_read}


def run_child(args: argparse.Namespace) -> int:
    """Entry point inside a child process: run one task and write its JSON."""
    if args.child_task == "generate":
        _write_data(Path(args.child_data), int(args.child_rows), args.cols)
        return 0
    fn = CHILDREN[args.child_task]
    info = fn(Path(args.child_data), args.cols, Path(args.child_r or os.devnull))
    Path(args.child_out).write_text(json.dumps(info))
    return 0


# --------------------------------------------------------------------------------------------
# Measuring a subprocess: wall time and peak RSS summed over its process tree
# --------------------------------------------------------------------------------------------


def tree_rss(proc: psutil.Process) -> int:
    """Sum the RSS of a process and all its descendants (0 if it is gone)."""
    try:
        members = [proc, *proc.children(recursive=True)]
    except psutil.Error:
        return 0
    total = 0
    for member in members:
        try:
            total += member.memory_info().rss
        except psutil.Error:
            continue
    return total


class TreePoller(threading.Thread):
    """Poll a process tree's summed RSS every `POLL_SECONDS` and keep the largest sum."""

    def __init__(self, pid: int) -> None:
        super().__init__(daemon=True)
        self.proc = psutil.Process(pid)
        self.peak = 0
        self.samples = 0
        self.stop_event = threading.Event()

    def run(self) -> None:
        """Sample until `stop_event` is set."""
        while not self.stop_event.is_set():
            self.peak = max(self.peak, tree_rss(self.proc))
            self.samples += 1
            self.stop_event.wait(POLL_SECONDS)


def measure(cmd: Sequence[str], log_stem: Path, timeout: float) -> Measurement:
    """Run ``cmd`` once; return its wall time, peak tree RSS and exit status.

    Parameters
    ----------
    cmd : sequence of str
        The command line.
    log_stem : Path
        stdout and stderr go to ``<log_stem>.stdout`` and ``<log_stem>.stderr``.
    timeout : float
        Seconds before the whole tree is killed.
    """
    log_stem.parent.mkdir(parents=True, exist_ok=True)
    err_path = log_stem.with_suffix(".stderr")
    with open(log_stem.with_suffix(".stdout"), "wb") as out, open(err_path, "wb") as err:
        floor = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
        t0 = time.perf_counter()
        proc = subprocess.Popen(
            list(cmd), stdout=out, stderr=err, cwd=RESULTS_DIR, env=child_environment()
        )
        poller = TreePoller(proc.pid)
        poller.start()
        killer = threading.Timer(timeout, _kill_tree, args=(proc.pid,))
        killer.start()
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - t0
        killer.cancel()
        poller.stop_event.set()
        poller.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    tail = "" if proc.returncode == 0 else _tail(err_path)
    single = usage.ru_maxrss * 1024
    informative = single if single > floor else None
    return Measurement(seconds, poller.peak, informative, proc.returncode, tail)


def child_environment() -> dict[str, str]:
    """The environment of a measured child: ours, with bytecode caching allowed.

    A normal ``pip install`` compiles every module to bytecode, but an editable install in
    an environment that sets ``PYTHONDONTWRITEBYTECODE`` recompiles the project's own modules
    at every start (about 0.1 s for rowfold). Allowing the cache lets the first run write it,
    so the timed runs start as an installed rowfold would.
    """
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def _kill_tree(pid: int) -> None:
    """Kill a timed-out child and its descendants."""
    try:
        parent = psutil.Process(pid)
        members = [*parent.children(recursive=True), parent]
    except psutil.Error:
        return
    for member in members:
        try:
            member.kill()
        except psutil.Error:
            continue


def _tail(path: Path, lines: int = 15) -> str:
    """Return the last lines of a text file."""
    text = path.read_text(errors="replace").splitlines()
    return "\n".join(text[-lines:])


# --------------------------------------------------------------------------------------------
# Building the commands
# --------------------------------------------------------------------------------------------


def write_job(key: str, data: Path, rows: int, cols: int, rows_per_block: str) -> Path:
    """Write an R-only rowfold job file into the results folder and return its path.

    The job has no ``rhs``, ``output.q: false``, ``output.overwrite: true`` and no cluster
    keys (the embedded local Dask cluster), except ``cluster.scheduler: threads`` for the
    ``-threads`` rows. Paths in the job are relative to the job file.
    """
    import yaml

    method, scheduler = ROWFOLD_METHODS[key]
    stem = f"{key}_{rows}x{cols}"
    job: dict[str, Any] = {
        "name": f"benchmark-{key}-{rows}x{cols}",
        "input": {
            "path": os.path.relpath(data, RESULTS_DIR),
            "matrix": "A",
            "rows_per_block": int(rows_per_block) if rows_per_block.isdigit() else rows_per_block,
        },
        "method": {"name": method},
        "output": {"path": f"{stem}.h5", "q": False, "overwrite": True},
    }
    if scheduler is not None:
        job["cluster"] = {"scheduler": scheduler}
    path = RESULTS_DIR / f"{stem}.job.yaml"
    path.write_text(yaml.safe_dump(job, sort_keys=False))
    return path


def task_command(
    task: Task, data: Path, rows: int, cols: int, opts: argparse.Namespace
) -> list[str]:
    """Return the command line that measures one task."""
    if task.key in ROWFOLD_METHODS:
        job = write_job(task.key, data, rows, cols, opts.rows_per_block)
        return [sys.executable, "-m", "rowfold", "run", str(job)]
    stem = RESULTS_DIR / f"{task.key}_{rows}x{cols}"
    return [
        *_self_command(cols),
        "--child-task",
        task.key,
        "--child-data",
        str(data),
        "--child-out",
        f"{stem}.child.json",
        "--child-r",
        f"{stem}.R.npy",
    ]


def child_extra(task: Task, rows: int, cols: int) -> dict[str, Any]:
    """Collect the timings a finished child reported about itself."""
    stem = RESULTS_DIR / f"{task.key}_{rows}x{cols}"
    if task.key not in ROWFOLD_METHODS:
        path = Path(f"{stem}.child.json")
        return json.loads(path.read_text()) if path.exists() else {}
    report = Path(f"{stem}.report.json")
    if not report.exists():
        return {}
    data = json.loads(report.read_text())
    keys = ("seconds", "peak_memory_bytes", "blocks", "gram_residual", "method")
    return {f"report_{k}": data.get(k) for k in keys if k in data}


def load_r(task: Task, rows: int, cols: int) -> Any:
    """Return the R a finished task produced (None for the plain read or when missing)."""
    import numpy as np

    stem = RESULTS_DIR / f"{task.key}_{rows}x{cols}"
    if task.key in ROWFOLD_METHODS:
        import h5py

        store = Path(f"{stem}.h5")
        if not store.exists():
            return None
        with h5py.File(store, "r") as f:
            return f["R"][...] if "R" in f else None
    path = Path(f"{stem}.R.npy")
    return np.load(path) if path.exists() and task.key != "read" else None


# --------------------------------------------------------------------------------------------
# Running tasks and reporting
# --------------------------------------------------------------------------------------------


def numpy_skip_reason(rows: int, cols: int, opts: argparse.Namespace) -> str:
    """Return why the in-memory numpy row is skipped, or an empty string."""
    if opts.skip_numpy:
        return "skipped: --skip-numpy"
    need = rows * cols * 8
    total = psutil.virtual_memory().total
    if need > NUMPY_RAM_FRACTION * total:
        return (
            f"skipped: A needs {need / MB:.0f} MiB > {NUMPY_RAM_FRACTION:.0%} of RAM "
            f"({total / MB:.0f} MiB)"
        )
    return ""


def run_task(task: Task, data: Path, rows: int, cols: int, opts: argparse.Namespace) -> Row:
    """Measure one task ``opts.repeat`` times; keep the best time and the largest peak."""
    row = Row(task.key, task.letter, task.label)
    if task.key == "numpy":
        row.note = numpy_skip_reason(rows, cols, opts)
        if row.note:
            _log(f"({task.letter}) {task.label}: {row.note}")
            return row
    row.command = task_command(task, data, rows, cols, opts)
    for suffix in (".R.npy", ".child.json"):
        (RESULTS_DIR / f"{task.key}_{rows}x{cols}{suffix}").unlink(missing_ok=True)
    peaks, singles = [], []
    for i in range(opts.repeat):
        _log(f"({task.letter}) {task.label} [{i + 1}/{opts.repeat}] ...")
        log_stem = RESULTS_DIR / "logs" / f"{task.key}_{rows}x{cols}_{i + 1}"
        m = measure(row.command, log_stem, opts.timeout)
        _log(
            f"    {m.seconds:.2f} s, peak tree {m.peak_tree_bytes / MB:.0f} MiB, rc={m.returncode}"
        )
        if m.returncode != 0:
            row.note = f"FAILED rc={m.returncode}; stderr in {log_stem.name}.stderr"
            row.extra["stderr_tail"] = m.stderr_tail
            _log(f"    command: {' '.join(row.command)}\n{m.stderr_tail}")
            return row
        row.all_seconds.append(m.seconds)
        peaks.append(m.peak_tree_bytes)
        if m.max_single_rss_bytes is not None:
            singles.append(m.max_single_rss_bytes)
    row.seconds = min(row.all_seconds)
    row.peak_tree_mb = max(peaks) / MB
    row.max_single_rss_mb = max(singles) / MB if singles else None
    row.extra.update(child_extra(task, rows, cols))
    return row


def add_ratios(rows: list[Row]) -> None:
    """Fill ``ratio_dask`` and ``ratio_read`` from the dask tsqr and plain read rows."""
    base = {r.key: r.seconds for r in rows}
    dask_s, read_s = base.get("dask"), base.get("read")
    for r in rows:
        if r.seconds is None:
            continue
        if dask_s:
            r.ratio_dask = r.seconds / dask_s
        if read_s:
            r.ratio_read = r.seconds / read_s


def r_agreement(tasks: Sequence[Task], rows: int, cols: int) -> tuple[str, dict[str, float]]:
    """Compare each task's R (sign-normalised) with a reference R.

    The reference is numpy's R when present, else dask's, else rowfold tsqr's.

    Returns
    -------
    reference : str
        Key of the reference task ("" when no task produced an R).
    errors : dict
        ``{task key: max |R - R_ref| / max |R_ref|}``; -1 when the shapes differ.
    """
    import numpy as np

    loaded = {t.key: load_r(t, rows, cols) for t in tasks}
    found = {k: v for k, v in loaded.items() if v is not None}
    ref_key = next((k for k in ("numpy", "dask", "tsqr") if k in found), "")
    if not ref_key:
        return "", {}

    def norm(r: Any) -> Any:
        signs = np.where(np.diag(r) < 0, -1.0, 1.0)
        return np.triu(r * signs[:, None])

    ref = norm(found[ref_key])
    scale = float(np.abs(ref).max())
    errors = {}
    for key, r in found.items():
        if key != ref_key:
            same = r.shape == ref.shape
            errors[key] = float(np.abs(norm(r) - ref).max() / scale) if same else -1.0
    return ref_key, errors


def _fmt(value: float | None, spec: str, suffix: str = "") -> str:
    """Format a number or a dash."""
    return "-" if value is None else f"{value:{spec}}{suffix}"


def format_table(rows: list[Row], title: str) -> str:
    """Render the comparison table as fixed-width text."""
    head = (
        f"{'what':<44} {'seconds':>9} {'vs dask tsqr':>13} {'vs plain read':>14} "
        f"{'peak tree MB':>13}"
    )
    lines = [title, head, "-" * len(head)]
    for r in rows:
        what = f"({r.letter}) {r.label}"
        if r.seconds is None:
            lines.append(f"{what:<44} {r.note}")
            continue
        lines.append(
            f"{what:<44} {_fmt(r.seconds, '9.2f')} {_fmt(r.ratio_dask, '12.2f', 'x'):>13} "
            f"{_fmt(r.ratio_read, '13.2f', 'x'):>14} {_fmt(r.peak_tree_mb, '13.0f')}"
        )
    return "\n".join(lines)


def format_scaling(rows: list[Row], title: str) -> str:
    """Render the memory-scaling table as fixed-width text."""
    head = f"{'what':<44} {'seconds':>9} {'peak tree MB':>13}"
    lines = [title, head, "-" * len(head)]
    for r in rows:
        if r.seconds is None:
            lines.append(f"{r.label:<44} {r.note}")
        else:
            lines.append(f"{r.label:<44} {r.seconds:9.2f} {_fmt(r.peak_tree_mb, '13.0f')}")
    return "\n".join(lines)


def environment() -> dict[str, Any]:
    """Describe the machine and library versions for the JSON record."""
    versions: dict[str, str | None] = {}
    for name in ("rowfold", "numpy", "dask", "distributed", "h5py", "psutil"):
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return {
        "python": platform.python_version(),
        "platform": platform.platform(),
        "cpu_count": os.cpu_count(),
        "ram_bytes": psutil.virtual_memory().total,
        "load_average_1_5_15": os.getloadavg(),
        "versions": versions,
    }


def select_tasks(only: str | None) -> list[Task]:
    """Resolve ``--only`` (letters a..g or keys, comma separated) to tasks in table order."""
    if not only:
        return list(TASKS)
    wanted = {w.strip().lower() for w in only.split(",") if w.strip()}
    known = {t.key for t in TASKS} | {t.letter for t in TASKS}
    unknown = sorted(wanted - known)
    if unknown:
        choices = ", ".join(f"{t.letter}={t.key}" for t in TASKS)
        raise SystemExit(f"--only: unknown {unknown}; choose from {choices}")
    return [t for t in TASKS if t.key in wanted or t.letter in wanted]


def compare(opts: argparse.Namespace) -> int:
    """Run the side-by-side comparison, print the table and write the JSON record."""
    tasks = select_tasks(opts.only)
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    data = ensure_data(opts.rows, opts.cols)
    if not opts.no_warmup:
        warm_cache(data, opts.cols)
    results = [run_task(t, data, opts.rows, opts.cols, opts) for t in tasks]
    add_ratios(results)
    done = [t for t, r in zip(tasks, results, strict=True) if r.seconds is not None]
    ref_key, agreement = r_agreement(done, opts.rows, opts.cols)
    title = (
        f"rows={opts.rows} cols={opts.cols} ({opts.rows * opts.cols * 8 / MB:.0f} MiB), "
        f"best of {opts.repeat}, {os.cpu_count()} cores"
    )
    print(format_table(results, title))
    if agreement:
        parts = ", ".join(f"{k} {v:.1e}" for k, v in agreement.items())
        print(f"R agreement, max|R - R_{ref_key}| / max|R_{ref_key}| (signs normalised): {parts}")
    record = {
        "command": [Path(sys.argv[0]).name, *sys.argv[1:]],
        "rows": opts.rows,
        "cols": opts.cols,
        "repeat": opts.repeat,
        "data_file": data.name,
        "environment": environment(),
        "results": [asdict(r) for r in results],
        "r_agreement": {"reference": ref_key, "max_rel_diff": agreement},
    }
    out = RESULTS_DIR / f"compare_baselines_{opts.rows}x{opts.cols}.json"
    out.write_text(json.dumps(record, indent=2))
    print(f"written: {out.relative_to(HERE.parent)}")
    return 0 if all(r.seconds is not None or "skipped" in r.note for r in results) else 1


def memory_scaling(opts: argparse.Namespace) -> int:
    """Run rowfold tsqr at two row counts and print how peak tree memory scales."""
    sizes = [int(s) for s in opts.rows_list.split(",") if s.strip()]
    if len(sizes) != 2:
        raise SystemExit(f"--rows-list: expected two sizes, found {sizes}")
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    tsqr = TASKS[0]
    results = []
    for rows in sizes:
        data = ensure_data(rows, opts.cols)
        if not opts.no_warmup:
            warm_cache(data, opts.cols)
        row = run_task(tsqr, data, rows, opts.cols, opts)
        row.label = f"rowfold tsqr, {rows} rows"
        results.append(row)
    print(format_scaling(results, f"memory scaling, cols={opts.cols}, best of {opts.repeat}"))
    small, large = results
    ratio: float | None = None
    if small.peak_tree_mb and large.peak_tree_mb:
        ratio = large.peak_tree_mb / small.peak_tree_mb
        print(
            f"peak memory ratio {sizes[1]}/{sizes[0]} rows: {ratio:.2f} "
            f"(rows grew {sizes[1] / sizes[0]:.1f}x; 1.00 means memory does not grow with rows)"
        )
    record = {
        "cols": opts.cols,
        "rows_list": sizes,
        "peak_memory_ratio": ratio,
        "environment": environment(),
        "results": [asdict(r) for r in results],
    }
    out = RESULTS_DIR / f"memory_scaling_{sizes[0]}_{sizes[1]}x{opts.cols}.json"
    out.write_text(json.dumps(record, indent=2))
    print(f"written: {out.relative_to(HERE.parent)}")
    return 0 if ratio is not None else 1


def _log(message: str) -> None:
    """Progress on stderr, so stdout holds only the table."""
    print(message, file=sys.stderr, flush=True)


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    """Parse the command line."""
    p = argparse.ArgumentParser(
        description="Time rowfold's R-only QR against dask tsqr, numpy QR and a plain read.",
        epilog="Tasks: " + ", ".join(f"{t.letter}={t.key} ({t.label})" for t in TASKS),
    )
    p.add_argument("--rows", type=int, default=4_000_000, help="rows of A (default 4000000)")
    p.add_argument("--cols", type=int, default=64, help="columns of A (default 64)")
    p.add_argument("--repeat", type=int, default=1, help="runs per task; best time is kept")
    p.add_argument("--only", help="comma-separated tasks, by letter or name, e.g. a,b,c")
    p.add_argument("--skip-numpy", action="store_true", help="skip the in-memory numpy row")
    p.add_argument(
        "--memory-scaling",
        action="store_true",
        help="run rowfold tsqr at the two sizes of --rows-list and print the peak-memory ratio",
    )
    p.add_argument("--rows-list", default="1000000,4000000", help="two row counts for scaling")
    p.add_argument(
        "--rows-per-block", default="auto", help="input.rows_per_block in the rowfold jobs"
    )
    p.add_argument("--timeout", type=float, default=3600.0, help="seconds per subprocess")
    p.add_argument("--no-warmup", action="store_true", help="skip the untimed cache warm-up read")
    p.add_argument("--clean-data", action="store_true", help="delete benchmarks/data and exit")
    for hidden in ("--child-task", "--child-data", "--child-out", "--child-r", "--child-rows"):
        p.add_argument(hidden, help=argparse.SUPPRESS)
    opts = p.parse_args(argv)
    if opts.repeat < 1 or opts.rows < 1 or opts.cols < 1:
        p.error("--rows, --cols and --repeat must be positive")
    return opts


def main(argv: Sequence[str] | None = None) -> int:
    """Dispatch to a child task, the memory-scaling mode or the comparison."""
    opts = parse_args(argv)
    if opts.child_task:
        return run_child(opts)
    if opts.clean_data:
        shutil.rmtree(DATA_DIR, ignore_errors=True)
        return 0
    if opts.memory_scaling:
        return memory_scaling(opts)
    return compare(opts)


if __name__ == "__main__":
    sys.exit(main())
