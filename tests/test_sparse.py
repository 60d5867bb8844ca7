"""Sparse (CSR) inputs and fixed columns, checked against outside references.

References: numpy/LAPACK Householder QR (``numpy.linalg.qr``) and LAPACK least squares
(``scipy.linalg.lstsq``) on the densified matrix; scipy.sparse slicing for the row reads;
the perturbation bounds named beside each tolerance.
"""

from __future__ import annotations

import tracemalloc
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
import yaml

from rowfold import demo, runner, storage
from rowfold.blocks import BlockPlan, expand_columns, load_block, load_sparse_block
from rowfold.cli import main
from rowfold.cluster import InlineEngine
from rowfold.kernels import sparse as sparse_kernels
from rowfold.methods import get_method
from rowfold.methods.base import Context
from rowfold.solve import solve

import bounds
from support import lapack_r, read_store, write_job

M, N = 1200, 10


def near_dependent(m: int, n: int, delta: float, seed: int) -> sp.csr_matrix:
    """Sparse A whose odd columns are the previous column plus ``delta`` times a sparse
    column, so kappa(A) grows like 1/delta while A stays sparse (~3 stored values a row)."""
    rng = np.random.default_rng(seed)
    B = sp.random(m, n, density=0.2, random_state=seed, format="csc", data_rvs=rng.standard_normal)
    cols = [B[:, j] if j % 2 == 0 else B[:, j - 1] + delta * B[:, j] for j in range(n)]
    return sp.csr_matrix(sp.hstack(cols))


def csr_job(
    folder: Path,
    A: Any,
    rhs: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    suffix: str = ".h5",
    **sections: dict[str, Any],
) -> Path:
    """Write A as a CSR group (plus rhs and weights) and a job file; return the job path."""
    extra = {}
    if rhs is not None:
        extra["model/b"] = rhs
    if weights is not None:
        extra["model/w"] = weights
    storage.write_csr(folder / f"input{suffix}", "model/A", A, extra)
    job: dict[str, Any] = {
        "name": "sparse-test",
        "input": {"path": f"input{suffix}", "matrix": "model/A"},
        "method": {"name": "tsqr"},
        "output": {"path": "out.h5", "overwrite": True},
    }
    if rhs is not None:
        job["input"]["rhs"] = "model/b"
    if weights is not None:
        job["input"]["weights"] = "model/w"
    for key, values in sections.items():
        job.setdefault(key, {}).update(values)
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def run(job: Path) -> runner.RunOutcome:
    return runner.run_job(runner.load_job(job), inline=True)


def assert_lstsq_close(A: np.ndarray, b: np.ndarray, x: np.ndarray, reference: np.ndarray) -> None:
    """x agrees with the reference LAPACK solution to ``bounds.lstsq_solution`` (Wedin 1973;
    Higham 2002 Thm 20.1), at A's condition number (numpy SVD) and residual ratio."""
    kappa = float(np.linalg.cond(A))
    ratio = np.linalg.norm(b - A @ reference) / (np.linalg.norm(A, 2) * np.linalg.norm(reference))
    error = bounds.relative_error(x, reference)
    limit = bounds.lstsq_solution(A.shape[1], kappa, float(ratio))
    assert error <= limit, f"||x - x_ref|| / ||x_ref|| = {error:.2e} > {limit:.2e}"


# ------------------------------------------------------------------ storage and kernels


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_row_reads_match_scipy_slicing(tmp_path: Path, suffix: str) -> None:
    """read_csr_rows(start, stop) gives the CSR arrays of A[start:stop] (scipy slicing)."""
    A = sp.random(500, 7, density=0.3, random_state=1, format="csr")
    storage.write_csr(tmp_path / f"a{suffix}", "g/A", A)
    ref = storage.ArrayRef(str(tmp_path / f"a{suffix}"), "g/A")
    for start, stop in [(0, 500), (0, 1), (123, 377), (499, 500), (250, 250)]:
        data, indices, indptr = storage.read_csr_rows(ref, start, stop)
        want = A[start:stop]
        assert np.array_equal(indptr, want.indptr)
        assert np.array_equal(indices, want.indices)
        assert np.array_equal(data, want.data)


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_matrix_kind_is_found_by_looking(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"a{suffix}"
    storage.write_arrays(path, {"dense/A": np.ones((6, 2))})
    storage.write_csr(path, "sparse/A", sp.eye(6, 2), {"sparse/b": np.ones(6)})
    dense = storage.describe_matrix(storage.ArrayRef(str(path), "dense/A"))
    csr = storage.describe_matrix(storage.ArrayRef(str(path), "sparse/A"))
    assert isinstance(dense, storage.ArrayInfo) and dense.shape == (6, 2)
    assert isinstance(csr, storage.CsrInfo) and csr.shape == (6, 2) and csr.nnz == 2


def test_sparse_kernels_match_dense_numpy() -> None:
    """Sparse Gram, cross product and product equal numpy's on the densified block, to the
    rounding of two computations of the same inner products (``bounds.inner_products``,
    Higham 2002 eq. 3.13); the triangular inverse to its residual bound
    (``bounds.triangular_solve``, Higham 2002 sec. 14.2)."""
    rng = np.random.default_rng(2)
    block = sp.random(300, 9, density=0.2, random_state=2, format="csr", dtype=complex)
    block.data += 1j * rng.standard_normal(block.nnz)
    dense = block.toarray()
    b = rng.standard_normal((300, 2))
    R = np.triu(rng.standard_normal((9, 9))) + 5 * np.eye(9)
    twice = 2 * bounds.inner_products(300, complex)
    gram = sparse_kernels.sparse_gram(block)
    assert np.linalg.norm(gram - dense.conj().T @ dense) <= twice * np.linalg.norm(dense) ** 2
    # Hermitian by construction (the lower triangle is the conjugate copy of the upper).
    assert np.array_equal(gram, gram.conj().T)
    cross = sparse_kernels.sparse_cross(block, b)
    limit = twice * np.linalg.norm(dense) * np.linalg.norm(b)
    assert np.linalg.norm(cross - dense.conj().T @ b) <= limit
    inverse = sparse_kernels.upper_inverse(R)
    limit = bounds.triangular_solve(9, np.linalg.cond(R)) * np.sqrt(9)
    assert np.linalg.norm(inverse @ R - np.eye(9)) <= limit
    x = sparse_kernels.sparse_times(block, R)
    limit = 2 * bounds.inner_products(9, complex) * np.linalg.norm(dense) * np.linalg.norm(R)
    assert np.linalg.norm(x - dense @ R) <= limit
    assert sparse_kernels.sparse_times(block[:0], R).shape == (0, 9)


# ------------------------------------------------------------------ CSR equals dense


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_csr_matches_lapack_on_the_densified_matrix(
    tmp_path: Path, suffix: str, method: str
) -> None:
    """R and x from a CSR input agree with LAPACK on the densified matrix.

    Bounds: both sides are backward stable, so R differs by ``bounds.r_factor`` (first-order
    perturbation of the QR factor, Sun, BIT 31, 1991) and x by ``bounds.lstsq_solution``
    (Wedin 1973; Higham 2002 Thm 20.1), at kappa from numpy's SVD of the dense matrix.
    """
    A = near_dependent(M, N, 1e-4, seed=3)
    dense = A.toarray()
    rng = np.random.default_rng(3)
    b = dense @ rng.standard_normal(N) + 1e-3 * rng.standard_normal(M)
    job = csr_job(
        tmp_path, A, b, suffix=suffix, method={"name": method}, input={"rows_per_block": 250}
    )
    got = read_store(run(job).output)
    kappa = np.linalg.cond(dense)
    assert kappa > 1e3  # the matrix is ill-conditioned enough for the bound to mean something
    r_error = np.linalg.norm(got["R"] - lapack_r(dense)) / np.linalg.norm(dense, 2)
    assert r_error <= bounds.r_factor(N, kappa)
    assert_lstsq_close(dense, b, got["x"], scipy.linalg.lstsq(dense, b)[0])


def test_tsqr_on_csr_equals_tsqr_on_dense_bit_for_bit(tmp_path: Path) -> None:
    """tsqr densifies each CSR block into exactly the dense block, so the results agree to
    the last bit. Bit-for-bit is legitimate here: blocks.py promises the densified block
    equals the dense one bit for bit, and both runs are then the very same computation
    (same kernels, same engine, same process, so the same BLAS kernel and threads)."""
    A = near_dependent(M, N, 1e-2, seed=4)
    b = np.random.default_rng(4).standard_normal(M)
    (tmp_path / "csr").mkdir()
    (tmp_path / "dense").mkdir()
    sections: dict[str, Any] = {"input": {"rows_per_block": 200}}
    from_csr = read_store(run(csr_job(tmp_path / "csr", A, b, **sections)).output)
    from_dense = read_store(run(write_job(tmp_path / "dense", A.toarray(), b, **sections)).output)
    for name in ("R", "x", "x_stderr", "qhb"):
        assert np.array_equal(from_csr[name], from_dense[name]), name


@pytest.mark.parametrize("method", ["cholqr2", "scholqr3", "auto"])
def test_sparse_cholesky_family_keeps_q_orthogonal(tmp_path: Path, method: str) -> None:
    """The sparse recipe forms Q from the same X whose Gram gave R, so CholeskyQR2's bound
    holds: ||Q^T Q - I||_F <= 6 (m n u + n (n+1) u) (Fukaya et al., ScalA 2014, CHECKS.md;
    [memory: constant]), ``bounds.cholqr2``; the factorization residual stays a small
    multiple of u (the same bound)."""
    A = near_dependent(M, N, 1e-5, seed=5)
    job = csr_job(
        tmp_path,
        A,
        method={"name": method},
        input={"rows_per_block": 300},
        output={"q": True},
    )
    outcome = run(job)
    bound = bounds.cholqr2(M, N)
    assert outcome.report["method_details"].get("sparse_input") is True
    assert outcome.report["orthogonality_loss"] <= bound
    assert outcome.report["factorization_residual"] <= bound
    Q = read_store(outcome.output)["Q"]
    assert np.linalg.norm(np.eye(N) - Q.T @ Q) <= bound


def test_complex_csr_matches_lapack(tmp_path: Path) -> None:
    """Complex CSR data: R from cholqr2 agrees with LAPACK to the R-factor bound (Sun 1991),
    as in the real case; was a fixed 6 u cond, a bound one CPU's rounding just met."""
    rng = np.random.default_rng(6)
    A = sp.random(600, 6, density=0.3, random_state=6, format="csr", dtype=complex)
    A.data += 1j * rng.standard_normal(A.nnz)
    job = csr_job(tmp_path, A, method={"name": "cholqr2"}, input={"rows_per_block": 100})
    R = read_store(run(job).output)["R"]
    dense = A.toarray()
    error = np.linalg.norm(R - lapack_r(dense)) / np.linalg.norm(dense, 2)
    assert error <= bounds.r_factor(6, np.linalg.cond(dense), dense.dtype)


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_weights_and_rhs_on_csr_match_scipy_on_scaled_rows(tmp_path: Path, method: str) -> None:
    """Weighted least squares on CSR: x and sigma equal LAPACK lstsq on sqrt(w)-scaled rows,
    to the least-squares and residual bounds (``bounds.lstsq_solution``,
    ``bounds.residual_std``)."""
    rng = np.random.default_rng(7)
    A = near_dependent(M, N, 1e-1, seed=7)
    b = rng.standard_normal((M, 2))
    w = rng.uniform(0.2, 5.0, M)
    w[::50] = 0.0
    job = csr_job(tmp_path, A, b, w, method={"name": method}, input={"rows_per_block": 170})
    outcome = run(job)
    got = read_store(outcome.output)
    root = np.sqrt(w)
    scaled, rhs = A.toarray() * root[:, None], b * root[:, None]
    x, res, *_ = scipy.linalg.lstsq(scaled, rhs)
    assert got["x"].shape == (N, 2)
    for j in range(2):
        assert_lstsq_close(scaled, rhs[:, j], got["x"][:, j], x[:, j])
    used = int(np.count_nonzero(w))
    sigma = np.sqrt(res / (used - N))
    limit = bounds.residual_std(N, np.linalg.cond(scaled), np.linalg.norm(rhs) / np.sqrt(res.min()))
    error = np.abs(np.asarray(outcome.report["residual_std"]) - sigma) / sigma
    assert np.all(error <= limit), error


# ------------------------------------------------------------------ broken CSR inputs


def broken(folder: Path, change: str) -> Path:
    """A CSR job on a small matrix with one thing broken (see the cases below)."""
    A = sp.random(400, 5, density=0.4, random_state=8, format="csr")
    job = csr_job(folder, A, input={"rows_per_block": 100})
    with h5py.File(folder / "input.h5", "a") as handle:
        group = handle["model/A"]
        indptr, indices, data = group["indptr"][...], group["indices"][...], group["data"][...]
        replace: dict[str, np.ndarray] = {}
        if change == "decreasing indptr":
            indptr[250] = indptr[252] + 1
            replace["indptr"] = indptr
        elif change == "indptr length":
            replace["indptr"] = indptr[:-1]
        elif change == "index too large":
            indices[indptr[130] + 1] = 5
            replace["indices"] = indices
        elif change == "negative index":
            indices[indptr[310]] = -1
            replace["indices"] = indices
        elif change == "lengths disagree":
            replace["indices"] = indices[:-3]
        elif change == "indptr end":
            indptr[-1] -= 1
            replace["indptr"] = indptr
        elif change == "data dtype":
            replace["data"] = np.array([b"x"] * data.size)
        elif change == "index dtype":
            replace["indices"] = indices.astype(np.float64)
        elif change == "no shape":
            del group.attrs["shape"]
        elif change == "no indices":
            del group["indices"]
        elif change == "nan":
            data[indptr[220]] = np.nan
            replace["data"] = data
        for name, array in replace.items():
            del group[name]
            group[name] = array
    return job


BROKEN = [
    ("decreasing indptr", "row block 2 (rows 200..299): indptr decreases at row 250"),
    ("index too large", "row block 1 (rows 100..199): column index 5 at row 130 is outside 0..4"),
    ("negative index", "row block 3 (rows 300..399): column index -1 at row 310"),
    ("nan", "row block 2 (rows 200..299) holds NaN or Inf, first at row 220"),
    ("indptr length", "indptr: expected m + 1 = 401 entries"),
    ("lengths disagree", "indices has"),
    ("indptr end", "expected to run from 0 to nnz"),
    ("data dtype", "is not numeric"),
    ("index dtype", "cannot be read as column numbers"),
    ("no shape", "no 'shape' attribute"),
    ("no indices", "missing indices"),
]


@pytest.mark.parametrize(("change", "message"), BROKEN, ids=[case for case, _ in BROKEN])
def test_broken_csr_exits_2_naming_the_problem(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], change: str, message: str
) -> None:
    job = broken(tmp_path, change)
    status = main(["--quiet", "run", str(job), "--inline"])
    err = capsys.readouterr().err
    assert status == 2, err
    assert message in err
    assert "input.h5:model/A" in err
    assert not (tmp_path / "out.h5").exists()


@pytest.mark.parametrize(
    "change", ["indptr length", "lengths disagree", "indptr end", "data dtype", "no shape"]
)
def test_check_catches_structural_csr_problems(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], change: str
) -> None:
    """Structural checks run at plan time, so ``rowfold check`` (no compute) finds them."""
    job = broken(tmp_path, change)
    assert main(["check", str(job)]) == 2
    assert "model/A" in capsys.readouterr().err


def test_fixed_column_out_of_range_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = csr_job(tmp_path, sp.eye(20, 4), input={"fixed_columns": [4]})
    assert main(["--quiet", "run", str(job), "--inline"]) == 2
    assert "input.fixed_columns names column 4" in capsys.readouterr().err


# ------------------------------------------------------------------ fixed columns


def levelling(rows: int, benchmarks: int, seed: int) -> tuple[sp.csr_matrix, np.ndarray]:
    """Height differences between random pairs of benchmarks (+1/-1 a row), with noise."""
    rng = np.random.default_rng(seed)
    first = rng.integers(0, benchmarks, rows)
    second = (first + rng.integers(1, benchmarks, rows)) % benchmarks
    A = sp.csr_matrix(
        (np.tile([1.0, -1.0], rows), (np.repeat(np.arange(rows), 2), np.c_[first, second].ravel())),
        shape=(rows, benchmarks),
    )
    heights = rng.normal(0.0, 2.0, benchmarks)
    return A, A @ heights + 0.001 * rng.standard_normal(rows)


def factor_plan(job: Path, method: str) -> tuple[BlockPlan, np.ndarray]:
    """Plan a job and solve it through the method directly (no result store)."""
    plan = runner.plan_job(runner.load_job(job))
    spec = runner.load_job(job).method
    ctx = Context(InlineEngine(), False, storage.ScratchFolder(job.parent))
    fact = get_method(method)(plan, spec, ctx)
    assert fact.qhb is not None
    return plan, solve(fact.R, fact.qhb, None).x[:, 0]


@pytest.mark.parametrize("source", ["csr", "dense"])
@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_fixed_columns_solve_equals_lstsq_without_them(
    tmp_path: Path, source: str, method: str
) -> None:
    """A levelling network has rank n - 1 (heights are defined up to a constant); fixing
    benchmarks 0 and 7 gives a full-rank problem whose x equals LAPACK lstsq on A with those
    columns removed (Björck, Numerical Methods for Least Squares Problems, 1996: a datum)."""
    A, b = levelling(900, 12, seed=9)
    sections: dict[str, Any] = {
        "input": {"rows_per_block": 200, "fixed_columns": [7, 0]},
        "method": {"name": method},
    }
    if source == "csr":
        job = csr_job(tmp_path, A, b, **sections)
    else:
        job = write_job(tmp_path, A.toarray(), b, **sections)
    plan, x = factor_plan(job, method)
    keep = [j for j in range(12) if j not in (0, 7)]
    assert plan.cols == 10 and plan.fixed_columns == (0, 7) and plan.sparse == (source == "csr")
    x_ref, *_ = scipy.linalg.lstsq(A.toarray()[:, keep], b)
    assert np.linalg.matrix_rank(A.toarray()[:, keep]) == 10
    assert_lstsq_close(A.toarray()[:, keep], b, x, x_ref)
    full = expand_columns(plan, x)
    assert full.shape == (12,) and full[0] == 0 and full[7] == 0
    assert np.array_equal(full[keep], x)  # a copy into place, no arithmetic


def test_sparse_and_dense_blocks_agree_with_fixed_columns_and_weights(tmp_path: Path) -> None:
    """load_block densifies the CSR block into the same bits load_sparse_block gives, after
    column selection, scaling and weights. Bit-for-bit is legitimate: no sum is involved,
    only copies and one correctly rounded multiplication by sqrt(w) per value, which IEEE
    754 makes the same on every CPU (and blocks.py promises it)."""
    A, b = levelling(300, 8, seed=10)
    w = np.random.default_rng(10).uniform(0.5, 2.0, 300)
    job = csr_job(tmp_path, A, b, w, input={"rows_per_block": 64, "fixed_columns": [3]})
    plan = runner.plan_job(runner.load_job(job))
    for index in range(plan.blocks):
        dense, rhs = load_block(plan, index)
        block, rhs_sparse = load_sparse_block(plan, index)
        assert dense.flags.f_contiguous and dense.shape[1] == 7
        assert np.array_equal(dense, block.toarray())
        assert rhs is not None and rhs_sparse is not None
        assert np.array_equal(rhs, rhs_sparse)
        start, stop = plan.bounds[index]
        want = A[start:stop][:, [0, 1, 2, 4, 5, 6, 7]].toarray() * np.sqrt(w[start:stop])[:, None]
        assert np.array_equal(dense, want)


def test_fixed_columns_are_reported_as_zero_in_the_store(tmp_path: Path) -> None:
    A, b = levelling(600, 9, seed=11)
    job = csr_job(tmp_path, A, b, input={"fixed_columns": [4]}, method={"name": "cholqr2"})
    outcome = run(job)
    got = read_store(outcome.output)
    assert got["x"].shape == (9,) and got["x"][4] == 0 and got["x_stderr"][4] == 0
    assert got["R"].shape == (9, 9) and not got["R"][4].any() and not got["R"][:, 4].any()
    keep = [j for j in range(9) if j != 4]
    x_ref, *_ = scipy.linalg.lstsq(A.toarray()[:, keep], b)
    assert_lstsq_close(A.toarray()[:, keep], b, got["x"][keep], x_ref)
    assert outcome.report["fixed_columns"]["columns"] == [4]


# ------------------------------------------------------------------ memory and the demo


def traced_peak(job: Path) -> int:
    tracemalloc.start()
    try:
        run(job)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_peak_memory_tracks_the_block_not_the_matrix(tmp_path: Path, method: str) -> None:
    """Peak traced memory of an in-line run does not grow with m at a fixed block size:
    4x the rows costs less than 1.5x the peak, the growth is a small fraction of the dense
    rows added, and the peak stays below the dense A. (Imports are paid by a first,
    untraced run.)"""
    jobs = []
    for rows in (10_000, 40_000):
        folder = tmp_path / str(rows)
        folder.mkdir()
        A, b = levelling(rows, 40, seed=12)
        sections: dict[str, Any] = {
            "input": {"rows_per_block": 2000, "fixed_columns": [0]},
            "method": {"name": method},
        }
        jobs.append(csr_job(folder, A, b, **sections))
    run(jobs[0])
    small, large = (traced_peak(job) for job in jobs)
    added_dense_rows = 30_000 * 40 * 8
    assert large < 1.5 * small, (small, large)
    assert large - small < 0.15 * added_dense_rows, (small, large)
    assert large < 40_000 * 40 * 8 / 2, (small, large)


def test_levelling_demo_recovers_its_true_heights(tmp_path: Path) -> None:
    """The sparse demo's data were drawn from known heights; cholqr2 with the datum fixed must
    recover them within a few standard errors, with the residual SD the noise per root km
    (weights 1/d make the weighted noise N(0, sigma^2))."""
    jobs = demo.write_scenario(tmp_path, rows=15_000)
    (levelling,) = [p for p in jobs if p.name == "levelling_cholqr2.yaml"]
    outcome = runner.run_job(runner.load_job(levelling), inline=True)
    assert outcome.status == 0
    with h5py.File(outcome.output, "r") as store:
        x, stderr = store["x"][...], store["x_stderr"][...]
    kept = demo.BENCHMARKS - 1
    # The datum is column 0: x holds the kept columns last, whether or not the store
    # re-inserts the fixed column in front.
    x, stderr = x[-kept:], stderr[-kept:]
    z = np.abs(x - demo.true_heights()[1:]) / stderr
    assert np.max(z) < 5.0
    sigma = demo.NOISE_M_PER_ROOT_KM
    assert abs(outcome.report["residual_std"] - sigma) < 0.1 * sigma
    # The job's a priori sd of unit weight is the noise it was drawn with, so the global
    # chi-square test of the variance factor sees a ratio s0^2 / sigma0^2 near 1.
    model = outcome.report["model_test"]
    assert model["sigma0"] == sigma
    assert model["lower"] <= model["statistic"] <= model["upper"]


def test_update_folds_rows_appended_to_a_csr_input(tmp_path: Path) -> None:
    """update on a CSR input (rows appended by rewriting the group) equals a full run to
    the least-squares bound (two backward-stable factorizations with different trees)."""
    import scipy.sparse as sp_

    from rowfold import runner
    from rowfold.storage import read_result, write_csr

    rng = np.random.default_rng(71)
    full = sp_.random(1200, 12, density=0.3, random_state=71, format="csr") + sp_.eye(1200, 12)
    b = rng.standard_normal(1200)
    path = tmp_path / "net.h5"
    write_csr(path, "A", full[:1000].tocsr(), {"b": b[:1000]})
    job = tmp_path / "job.yaml"
    job.write_text(
        "input: {path: net.h5, matrix: A, rhs: b, rows_per_block: 300}\n"
        "output: {path: out.h5, overwrite: true}\n"
    )
    runner.run_job(runner.load_job(job), inline=True)
    write_csr(path, "A", full.tocsr(), {"b": b})
    runner.update_job(runner.load_job(job), inline=True)
    updated = read_result(tmp_path / "out.h5")
    runner.run_job(runner.load_job(job), inline=True)
    fresh = read_result(tmp_path / "out.h5")
    assert_lstsq_close(full.toarray(), b, updated["x"], fresh["x"])


@pytest.mark.parametrize("complex_", [False, True])
@pytest.mark.parametrize("bands", [1, 3, 16])
def test_banded_gram_equals_the_gram_of_the_full_product(
    complex_: bool, bands: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Reference: numpy's dense ``X^H X`` and ``X^H b`` of X formed here with an explicit
    inverse of F2. The band split only skips exact zeros, so the Gram differs by the
    rounding of two computations of the same inner products (``bounds.inner_products``,
    Higham 2002 eq. 3.13) plus what the two ways of forming X differ by (substitution
    against an explicit inverse: ``bounds.triangular_solve``; the sparse products:
    ``bounds.inner_products``)."""
    monkeypatch.setattr(sparse_kernels, "GRAM_BANDS", bands)
    rng = np.random.default_rng(bands)
    A = sp.random(500, 12, density=0.15, random_state=bands, format="csr")
    A = A + 1j * A if complex_ else A
    A = sparse_kernels.canonical(sp.csr_matrix(A))  # some rows have no stored value
    assert (np.diff(A.indptr) == 0).any()
    b = rng.standard_normal((500, 2))
    F1, F2 = (np.triu(rng.standard_normal((12, 12))) + 6 * np.eye(12) for _ in range(2))
    inverse = np.linalg.inv(F1)
    X = (A @ inverse) @ np.linalg.inv(F2)
    gram, cross = sparse_kernels.banded_gram(A, b, inverse, (F2,))
    dtype = A.dtype
    x_norm = np.linalg.norm(X)
    product = 2 * bounds.inner_products(12, dtype) * np.linalg.norm(A.toarray())
    product *= np.linalg.norm(inverse) * np.linalg.norm(np.linalg.inv(F2), 2)
    x_error = bounds.triangular_solve(12, np.linalg.cond(F2)) * x_norm + product
    rounding = 2 * bounds.inner_products(500, dtype)
    limit = 2 * x_norm * x_error + x_error**2 + rounding * x_norm**2
    assert np.linalg.norm(gram - X.conj().T @ X) <= limit
    assert cross is not None
    limit = (x_error + rounding * x_norm) * np.linalg.norm(b)
    assert np.linalg.norm(cross - X.conj().T @ b) <= limit
    empty_gram, empty_cross = sparse_kernels.banded_gram(A[:0], None, inverse)
    assert not empty_gram.any() and empty_cross is None
