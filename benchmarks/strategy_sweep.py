"""Strategy sweep: every method at several condition numbers, side by side.

Command (documented in benchmarks/README.md)::

    python benchmarks/strategy_sweep.py --rows 1000000 --cols 64

For each condition number it writes (once, cached in benchmarks/data/) a matrix
``A = G diag(s) V^T`` with G Gaussian (condition close to 1), s geometric from 1 to
1/kappa and V a random orthogonal matrix, so cond(A) is close to kappa. It then runs
``rowfold compare`` (all methods through one embedded cluster, Q measured but not
written) and prints time, passes over A and loss of orthogonality per method and kappa,
with the published bound. The table also goes to benchmarks/results/strategy_sweep.json.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import h5py
import numpy as np

from rowfold import runner
from rowfold.cluster import Progress

HERE = Path(__file__).resolve().parent
METHODS = "tsqr,cholqr2,scholqr3,rcholqr,bcgs2,bmgs,auto"


def make_matrix(path: Path, rows: int, cols: int, kappa: float, chunk: int = 65536) -> None:
    """Write A = G diag(s) V^T in row chunks (memory: one chunk)."""
    if path.exists():
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(int(np.log10(kappa)) + 17)
    v, _ = np.linalg.qr(rng.standard_normal((cols, cols)))
    mix = np.geomspace(1.0, 1.0 / kappa, cols)[:, None] * v.T
    tmp = path.with_suffix(".tmp.h5")
    with h5py.File(tmp, "w") as handle:
        data = handle.create_dataset("A", shape=(rows, cols), dtype="f8", chunks=(16384, cols))
        for start in range(0, rows, chunk):
            stop = min(rows, start + chunk)
            data[start:stop] = rng.standard_normal((stop - start, cols)) @ mix
    tmp.replace(path)


def sweep(rows: int, cols: int, kappas: list[float], methods: list[str]) -> list[dict]:
    """Run the comparison per kappa; return one record per (kappa, method)."""
    records = []
    for kappa in kappas:
        data = HERE / "data" / f"sweep_{rows}x{cols}_k{kappa:.0e}.h5"
        make_matrix(data, rows, cols, kappa)
        out = HERE / "results" / "sweep" / f"k{kappa:.0e}.h5"
        out.parent.mkdir(parents=True, exist_ok=True)
        job_path = out.with_suffix(".yaml")
        job_path.write_text(
            f"name: sweep-k{kappa:.0e}\ninput: {{path: {data}, matrix: A}}\n"
            f"output: {{path: {out}, overwrite: true}}\n",
            encoding="utf-8",
        )
        job = runner.load_job(job_path)
        started = time.perf_counter()
        rows_out, _, _ = runner.compare_job(job, methods, Progress())
        print(f"kappa {kappa:.0e}: {time.perf_counter() - started:.1f} s", flush=True)
        records += [{"kappa": kappa, **row} for row in rows_out]
    return records


def table(records: list[dict], methods: list[str], kappas: list[float]) -> str:
    """Methods down, kappa across: seconds / passes / LOO (or 'refused')."""
    head = f"{'method':10}" + "".join(f"  kappa={k:<8.0e}{'':22}" for k in kappas)
    sub = f"{'':10}" + "".join(f"  {'s':>7} {'passes':>6} {'LOO':>9} {'bound':>9}" for _ in kappas)
    lines = [head, sub]
    for method in methods:
        cells = []
        for kappa in kappas:
            rec = next(r for r in records if r["method"] == method and r["kappa"] == kappa)
            if rec["status"] == "refused":
                cells.append(f"  {'refused':>34}")
                continue
            cells.append(
                f"  {rec['seconds']:7.2f} {rec['passes_over_input']:6d} "
                f"{rec['orthogonality_loss']:9.1e} {rec['orthogonality_bound']:9.1e}"
            )
        lines.append(f"{method:10}" + "".join(cells))
    return "\n".join(lines)


def main() -> None:
    """Parse options, run the sweep, print and save the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--cols", type=int, default=64)
    parser.add_argument("--conditions", default="1e2,1e6,1e10")
    parser.add_argument("--methods", default=METHODS)
    args = parser.parse_args()
    kappas = [float(k) for k in args.conditions.split(",")]
    methods = args.methods.split(",")
    records = sweep(args.rows, args.cols, kappas, methods)
    text = table(records, methods, kappas)
    print(text)
    result = HERE / "results" / "strategy_sweep.json"
    payload = {"rows": args.rows, "cols": args.cols, "records": records, "table": text}
    result.write_text(json.dumps(payload, indent=2, default=str) + "\n", encoding="utf-8")
    print(f"wrote {result}")


if __name__ == "__main__":
    main()
