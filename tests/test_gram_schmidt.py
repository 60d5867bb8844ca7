"""Block Gram-Schmidt methods (bcgs2, bmgs) against LAPACK and published bounds.

Checks are invariants (A = QR, Q^H Q = I, R upper triangular with a real non-negative
diagonal), held to bounds in units of u = 2^-53 on matrices with prescribed singular values.
Sources (see CHECKS.md):

- BCGS2, and block MGS with reorthogonalization: loss of orthogonality O(u) for
  numerically full-rank A with a stable inner QR (Barlow & Smoktunowicz, Numer. Math. 123,
  2013; survey: Carson, Lund, Rozložník, Thomas, Linear Algebra Appl. 638, 2022): LOO and
  the factorization residual are held to ``bounds.stable_qr``.
- Block MGS without reorthogonalization: LOO <= c u kappa with a stable inner QR (Jalby &
  Philippe, SIAM J. Sci. Stat. Comput. 12(5), 1991): ``bounds.mgs``.
- Uniqueness: with diag(R) > 0 the thin QR is unique and R is the Cholesky factor of
  A^H A (Trefethen & Bau, Numerical Linear Algebra, 1997, Thm 7.2), so R is compared
  with numpy's LAPACK R after normalising its signs, to the first-order QR perturbation
  bound ``bounds.r_factor`` (kappa u); x with scipy's LAPACK least squares to
  ``bounds.lstsq_solution`` (Wedin 1973).
- The report's figures are measured again here from the stored Q: the two measurements
  round differently, so they are compared to the rounding bound of the products they
  are made of (``bounds.inner_products``), never to each other at a fixed tolerance.
- CholeskyQR2 is reliable only below condition about 1e8 (Yamamoto, Nakatsukasa,
  Yanagisawa, Fukaya, ETNA 44, 2015), so an inner cholqr2 must refuse beyond that.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.linalg

from rowfold import runner, storage
from rowfold.errors import BreakdownError
from rowfold.methods.gram_schmidt import work_q_block
from rowfold.storage.work import create_work_array, write_rows

import bounds
from support import lapack_r, prescribed, write_job

KAPPAS = [1e2, 1e6, 1e10]
INNERS = ["householder", "cholqr2", "mgs"]
# Method options of the two O(u) variants.
REORTHOGONALIZED = [
    pytest.param({"name": "bcgs2"}, id="bcgs2"),
    pytest.param({"name": "bmgs", "reorthogonalize": True}, id="bmgs-reorth"),
]
M, N, PANEL, ROWS = 600, 24, 8, 100


def run(
    folder: Path,
    A: np.ndarray,
    method: dict[str, Any],
    rhs: np.ndarray | None = None,
    rows_per_block: int = ROWS,
) -> tuple[runner.RunOutcome, dict[str, np.ndarray]]:
    """Run a job in-line with Q written; return the outcome and the store's arrays."""
    job = write_job(
        folder, A, rhs, input={"rows_per_block": rows_per_block}, method=method, output={"q": True}
    )
    outcome = runner.run_job(runner.load_job(job), inline=True)
    store = storage.read_result(outcome.output)
    with h5py.File(outcome.output, "r") as handle:
        store["Q"] = handle["Q"][...]
    return outcome, store


def loo(Q: np.ndarray) -> float:
    """Loss of orthogonality ||I - Q^H Q||_F."""
    return float(np.linalg.norm(np.eye(Q.shape[1]) - Q.conj().T @ Q))


def assert_r_convention(R: np.ndarray) -> None:
    """R upper triangular with a real non-negative diagonal (SPEC: the unique thin QR)."""
    assert np.array_equal(R, np.triu(R)), "R is not upper triangular"
    diag = np.diagonal(R)
    assert np.all(np.imag(diag) == 0) and np.all(np.real(diag) >= 0), "diag(R) not real >= 0"


def assert_thin_qr(A: np.ndarray, Q: np.ndarray, R: np.ndarray, limit: float) -> None:
    """A = QR and Q^H Q = I to ``limit``; R in the thin-QR convention."""
    assert_r_convention(R)
    residual = np.linalg.norm(A - Q @ R) / np.linalg.norm(A)
    assert loo(Q) <= limit, f"loss of orthogonality {loo(Q):.2e} > {limit:.2e}"
    assert residual <= limit, f"factorization residual {residual:.2e} > {limit:.2e}"


def assert_r_matches_lapack(A: np.ndarray, R: np.ndarray, kappa: float) -> None:
    """R equals LAPACK's sign-normalised R (unique: Trefethen & Bau Thm 7.2) to the
    first-order perturbation bound of the R factor, ``bounds.r_factor`` (Sun 1991)."""
    n = A.shape[1]
    error = np.linalg.norm(R - lapack_r(A)) / np.linalg.norm(A, 2)
    limit = bounds.r_factor(n, kappa, A.dtype)
    assert error <= limit, f"||R - R_lapack|| / ||A|| = {error:.2e} > {limit:.2e}"


def expected_passes(n: int, panel: int, inner: str, reorthogonalize: bool) -> int:
    """Passes over the row blocks the module docstring promises, counted independently.

    Each inner QR takes 1 (householder), 2 (cholqr2) or one per column (mgs) passes, and
    one more pass writes its Q. With reorthogonalization every panel but the first is
    factored twice; the first too when the inner QR is mgs.
    """
    total = 0
    for k, j0 in enumerate(range(0, n, panel)):
        width = min(panel, n - j0)
        once = {"householder": 1, "cholqr2": 2, "mgs": width}[inner] + 1
        twice = reorthogonalize and (k > 0 or inner == "mgs")
        total += 2 * once if twice else once
    return total


def check_report(
    outcome: runner.RunOutcome, method: dict[str, Any], n: int, panel: int, Q: np.ndarray
) -> None:
    """Pass count (factorization + the verification pass), the method details, and the
    report's loss of orthogonality against the same figure measured here from the stored Q.

    Both are ||I - G||_F for a Gram G of the same Q, summed in a different order (block by
    block in the verification pass, one product here), so they differ by at most the
    rounding of two such products: 2 ``bounds.inner_products(m)`` ||Q||_F^2 (Higham 2002,
    eq. 3.13; the reverse triangle inequality for the norms).
    """
    report = outcome.report
    inner = method.get("inner", "householder")
    reorth = method["name"] == "bcgs2" or bool(method.get("reorthogonalize", False))
    assert report["passes_over_input"] == expected_passes(n, panel, inner, reorth) + 1
    details = report["method_details"]
    assert details["panels"] == -(-n // panel)
    assert details["inner"] == inner
    assert details["reorthogonalize"] is reorth
    measured_twice = abs(report["orthogonality_loss"] - loo(Q))
    limit = 2 * bounds.inner_products(Q.shape[0], Q.dtype) * np.linalg.norm(Q) ** 2
    assert measured_twice <= limit, f"report and stored Q differ by {measured_twice:.2e}"


@pytest.mark.parametrize("kappa", KAPPAS)
@pytest.mark.parametrize("method", REORTHOGONALIZED)
def test_reorthogonalized_methods_are_orthogonal_to_order_u(
    job_folder: Path, method: dict[str, Any], kappa: float
) -> None:
    """BCGS2 and BMGS+reorth: LOO and residual O(u) at any condition (Barlow & Smoktunowicz)."""
    A = prescribed(M, N, kappa, seed=21)
    method = {**method, "panel": PANEL}
    outcome, got = run(job_folder, A, method)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(N))
    assert_r_matches_lapack(A, got["R"], kappa)
    check_report(outcome, method, N, PANEL, got["Q"])


@pytest.mark.parametrize("kappa", KAPPAS)
def test_bmgs_loses_orthogonality_like_u_kappa(job_folder: Path, kappa: float) -> None:
    """BMGS without reorthogonalization: LOO <= c u kappa (Jalby & Philippe 1991)."""
    A = prescribed(M, N, kappa, seed=22)
    method = {"name": "bmgs", "panel": PANEL}
    outcome, got = run(job_folder, A, method)
    assert_r_convention(got["R"])
    assert loo(got["Q"]) <= bounds.mgs(N, kappa)
    # A = QR holds to O(u) whatever Q's orthogonality (backward stability of MGS R).
    residual = np.linalg.norm(A - got["Q"] @ got["R"])
    assert residual <= bounds.stable_qr(N) * np.linalg.norm(A)
    assert_r_matches_lapack(A, got["R"], kappa)
    check_report(outcome, method, N, PANEL, got["Q"])


def test_bmgs_without_reorthogonalization_is_measurably_worse(job_folder: Path) -> None:
    """At kappa 1e10 plain BMGS leaves the O(u) bound that BMGS+reorth keeps (CHECKS.md:
    MGS loses orthogonality like u kappa, 1e-8 at kappa 1e8 observed, far above O(u))."""
    A = prescribed(M, N, 1e10, seed=23)
    _, plain = run(job_folder / "plain", A, {"name": "bmgs", "panel": PANEL})
    _, twice = run(
        job_folder / "twice", A, {"name": "bmgs", "panel": PANEL, "reorthogonalize": True}
    )
    assert loo(twice["Q"]) <= bounds.stable_qr(N)
    assert loo(plain["Q"]) > 1e3 * bounds.stable_qr(N)


@pytest.mark.parametrize("inner", INNERS)
def test_each_inner_qr_in_bcgs2(job_folder: Path, inner: str) -> None:
    """Every inner QR keeps BCGS2 at O(u) at kappa 1e10 (panels stay below CholeskyQR2's limit)."""
    A = prescribed(M, N, 1e10, seed=24)
    method = {"name": "bcgs2", "panel": PANEL, "inner": inner}
    outcome, got = run(job_folder, A, method)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(N))
    check_report(outcome, method, N, PANEL, got["Q"])


@pytest.mark.parametrize("inner", INNERS)
def test_each_inner_qr_in_bmgs(job_folder: Path, inner: str) -> None:
    """Plain BMGS with every inner QR: LOO <= c u kappa at kappa 1e6 (Jalby & Philippe)."""
    kappa = 1e6
    A = prescribed(M, N, kappa, seed=25)
    method = {"name": "bmgs", "panel": PANEL, "inner": inner}
    outcome, got = run(job_folder, A, method)
    assert loo(got["Q"]) <= bounds.mgs(N, kappa)
    residual = np.linalg.norm(A - got["Q"] @ got["R"])
    assert residual <= bounds.stable_qr(N) * np.linalg.norm(A)
    check_report(outcome, method, N, PANEL, got["Q"])


# Shapes, panels and partitions; each row says what it exercises.
SHAPES = [
    pytest.param(500, 20, 8, 60, np.float64, id="ragged-panel"),
    pytest.param(400, 12, 12, 50, np.float64, id="single-panel"),
    pytest.param(300, 12, 8, 7, np.float64, id="blocks-shorter-than-n-and-panel"),
    pytest.param(400, 14, 4, 64, np.complex128, id="complex128"),
]


@pytest.mark.parametrize(("m", "n", "panel", "rows", "dtype"), SHAPES)
@pytest.mark.parametrize("method", REORTHOGONALIZED)
def test_shapes_and_dtypes(
    job_folder: Path,
    method: dict[str, Any],
    m: int,
    n: int,
    panel: int,
    rows: int,
    dtype: Any,
) -> None:
    """O(u) thin QR over ragged/single panels, short blocks and complex input."""
    kappa = 1e6
    A = prescribed(m, n, kappa, seed=m + n, dtype=dtype)
    method = {**method, "panel": panel}
    outcome, got = run(job_folder, A, method, rows_per_block=rows)
    assert got["R"].dtype == np.dtype(dtype)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(n))
    assert_r_matches_lapack(A, got["R"], kappa)
    check_report(outcome, method, n, panel, got["Q"])


@pytest.mark.parametrize(
    ("method", "k", "dtype"),
    [
        pytest.param({"name": "bcgs2"}, None, np.float64, id="bcgs2-1d"),
        pytest.param({"name": "bmgs"}, 3, np.float64, id="bmgs-3rhs"),
        pytest.param({"name": "bmgs", "reorthogonalize": True}, None, np.complex128, id="complex"),
    ],
)
def test_solution_matches_lapack_lstsq(
    job_folder: Path, method: dict[str, Any], k: int | None, dtype: Any
) -> None:
    """x agrees with scipy's LAPACK least squares to the least-squares perturbation bound
    (``bounds.lstsq_solution``: Wedin 1973, Higham 2002 Thm 20.1); the stored qhb is Q^H b
    for the stored Q, up to the rounding of two matrix-vector products."""
    m, n, kappa = 500, 10, 1e3
    rng = np.random.default_rng(31)
    A = prescribed(m, n, kappa, seed=7, dtype=dtype)
    b = rng.standard_normal(m) if k is None else rng.standard_normal((m, k))
    outcome, got = run(job_folder, A, {**method, "panel": 4}, rhs=b, rows_per_block=90)
    expected = scipy.linalg.lstsq(A, b)[0]
    assert got["x"].shape == expected.shape
    residual = np.linalg.norm(b - A @ expected)
    ratio = residual / (np.linalg.norm(A, 2) * np.linalg.norm(expected))
    error = bounds.relative_error(got["x"], expected)
    assert error <= bounds.lstsq_solution(n, kappa, ratio, dtype), f"x error {error:.2e}"
    # |fl(Q^H b) - Q^H b| <= gamma_m |Q|^H |b| for each of the two products (Higham 2002,
    # eq. 3.12), whatever order either sums in.
    qhb = got["Q"].conj().T @ b
    limit = 2 * bounds.inner_products(m, dtype) * np.linalg.norm(got["Q"]) * np.linalg.norm(b)
    assert np.linalg.norm(got["qhb"] - qhb) <= limit
    check_report(outcome, {**method, "panel": 4}, n, 4, got["Q"])


def test_inner_cholqr2_refuses_an_ill_conditioned_panel(job_folder: Path) -> None:
    """A panel with condition 1e12 is beyond CholeskyQR2 (ETNA 44, 2015): refuse, write nothing."""
    A = prescribed(400, 8, 1e12, seed=8)
    job = write_job(
        job_folder, A, method={"name": "bcgs2", "panel": 8, "inner": "cholqr2"}, output={"q": True}
    )
    with pytest.raises(BreakdownError, match="inner: householder") as info:
        runner.run_job(runner.load_job(job), inline=True)
    assert info.value.passes == 1
    assert not (job_folder / "out.h5").exists()


def test_work_array_round_trip(tmp_path: Path) -> None:
    """Scratch arrays: Zarr v3, one full-width chunk per row block, column-offset writes."""
    import zarr

    ref = create_work_array(tmp_path / "scratch", "Q", 10, 3, np.complex128, 4)
    array = zarr.open_array(store=ref.path, path=ref.name, mode="r")
    assert array.metadata.zarr_format == 3
    assert array.chunks == (4, 3)
    expected = np.zeros((10, 3), dtype=np.complex128)
    first = np.arange(8.0).reshape(4, 2) * (1 - 1j)
    last = np.ones((2, 3)) * 2j
    write_rows(ref, 4, first, col_start=1)
    write_rows(ref, 8, last)
    write_rows(ref, 0, np.zeros((0, 3)))
    expected[4:8, 1:] = first
    expected[8:] = last
    assert np.array_equal(storage.read_rows(ref, 0, 10), expected)
    scratch = storage.ScratchArray(ref)
    assert np.array_equal(scratch.read(0, 10), expected)
    assert np.array_equal(work_q_block(np.empty((0, 0)), (scratch, 4, 8)), expected[4:8])
