"""Numerical defects that once gave exit 0 with wrong numbers, each held to a published bound.

References (sources of the bounds are in tests/bounds.py):
- leverages: the hat matrix H = A A^+ of the rank-r column space (numpy's pseudo-inverse,
  scipy's orthonormal range basis ``scipy.linalg.orth``), sin-theta bound;
- rank-deficient least squares: ``scipy.linalg.lstsq`` (LAPACK gelsd) on the column-scaled
  matrix with the same relative cut-off, unscaled, and numpy's pseudo-inverse;
- float32: the Q read back from the store, measured in float64 (inner-product bound);
- sparse against dense storage of the same matrix: the same outcome, and the method's bound;
- ``auto``: its own named threshold, on matrices with prescribed singular values;
- the sparse-sign sketch: its defining properties, and memory proportional to its nonzeros;
- extreme scaling: the unscaled problem's x and residual (least-squares perturbation bounds).
"""

from __future__ import annotations

import tracemalloc
from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.sparse as sp

from rowfold import runner
from rowfold.methods import rcholqr

ROOT = Path(__file__).resolve().parent.parent


def run(job: Path) -> runner.RunOutcome:
    return runner.run_job(runner.load_job(job), inline=True)


def row_arrays(outcome: runner.RunOutcome, *names: str) -> dict[str, np.ndarray]:
    """Read per-row arrays (Q, leverage, residuals, ...) back from an HDF5 store."""
    with h5py.File(outcome.output, "r") as handle:
        return {name: handle[name][...] for name in names}


def levelling(rows: int, stations: int, seed: int) -> np.ndarray:
    """A levelling network without datum: each row +1 at one station, -1 at another (random
    pairs). Connected, so its rank is stations - 1 (numpy's matrix_rank checks it)."""
    rng = np.random.default_rng(seed)
    first = rng.integers(0, stations, rows)
    second = (first + rng.integers(1, stations, rows)) % stations
    A = np.zeros((rows, stations))
    A[np.arange(rows), first] = 1.0
    A[np.arange(rows), second] = -1.0
    assert np.linalg.matrix_rank(A) == stations - 1
    return A


def power_of_two_scale(A: np.ndarray) -> np.ndarray:
    """The README's column scale D: the power of two nearest each column's 2-norm."""
    log2 = np.log2(np.linalg.norm(A, axis=0))
    # the rule is only unambiguous away from the midpoint between two powers
    assert np.all(np.abs(log2 - np.floor(log2) - 0.5) > 1e-6)
    return np.asarray(2.0 ** np.round(log2))


# ---------------------------------------------------------------- 6. the sparse-sign sketch


@pytest.mark.parametrize(("sketch_rows", "rows"), [(192, 65_536), (5, 300), (24, 1)])
def test_sparse_sign_embedding_has_per_row_distinct_entries(sketch_rows: int, rows: int) -> None:
    """Every column (input row) holds exactly per_row distinct sketch rows with entries
    +-1/sqrt(per_row) (the sparse sign embedding's definition); the draw is reproducible
    from (seed, block index) and differs between blocks."""
    omega = sp.csc_matrix(rcholqr.embedding("sparse_sign", sketch_rows, rows, 7, 3))
    per_row = min(rcholqr.NONZEROS_PER_ROW, sketch_rows)
    assert omega.shape == (sketch_rows, rows)
    assert np.all(np.diff(omega.indptr) == per_row)
    for column in range(min(rows, 2000)):
        found = omega.indices[omega.indptr[column] : omega.indptr[column + 1]]
        assert np.unique(found).size == per_row
    assert np.all(np.abs(np.abs(omega.data) - 1 / np.sqrt(per_row)) <= 1e-15)
    again = sp.csc_matrix(rcholqr.embedding("sparse_sign", sketch_rows, rows, 7, 3))
    assert (omega != again).nnz == 0
    if rows > 1:
        other = sp.csc_matrix(rcholqr.embedding("sparse_sign", sketch_rows, rows, 7, 4))
        assert (omega != other).nnz > 0


def test_sparse_sign_rows_are_used_evenly() -> None:
    """Each sketch row receives rows * per_row / s entries on average; with 65,536 rows every
    count lies within 6 binomial standard deviations of that (a property of a uniform draw,
    which an argsort-free scheme must keep)."""
    rows, sketch_rows = 65_536, 192
    omega = sp.csr_matrix(rcholqr.embedding("sparse_sign", sketch_rows, rows, 0, 0))
    counts = np.diff(omega.indptr)
    p = rcholqr.NONZEROS_PER_ROW / sketch_rows
    mean, sd = rows * p, np.sqrt(rows * p * (1 - p))
    assert np.all(np.abs(counts - mean) <= 6 * sd)
    signs = omega.data > 0
    assert abs(signs.mean() - 0.5) <= 6 * 0.5 / np.sqrt(signs.size)


def test_sparse_sign_embedding_memory_is_proportional_to_its_nonzeros() -> None:
    """Building one 65,536-row block's embedding (3n = 192 sketch rows) traces at most a
    small multiple of rows * per_row * 8 bytes: the nonzeros are drawn, not sorted out of a
    rows x 3n matrix. The factor 8 (index, value, pointer arrays and the draw's temporaries)
    is common practice, not a published figure."""
    rows, sketch_rows = 65_536, 192
    tracemalloc.start()
    try:
        rcholqr.embedding("sparse_sign", sketch_rows, rows, 0, 0)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak <= 8 * rows * rcholqr.NONZEROS_PER_ROW * 8, peak
