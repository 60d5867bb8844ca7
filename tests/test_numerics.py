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

import re
import tracemalloc
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp

from rowfold import runner, storage
from rowfold.errors import BreakdownError
from rowfold.methods import auto, rcholqr

import bounds
from support import prescribed, read_store, run_inline, write_job

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


# ---------------------------------------------------------------- 1. leverages, rank r


def leverage_bound(n: int, kappa: float) -> float:
    """|h_i - h_ref_i| <= ||H - H_ref||_2 (sin-theta, bounds.subspace_projector)."""
    return bounds.subspace_projector(n, kappa)


def standardized_bound(
    z_ref: np.ndarray, h_ref: np.ndarray, sigma: float, dof: int, dr: float, dh: float
) -> np.ndarray:
    """First-order bound on |z_i - z_ref_i| for z = r / (sigma sqrt(1 - h)): perturbations
    ||dr|| <= dr of the residuals, |dh| <= dh of the leverages, and dsigma <= dr / sqrt(dof)
    of sigma = ||r|| / sqrt(dof), differentiated term by term."""
    spare = np.sqrt(1.0 - h_ref)
    dsigma = dr / np.sqrt(dof)
    return dr / (sigma * spare) + np.abs(z_ref) * (dh / (2 * spare**2) + dsigma / sigma)


def test_leverages_of_a_network_without_datum_come_from_its_rank_r_space(
    job_folder: Path,
) -> None:
    """300 x 30 levelling network, no datum (rank 29): leverages are the diagonal of the
    pseudo-inverse hat matrix H = A A^+ (numpy.linalg.pinv), so they sum to the rank, and
    the standardized residuals use them."""
    A = levelling(300, 30, seed=41)
    m, n = A.shape
    rng = np.random.default_rng(41)
    b = A @ rng.uniform(10.0, 60.0, n) + 0.01 * rng.standard_normal(m)
    outcome = run(
        write_job(job_folder, A, b, input={"rows_per_block": 64}, solve={"residuals": True})
    )
    got = row_arrays(outcome, "leverage", "standardized_residuals")
    rank = outcome.report["rank"]
    assert rank == n - 1
    H = A @ np.linalg.pinv(A)
    h_ref = np.diagonal(H)
    sv = np.linalg.svd(A, compute_uv=False)
    kappa = sv[0] / sv[rank - 1]
    dh = leverage_bound(n, kappa)
    # sum h_i = ||Q U_r||_F^2 = r up to the loss of orthogonality of Q (n terms)
    assert abs(got["leverage"].sum() - rank) <= n * bounds.stable_qr(n)
    assert np.max(np.abs(got["leverage"] - h_ref)) <= dh
    x_ref = np.linalg.pinv(A) @ b
    r_ref = b - A @ x_ref
    sigma = np.linalg.norm(r_ref) / np.sqrt(m - rank)
    z_ref = r_ref / (sigma * np.sqrt(1.0 - h_ref))
    dr = bounds.residual_vector(n, kappa) * np.linalg.norm(b)
    limit = standardized_bound(z_ref, h_ref, sigma, m - rank, dr, dh)
    assert np.all(np.abs(got["standardized_residuals"] - z_ref) <= limit)


def test_leverages_with_one_dependent_column_sum_to_the_rank(job_folder: Path) -> None:
    """100,000 x 12 with column 11 = column 0 + 2 column 3 (rank 11): leverages are the
    squared row norms of an orthonormal basis of the range (scipy.linalg.orth)."""
    rng = np.random.default_rng(42)
    base = prescribed(100_000, 11, 1e3, seed=42)
    A = np.column_stack([base, base[:, 0] + 2.0 * base[:, 3]])
    b = A @ rng.standard_normal(12) + 0.1 * rng.standard_normal(A.shape[0])
    outcome = run(
        write_job(job_folder, A, b, input={"rows_per_block": 16384}, solve={"residuals": True})
    )
    assert outcome.report["rank"] == 11
    basis = scipy.linalg.orth(A)
    assert basis.shape[1] == 11
    h_ref = np.sum(basis**2, axis=1)
    sv = np.linalg.svd(A, compute_uv=False)
    leverage = row_arrays(outcome, "leverage")["leverage"]
    assert abs(leverage.sum() - 11) <= 12 * bounds.stable_qr(12)
    assert np.max(np.abs(leverage - h_ref)) <= leverage_bound(12, sv[0] / sv[10])


# ---------------------------------------------------------------- 2. one equilibrated factor


def dependent_integer_columns(tiny: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Integer columns up to 100 with c2 = c0 + c1, and one genuine column times ``tiny``."""
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 101, (200, 4)).astype(float)
    genuine = rng.integers(0, 101, 200).astype(float)
    A = np.column_stack([base[:, 0], base[:, 1], base[:, 0] + base[:, 1], base[:, 2:], genuine])
    b = rng.integers(0, 101, 200).astype(float) + 3.0 * genuine
    A[:, 5] *= tiny
    return A, b


@pytest.mark.parametrize("tiny", [1e-20, 1e-17, 1e-15])
def test_rank_null_space_and_solution_come_from_one_equilibrated_factor(
    job_folder: Path, tiny: float
) -> None:
    """Rank 5 of 6: the null direction is c0 + c1 - c2, not the tiny genuine column. The
    reference is scipy.linalg.lstsq on A D^-1 with the same cut-off (10 n eps), unscaled."""
    A, b = dependent_integer_columns(tiny, seed=43)
    n = A.shape[1]
    job = write_job(job_folder, A, b, input={"rows_per_block": 64}, solve={"covariance": True})
    outcome = run(job)
    report = outcome.report
    d = power_of_two_scale(A)
    tol = 10 * n * np.finfo(float).eps
    y_ref, _, rank, sv = scipy.linalg.lstsq(A / d, b, cond=tol)
    assert rank == 5 and report["rank"] == 5
    assert sorted(report["rank_deficient_columns"]) == [0, 1, 2]
    kappa = sv[0] / sv[rank - 1]
    achievable = float(np.linalg.norm(b - A @ (y_ref / d)))
    got = read_store(outcome.output)
    ratio = achievable / (sv[0] * np.linalg.norm(y_ref))
    # compared in the scaled variables y = D x, where the problem is solved
    assert bounds.relative_error(got["x"] * d, y_ref) <= bounds.lstsq_solution(n, kappa, ratio)
    residual_limit = bounds.residual_vector(n, kappa) * np.linalg.norm(b)
    assert abs(report["solution_residual_norm"] - achievable) <= residual_limit
    # standard errors and covariance from the same truncated factor: numpy's pinv of A D^-1
    pinv = np.linalg.pinv(A / d, rcond=tol)
    unit_ref = pinv @ pinv.T
    sigma = report["residual_std"]
    covariance = got["x_covariance"] * np.outer(d, d) / sigma**2
    assert bounds.relative_error(covariance, unit_ref) <= 2 * bounds.pseudo_inverse(n, kappa)
    stderr_ref = sigma * np.sqrt(np.diagonal(unit_ref))
    assert bounds.relative_error(got["x_stderr"] * d, stderr_ref) <= 2 * bounds.pseudo_inverse(
        n, kappa
    )
    assert any("scaled variables" in warning for warning in report["warnings"])


# ---------------------------------------------------------------- 3. float32, what is written


@pytest.mark.parametrize("method", ["tsqr", "cholqr2", "scholqr3", "rcholqr", "auto"])
def test_native_float32_report_measures_the_written_q(job_folder: Path, method: str) -> None:
    """The report's loss of orthogonality is that of the float32 Q in the store: read back
    and measured in float64, the two agree to the inner-product bound of both measurements
    (Higham 2002 eq. 3.5), and the published bound is held in float32's u = 2^-24."""
    m, n = 2000, 12
    rng = np.random.default_rng(44)
    A = prescribed(m, n, 1e2, seed=44).astype(np.float32)
    b = (A @ np.ones(n) + 0.01 * rng.standard_normal(m)).astype(np.float32)
    job = write_job(
        job_folder,
        A,
        b,
        input={"rows_per_block": 300},
        method={"name": method, "precision": "native"},
        output={"q": True},
        solve={"residuals": True},
    )
    outcome = run(job)
    got = row_arrays(outcome, "Q", "leverage")
    assert got["Q"].dtype == np.float32
    Q = got["Q"].astype(np.float64)
    written = float(np.linalg.norm(np.eye(n) - Q.T @ Q))
    reported = outcome.report["orthogonality_loss"]
    assert abs(reported - written) <= 2 * bounds.gram_rounding(m, n), (reported, written)
    bound = outcome.report["orthogonality_bound"]
    assert bound["value"] >= 10 * n * bounds.unit_roundoff(np.float32)
    assert bound["within"] is True and written <= bound["value"]
    # leverages from the same stored rows: float64 sums of n exact products, stored in float32
    h = np.sum(Q**2, axis=1)
    slack = bounds.unit_roundoff(np.float32) + bounds.gram_rounding(n, 1)
    assert np.all(np.abs(got["leverage"] - h) <= slack * h)


# ---------------------------------------------------------------- 4. sparse against dense


def outcome_of(job: Path) -> tuple[str, Any]:
    """("ok", outcome) or ("refused", the message with its figures blanked out)."""
    try:
        return "ok", run(job)
    except BreakdownError as exc:
        return "refused", re.sub(r"\binf\b|[-+]?\d[\d.]*(e[-+]?\d+)?", "#", str(exc))


@pytest.mark.parametrize("datum", [False, True], ids=["no-datum", "datum"])
@pytest.mark.parametrize("method", ["scholqr3", "cholqr2", "auto", "tsqr"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sparse_and_dense_storage_give_the_same_outcome(
    tmp_path: Path, method: str, datum: bool, seed: int
) -> None:
    """The same levelling network stored dense and as CSR: the same outcome kind (and, when
    refused, the same reason); when both succeed, both meet the method's published bound
    (tsqr: bounds.stable_qr; the CholeskyQR family: bounds.cholqr2)."""
    A = levelling(300, 30, seed=seed)
    b = A @ np.random.default_rng(seed).uniform(0.0, 5.0, 30)
    sections: dict[str, Any] = {
        "input": {"rows_per_block": 64, "fixed_columns": [0] if datum else []},
        "method": {"name": method},
        "output": {"q": True},
    }
    (tmp_path / "dense").mkdir()
    (tmp_path / "csr").mkdir()
    dense = write_job(tmp_path / "dense", A, b, **sections)
    csr = write_job(tmp_path / "csr", A, b, **sections)
    storage.write_csr(tmp_path / "csr" / "input.h5", "model/A", sp.csr_matrix(A))
    (kind_dense, dense_result), (kind_csr, csr_result) = outcome_of(dense), outcome_of(csr)
    assert kind_dense == kind_csr, (dense_result, csr_result)
    if kind_dense == "refused":
        assert dense_result == csr_result
        return
    m, n = 300, 30 - datum
    for result in (dense_result, csr_result):
        used = result.report["method_used"]
        limit = bounds.stable_qr(n) if used == "tsqr" else bounds.cholqr2(m, n)
        assert result.report["orthogonality_loss"] <= limit
        assert result.report["factorization_residual"] <= limit
    assert dense_result.report["method_used"] == csr_result.report["method_used"]


# ---------------------------------------------------------------- 5. auto's threshold


@pytest.mark.parametrize(("factor", "expected"), [(0.5, "cholqr2"), (2.0, "scholqr3")])
def test_auto_switches_at_its_named_threshold(
    job_folder: Path, factor: float, expected: str
) -> None:
    """kappa = threshold / 2 goes to CholeskyQR2, threshold * 2 to shifted CholeskyQR3; the
    reason names the threshold the code used and the one estimate in the details."""
    threshold = auto.cholqr2_threshold(np.dtype(np.float64))
    A = prescribed(1200, 16, factor * threshold, seed=45)
    job = write_job(job_folder, A, input={"rows_per_block": 250}, method={"name": "auto"})
    report = run(job).report
    details = report["method_details"]
    assert report["method_used"] == expected
    assert details["threshold"] == threshold
    reason = details["method_reason"]
    assert f"{threshold:.3g}" in reason
    assert f"{details['first_pass_condition_estimate']:.3g}" in reason
    # the estimate is that of A (the unshifted first factor), within kappa u kappa of it
    estimate = details["first_pass_condition_estimate"]
    assert abs(estimate - factor * threshold) <= 0.01 * factor * threshold


def test_readme_names_autos_threshold() -> None:
    """The README's methods table names the threshold as the report prints it."""
    threshold = auto.cholqr2_threshold(np.dtype(np.float64))
    row = next(
        line
        for line in (ROOT / "README.md").read_text().splitlines()
        if line.startswith("| `auto`")
    )
    assert f"{threshold:.3g}" in row


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


# ---------------------------------------------------------------- 7. extreme scaling

SCALED_M, SCALED_N = 2000, 16


def scaled_case(case: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(A0, b, s, A): an unscaled problem and A = A0 diag(s) for the case (b unchanged, so
    the scaled problem's x is x0 / s and its residual that of the unscaled problem)."""
    rng = np.random.default_rng(46)
    A0 = prescribed(SCALED_M, SCALED_N, 1e3, seed=46)
    b = A0 @ np.ones(SCALED_N) + 0.01 * rng.standard_normal(SCALED_M)
    s = np.ones(SCALED_N)
    if case == "column-1e-200":
        s[3] = 1e-200
    else:
        s[:] = float(case)
    return A0, b, s, A0 * s


CASES = ["1e160", "1e-160", "1e100", "1e-100", "column-1e-200"]


@pytest.mark.parametrize("scale_columns", [False, True], ids=["raw", "scale_columns"])
@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("method", ["tsqr", "rcholqr"])
def test_extreme_scaling_gives_the_unscaled_answer(
    job_folder: Path, method: str, case: str, scale_columns: bool
) -> None:
    """TSQR (and randomized CholeskyQR, whose Cholesky sees only the preconditioned A) at
    any scaling that fits in float64: full rank, x0 / s and the unscaled residual within
    the least-squares perturbation bounds, every measurable gate held. A^H A itself
    overflows or underflows at 1e+-160, so there the gram residual is not measured and
    the report says why."""
    A0, b, s, A = scaled_case(case)
    limit = bounds.stable_qr(SCALED_N)
    gates = {"orthogonality": limit, "residual": limit}
    gram_measurable = scale_columns or case not in ("1e160", "1e-160")
    if gram_measurable:
        gates["gram"] = limit
    job = write_job(
        job_folder,
        A,
        b,
        input={"rows_per_block": 300},
        method={"name": method},
        output={"q": True},
        solve={"scale_columns": scale_columns},
        gates=gates,
    )
    outcome = run(job)
    report = outcome.report
    assert report["rank"] == SCALED_N
    assert report["r_condition"] is not None
    assert outcome.status == 0, report["gates"]
    x0, res0, *_ = scipy.linalg.lstsq(A0, b)
    kappa = 1e3
    ratio = np.sqrt(res0) / (np.linalg.norm(A0, 2) * np.linalg.norm(x0))
    got = read_store(outcome.output)
    assert bounds.relative_error(got["x"] * s, x0) <= bounds.lstsq_solution(SCALED_N, kappa, ratio)
    residual_limit = bounds.residual_vector(SCALED_N, kappa) * np.linalg.norm(b)
    assert abs(report["solution_residual_norm"] - np.sqrt(res0)) <= residual_limit
    stderr0 = np.sqrt(res0 / (SCALED_M - SCALED_N) * np.diagonal(np.linalg.inv(A0.T @ A0)))
    assert bounds.relative_error(got["x_stderr"] * s, stderr0) <= 2 * bounds.pseudo_inverse(
        SCALED_N, kappa
    )
    if not gram_measurable:
        assert report["gram_residual"] is None
        assert any("A^H A" in warning for warning in report["warnings"])


@pytest.mark.parametrize(
    ("case", "word"),
    [("1e160", "overflows"), ("1e-160", "underflows"), ("column-1e-200", "underflows")],
)
@pytest.mark.parametrize("method", ["cholqr2", "scholqr3"])
def test_cholesky_methods_refuse_a_gram_out_of_range(
    job_folder: Path, method: str, case: str, word: str
) -> None:
    """CholeskyQR squares the entries: at 1e+-160 (or with one column at 1e-200) A^H A is out
    of float64's range, so the method refuses and says why and what to do, instead of
    returning a wrong rank."""
    _, b, _, A = scaled_case(case)
    job = write_job(job_folder, A, b, input={"rows_per_block": 300}, method={"name": method})
    with pytest.raises(BreakdownError, match=word) as caught:
        run(job)
    assert "scale_columns" in str(caught.value) and "tsqr" in str(caught.value)


@pytest.mark.parametrize("case", ["1e160", "1e-160", "column-1e-200"])
@pytest.mark.parametrize("method", ["cholqr2", "auto"])
def test_cholesky_methods_work_on_prescaled_columns(
    job_folder: Path, method: str, case: str
) -> None:
    """With solve.scale_columns the Gram is that of the equilibrated A, so CholeskyQR2 (and
    auto) run at any scaling and give the unscaled problem's x (lstsq perturbation bound)."""
    A0, b, s, A = scaled_case(case)
    job = write_job(
        job_folder,
        A,
        b,
        input={"rows_per_block": 300},
        method={"name": method},
        solve={"scale_columns": True},
    )
    outcome = run(job)
    assert outcome.report["rank"] == SCALED_N
    x0, res0, *_ = scipy.linalg.lstsq(A0, b)
    ratio = np.sqrt(res0) / (np.linalg.norm(A0, 2) * np.linalg.norm(x0))
    got = read_store(outcome.output)
    assert bounds.relative_error(got["x"] * s, x0) <= bounds.lstsq_solution(SCALED_N, 1e3, ratio)


def test_auto_at_1e160_takes_tsqr_and_says_why(job_folder: Path) -> None:
    """auto does not refuse what TSQR can do: an out-of-range Gram sends it to TSQR."""
    _, b, _, A = scaled_case("1e160")
    outcome = run_inline(write_job(job_folder, A, b, method={"name": "auto"}))
    assert outcome.report["method_used"] == "tsqr"
    assert "overflows" in outcome.report["method_details"]["method_reason"]
    assert outcome.report["rank"] == SCALED_N
