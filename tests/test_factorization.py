"""Invariants of the thin QR computed by rowfold, against LAPACK and published bounds.

Every check is an invariant (A = QR, Q^H Q = I, R upper triangular with a real
non-negative diagonal) held to a bound in units of u = 2^-53, on matrices with
prescribed singular values. Sources:

- Householder QR and TSQR with any tree: loss of orthogonality O(u) and backward error
  O(u) (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, ch. 19;
  Demmel, Grigori, Hoemmen, Langou, SIAM J. Sci. Comput. 34(1), 2012): ``bounds.stable_qr``.
- CholeskyQR2: ||Q^H Q - I||_F <= 6 (m n u + n (n+1) u) for condition below about 1e8
  (Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44, 2015; constant from memory per
  CHECKS.md): ``bounds.cholqr2``.
- Uniqueness: with diag(R) > 0 the thin QR is unique and R is the Cholesky factor of
  A^H A (Trefethen & Bau 1997, Thm 7.2), so R is compared with numpy's LAPACK R after
  normalising its signs, to the first-order perturbation bound of R (``bounds.r_factor``,
  kappa u); x with LAPACK least squares to ``bounds.lstsq_solution`` (Wedin 1973). Two
  runs of rowfold (in-line and on a cluster) are compared to the same bounds: they may
  round differently, so neither is the reference of the other's bits.

The numerical tests call the core in memory through the Python API
(``support.factor_in_memory``); the job-file round trip stays in the wiring tests (Zarr in
and out, the distributed engine) and where a check needs a stored array the API does not
return (``qhb``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from rowfold import runner
from rowfold.errors import BreakdownError

import bounds
from support import (
    assert_thin_qr,
    factor_in_memory,
    lapack_r,
    prescribed,
    read_store,
    run_inline,
    write_job,
)


def lstsq_limit(A: np.ndarray, b: np.ndarray, x: np.ndarray, kappa: float) -> float:
    """``bounds.lstsq_solution`` for A (condition kappa) and b, with the residual ratio
    ||r|| / (||A||_2 ||x||) of the reference solution x."""
    ratio = np.linalg.norm(b - A @ x) / (np.linalg.norm(A, 2) * np.linalg.norm(x))
    return bounds.lstsq_solution(A.shape[1], kappa, float(ratio), A.dtype)


# Shapes and block partitions; each row says what it exercises.
PARTITIONS = [
    pytest.param(400, 12, None, id="single-block-auto"),
    pytest.param(400, 12, 400, id="one-block-exact"),
    pytest.param(401, 12, 50, id="ragged-last-block"),
    pytest.param(390, 12, 64, id="blocks-do-not-divide-m"),
    pytest.param(300, 12, 7, id="blocks-shorter-than-n"),
    pytest.param(200, 40, 41, id="wide-ish-blocks"),
]


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
@pytest.mark.parametrize(("m", "n", "rows_per_block"), PARTITIONS)
def test_thin_qr_invariants(method: str, m: int, n: int, rows_per_block: int | None) -> None:
    A = prescribed(m, n, 1e6, seed=m + n)
    got, report = factor_in_memory(A, method=method, rows_per_block=rows_per_block, q=True)
    limit = bounds.stable_qr(n) if method == "tsqr" else bounds.cholqr2(m, n)
    assert_thin_qr(A, got["Q"], got["R"], limit)
    error = np.linalg.norm(got["R"] - lapack_r(A)) / np.linalg.norm(A, 2)
    assert error <= bounds.r_factor(n, 1e6)
    assert report["orthogonality_loss"] <= limit
    assert report["factorization_residual"] <= limit


@pytest.mark.parametrize("condition", [1e2, 1e6, 1e10, 1e12])
def test_tsqr_orthogonality_is_independent_of_condition(condition: float) -> None:
    """TSQR keeps Q orthogonal to O(u) at any condition (Demmel et al. 2012)."""
    A = prescribed(600, 16, condition, seed=3)
    got, _ = factor_in_memory(A, rows_per_block=100, q=True)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(16))


@pytest.mark.parametrize("tree", ["flat", "binary", 3])
def test_trees_give_the_same_r(tree: str | int) -> None:
    """Any reduction tree gives the unique R (Trefethen & Bau Thm 7.2) to O(u)."""
    A = prescribed(700, 10, 1e4, seed=5)
    R = factor_in_memory(A, rows_per_block=60, tree=tree)[0]["R"]
    assert np.linalg.norm(R - lapack_r(A)) / np.linalg.norm(A, 2) <= bounds.r_factor(10, 1e4)


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
@pytest.mark.parametrize("k", [None, 3])
def test_solution_matches_lapack_lstsq(job_folder: Path, method: str, k: int | None) -> None:
    """x agrees with scipy's LAPACK least squares to the least-squares perturbation bound,
    and x solves R x = qhb as stored: back substitution is backward stable,
    (R + dR) x = qhb with |dR| <= gamma_n |R| (Higham 2002, Thm 8.5), so
    ||R x - qhb|| <= gamma_n ||R||_F ||x|| (a stored qhb that x was not solved from fails).
    On the job-file path: the API does not return the stored qhb."""
    rng = np.random.default_rng(11)
    A = prescribed(500, 8, 1e3, seed=7)
    b = rng.standard_normal(500) if k is None else rng.standard_normal((500, k))
    job = write_job(job_folder, A, b, input={"rows_per_block": 90}, method={"name": method})
    got = read_store(run_inline(job).output)
    expected = scipy.linalg.lstsq(A, b)[0]
    assert got["x"].shape == expected.shape
    assert bounds.relative_error(got["x"], expected) <= lstsq_limit(A, b, expected, 1e3)
    solved = np.linalg.norm(got["R"] @ got["x"] - got["qhb"])
    assert solved <= 2 * bounds.gamma(8) * np.linalg.norm(got["R"]) * np.linalg.norm(got["x"])


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_complex_input_gives_unitary_q(method: str) -> None:
    """Complex A: Q unitary, conjugate transposes throughout, diag(R) real and >= 0."""
    A = prescribed(300, 6, 1e3, seed=2, dtype=np.complex128)
    got, _ = factor_in_memory(A, method=method, rows_per_block=70, q=True)
    limit = bounds.stable_qr(6) if method == "tsqr" else bounds.cholqr2(300, 6)
    assert_thin_qr(A, got["Q"], got["R"], limit)


def test_float32_input_is_accumulated_in_float64() -> None:
    A = prescribed(300, 5, 10.0, seed=4).astype(np.float32)
    got, _ = factor_in_memory(A, q=True)
    assert got["R"].dtype == np.float64
    assert_thin_qr(A.astype(np.float64), got["Q"], got["R"], bounds.stable_qr(5))


@pytest.mark.parametrize("condition", [1e10, 1e12])
def test_cholqr2_refuses_beyond_its_range(job_folder: Path, condition: float) -> None:
    """CholeskyQR2 is reliable only below condition ~1e8 (ETNA 44, 2015): it must refuse."""
    A = prescribed(400, 10, condition, seed=8)
    with pytest.raises(BreakdownError, match="tsqr"):
        factor_in_memory(A, method="cholqr2", q=True, scratch=job_folder)
    assert not list(job_folder.iterdir()), "nothing is left in the scratch folder"


def lauchli(n: int, mu: float) -> np.ndarray:
    """Läuchli matrix: ones in the first row, mu on the diagonal below it (Läuchli 1961)."""
    return np.vstack([np.ones((1, n)), mu * np.eye(n)])


def test_lauchli_cholqr2_refuses_and_tsqr_holds() -> None:
    """Björck 1996 / CHECKS.md: at mu = 1e-8 CholeskyQR breaks down, Householder keeps O(u)."""
    A = lauchli(3, 1e-8)
    with pytest.raises(BreakdownError):
        factor_in_memory(A, method="cholqr2", q=True)
    got, _ = factor_in_memory(A, method="tsqr", q=True)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(3))


def test_zarr_input_and_output(job_folder: Path) -> None:
    A = prescribed(250, 7, 1e3, seed=9)
    b = np.arange(250.0)
    job = write_job(
        job_folder,
        A,
        b,
        suffix=".zarr",
        out_suffix=".zarr",
        input={"rows_per_block": 40},
        output={"q": True},
    )
    got = read_store(run_inline(job).output)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(7))
    expected = scipy.linalg.lstsq(A, b)[0]
    assert bounds.relative_error(got["x"], expected) <= lstsq_limit(A, b, expected, 1e3)


def test_distributed_engine_matches_inline(job_folder: Path) -> None:
    """The same job on the embedded Dask cluster gives the same R as in-line, up to the
    R-factor bound: worker threads run BLAS single-threaded, in-line runs may not, so the
    two may round differently (kappa 1e5 makes that visible)."""
    A = prescribed(800, 9, 1e5, seed=12)
    job = write_job(
        job_folder,
        A,
        input={"rows_per_block": 100},
        cluster={"processes": False, "workers": 2, "threads_per_worker": 1},
    )
    on_cluster = runner.run_job(runner.load_job(job))
    R_cluster = read_store(on_cluster.output)["R"]
    R_inline = read_store(run_inline(job).output)["R"]
    assert np.linalg.norm(R_cluster - R_inline) / np.linalg.norm(A, 2) <= bounds.r_factor(9, 1e5)
    assert on_cluster.report["peak_memory_bytes"] > 0


def test_rank_deficient_gives_minimum_norm_solution() -> None:
    """A dependent column: rank n-1, x equals numpy's pseudo-inverse solution to the
    least-squares bound at the condition sigma_1 / sigma_r of the rank-r part (Wedin 1973
    for rank-preserving perturbations; the cut-off leaves sigma_5 ~ u far below it)."""
    rng = np.random.default_rng(1)
    A = rng.standard_normal((200, 5))
    A[:, 4] = A[:, 0] - A[:, 1]
    b = rng.standard_normal(200)
    got, report = factor_in_memory(A, b, rows_per_block=30)
    assert report["rank"] == 4
    assert set(report["rank_deficient_columns"]) == {0, 1, 4}
    x = got["x"]
    expected = np.linalg.pinv(A) @ b
    sigma = np.linalg.svd(A, compute_uv=False)
    assert bounds.relative_error(x, expected) <= lstsq_limit(A, b, expected, sigma[0] / sigma[3])


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_q_with_a_right_hand_side_is_as_good_as_without(method: str) -> None:
    """With an rhs the Q formed in a later pass must still pair with R to O(u): R and Q^H b
    must come from the very reflectors that the Q pass re-forms from A (Q is ill-determined
    at large kappa, so any other rounding path would show as ||A - QR|| ~ u kappa)."""
    A = prescribed(900, 10, 1e6, seed=61)
    b = np.random.default_rng(61).standard_normal(900)
    got, _ = factor_in_memory(A, b, method=method, rows_per_block=128, q=True)
    limit = bounds.stable_qr(10) if method == "tsqr" else bounds.cholqr2(900, 10)
    assert_thin_qr(A, got["Q"], got["R"], limit)
