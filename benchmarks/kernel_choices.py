"""Time the per-block kernels rowfold chooses between, on this machine.

    python benchmarks/kernel_choices.py

Two measurements, each the best of ``--repeat`` runs over ``--blocks`` blocks handed to a
pool of 1 and of 2 Python threads, every BLAS call limited to one thread (the embedded
cluster's setting):

- ``trsm``: ``X = A R^-1`` for 65,536 x 64 blocks by scipy's f2py wrapper (GIL held) and by
  :func:`rowfold.kernels.nogil.solve_right_upper` (GIL released).
- ``gram``: the upper triangle of ``A^H A`` for 65,536 x {16, 64, 256} blocks by syrk (the GIL
  released, :func:`rowfold.kernels.nogil.rank_k_upper`), by gemm through numpy
  (``A.T @ A``; numpy releases the GIL, and for real data spots the transpose and calls syrk
  itself, then fills the lower triangle) and by a true gemm (``A.T @ B`` with B an untimed copy
  of A, so numpy cannot spot it), in the file's C order.

Prints a table and writes ``benchmarks/results/kernel_choices.json``.
"""

from __future__ import annotations

import argparse
import json
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

from rowfold.kernels import nogil
from rowfold.kernels.gram import _f2py_solve_right_upper

RESULTS = Path(__file__).resolve().parent / "results"


def best_time(
    work: Callable[[np.ndarray], Any], blocks: list[np.ndarray], threads: int, repeat: int
) -> float:
    """Best wall time of ``repeat`` runs of ``work`` over ``blocks`` on ``threads`` threads."""
    best = float("inf")
    with ThreadPoolExecutor(threads) as pool:
        for _ in range(repeat):
            start = time.perf_counter()
            list(pool.map(work, blocks))
            best = min(best, time.perf_counter() - start)
    return best


def trsm_rows(rows: int, cols: int, count: int, repeat: int) -> list[dict[str, Any]]:
    """Old (f2py) and new (GIL released) ``A R^-1`` on ``count`` blocks, C and Fortran order."""
    rng = np.random.default_rng(1)
    base = [rng.standard_normal((rows, cols)) for _ in range(count)]
    R = np.linalg.qr(base[0], mode="r")
    out = []
    for order, blocks in (("C", base), ("F", [np.asfortranarray(b) for b in base])):
        for name, work in (
            ("f2py trsm", lambda b: _f2py_solve_right_upper(b, R)),
            ("nogil trsm", lambda b: nogil.solve_right_upper(b, R)),
        ):
            for threads in (1, 2):
                seconds = best_time(work, blocks, threads, repeat)
                out.append({"kernel": name, "order": order, "threads": threads, "seconds": seconds})
    return out


def gram_rows(rows: int, widths: list[int], count: int, repeat: int) -> list[dict[str, Any]]:
    """syrk versus gemm for the Gram of ``count`` C-ordered blocks at each width."""
    rng = np.random.default_rng(2)
    out = []
    for n in widths:
        blocks = [rng.standard_normal((rows, n)) for _ in range(count)]
        twins = {id(b): b.copy() for b in blocks}
        for name, work in (
            ("syrk (nogil)", lambda b: nogil.rank_k_upper(b.T, transpose=False)),
            ("numpy A.T @ A", lambda b: b.T @ b),
            ("gemm A.T @ copy", lambda b, twins=twins: b.T @ twins[id(b)]),
        ):
            for threads in (1, 2):
                seconds = best_time(work, blocks, threads, repeat)
                flops = 2.0 * rows * n * n * count  # the gemm count, for a common rate
                out.append(
                    {
                        "kernel": name,
                        "cols": n,
                        "threads": threads,
                        "seconds": seconds,
                        "gflops_gemm_count": flops / seconds / 1e9,
                    }
                )
    return out


def fold_rows(
    widths: list[int], panels: list[int], count: int, repeat: int
) -> list[dict[str, Any]]:
    """The R-only leaf fold (:func:`rowfold.kernels.fold.folded_r`, Gram included) of
    ``count`` blocks of ``max(16384, 4n)`` rows at each width, for each tpqrt inner block
    size (``FOLD_PANEL``), on one Python thread."""
    from rowfold.kernels import fold

    rng = np.random.default_rng(3)
    out = []
    saved = fold.FOLD_PANEL, fold.WIDE_FOLD_PANEL
    try:
        for n in widths:
            rows = max(16384, 4 * n)
            blocks = [rng.standard_normal((rows, n)) for _ in range(count)]
            for panel in panels:
                fold.FOLD_PANEL = fold.WIDE_FOLD_PANEL = panel
                seconds = best_time(fold.folded_r, blocks, 1, repeat)
                flops = 2.0 * rows * n * n * count  # 2mn^2, the benchmark's common count
                out.append(
                    {
                        "cols": n,
                        "rows": rows,
                        "panel": panel,
                        "seconds": seconds,
                        "gflops_2mn2": flops / seconds / 1e9,
                    }
                )
    finally:
        fold.FOLD_PANEL, fold.WIDE_FOLD_PANEL = saved
    return out


def single_thread_dgemm(size: int = 2048) -> float:
    """Best-of-3 dgemm rate of one BLAS thread, in GFlop/s (the fold's ceiling)."""
    rng = np.random.default_rng(4)
    a, b = rng.standard_normal((size, size)), rng.standard_normal((size, size))
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - start)
    return 2.0 * size**3 / best / 1e9


def main() -> None:
    """Run the measurements, print them and write the JSON."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=65536)
    parser.add_argument("--blocks", type=int, default=8)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--widths", default="16,64,256")
    parser.add_argument("--fold-widths", default="64,256,1024", help="widths of the fold rows")
    parser.add_argument("--fold-panels", default="16,32,64", help="tpqrt inner block sizes")
    parser.add_argument("--only-fold", action="store_true", help="measure only the fold")
    args = parser.parse_args()
    widths = [int(w) for w in args.widths.split(",")]
    with threadpool_limits(limits=1):
        trsm = [] if args.only_fold else trsm_rows(args.rows, 64, args.blocks, args.repeat)
        gram = [] if args.only_fold else gram_rows(args.rows, widths, args.blocks, args.repeat)
        dgemm = single_thread_dgemm()
        folds = fold_rows(
            [int(w) for w in args.fold_widths.split(",")],
            [int(p) for p in args.fold_panels.split(",")],
            2,
            args.repeat,
        )
    blas = [(i.get("internal_api"), i.get("architecture")) for i in threadpool_info()]
    print(f"BLAS: {blas}; {args.blocks} blocks, best of {args.repeat}, 1 BLAS thread per call")
    for row in trsm:
        print(
            f"trsm {args.rows}x64 {row['order']} {row['kernel']:<12} threads={row['threads']}"
            f"  {row['seconds']:.3f} s"
        )
    for row in gram:
        print(
            f"gram {args.rows}x{row['cols']:<4} {row['kernel']:<20} threads={row['threads']}"
            f"  {row['seconds']:.3f} s  ({row['gflops_gemm_count']:.1f} GFlop/s, gemm count)"
        )
    print(f"dgemm, one BLAS thread: {dgemm:.1f} GFlop/s")
    for row in folds:
        print(
            f"fold {row['rows']}x{row['cols']:<4} panel={row['panel']:<3}  {row['seconds']:.3f} s  "
            f"({row['gflops_2mn2']:.1f} GFlop/s, {row['gflops_2mn2'] / dgemm:.0%} of dgemm)"
        )
    RESULTS.mkdir(exist_ok=True)
    path = RESULTS / "kernel_choices.json"
    record = {"blas": blas, "trsm": trsm, "gram": gram, "dgemm_1_thread": dgemm, "fold": folds}
    path.write_text(json.dumps(record, indent=2))
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
