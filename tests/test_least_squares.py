"""Least squares a survey or calibration team can defend: weights, statistics, rank,
residual screening and refinement, checked against outside references.

References: NIST StRD certified values (tests/data/nist-strd); scipy/numpy LAPACK least
squares on sqrt(w)-scaled rows; numpy's pseudo-inverse for rank-deficient problems; the
hat-matrix diagonal H = A A^+ for leverages (any regression text, e.g. Belsley, Kuh &
Welsch, Regression Diagnostics, 1980), and (A^H A)^-1 = V S^-2 V^H, both from numpy's SVD
(backward stable, unlike forming A^H A). Every comparison is held to a bound of
tests/bounds.py computed from the matrix's own condition number (numpy SVD) and u.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.linalg

from rowfold import runner, storage
from rowfold.errors import InputError

import bounds
from nist_strd import DATASET_NAMES, floors, lre, refined_floors
from nist_strd import load_dataset as load_nist
from support import prescribed, write_job

# Unit roundoff of the extended precision rowfold's refinement computes residuals in
# (numpy.longdouble: 2^-64 on x86-64 Linux, 2^-113 on aarch64 Linux, u itself where it is
# plain float64).
EXTENDED_ROUNDOFF = float(np.finfo(np.longdouble).eps) / 2
REFINE_ITERATIONS = 10  # SPEC.md / spec.py default of solve.refine_iterations


def run(job: Path) -> runner.RunOutcome:
    return runner.run_job(runner.load_job(job), inline=True)


def stored(outcome: runner.RunOutcome) -> dict[str, np.ndarray]:
    with h5py.File(outcome.output, "r") as handle:
        return {
            name: handle[name][...] for name in handle if isinstance(handle[name], h5py.Dataset)
        }


def weighted_job(folder: Path, A: np.ndarray, b: np.ndarray, w: np.ndarray, **sections) -> Path:
    job = write_job(folder, A, b, **sections)
    with h5py.File(folder / "input.h5", "a") as handle:
        handle["model/w"] = w
    text = job.read_text().replace("matrix: model/A", "matrix: model/A\n  weights: model/w")
    job.write_text(text)
    return job


def condition(A: np.ndarray) -> float:
    """2-norm condition number (numpy SVD)."""
    return float(np.linalg.cond(A))


def residual_ratio(A: np.ndarray, b: np.ndarray, x: np.ndarray) -> float:
    """||r|| / (||A|| ||x||), the residual term of the least-squares perturbation bound."""
    r = b - A @ x
    return float(np.linalg.norm(r) / (np.linalg.norm(A, 2) * np.linalg.norm(x)))


def rhs_over_residual(A: np.ndarray, b: np.ndarray, x: np.ndarray) -> float:
    """||b|| / ||r||, the amplification of the residual SD's relative error."""
    return float(np.linalg.norm(b) / np.linalg.norm(b - A @ x))


def svd_inverse_gram(A: np.ndarray) -> np.ndarray:
    """(A^H A)^-1 = V S^-2 V^H from numpy's SVD of A (backward stable)."""
    _, s, vh = np.linalg.svd(A, full_matrices=False)
    return (vh.conj().T / s**2) @ vh


@pytest.mark.parametrize("name", DATASET_NAMES)
def test_refinement_meets_its_floors_on_nist(job_folder: Path, name: str) -> None:
    """NIST StRD: each refined coefficient meets the floor of refinement with residuals in
    numpy.longdouble (nist_strd.refined_floors): the limiting accuracy of the residual
    precision plus the binary data's own rounding. Refinement stops by its own rule
    (converged, or no longer shrinking) before the iteration cap."""
    case = load_nist(name)
    assert floors(case).coefficients.min() > 0, "the plain solve must contract"
    job = write_job(job_folder, case.X, case.y, solve={"refine": True})
    outcome = run(job)
    x = stored(outcome)["x"]
    floor = refined_floors(case, EXTENDED_ROUNDOFF)
    assert floor.min() > 0, f"bound too loose to test anything: {floor}"
    scores = np.array([lre(a, c) for a, c in zip(x, case.certified_estimates, strict=True)])
    assert np.all(scores >= floor), list(zip(scores.round(2), floor.round(2), strict=True))
    refinement = outcome.report["refinement"]
    assert 1 <= refinement["iterations"] < REFINE_ITERATIONS


def test_weighted_matches_scipy_on_scaled_rows(job_folder: Path) -> None:
    rng = np.random.default_rng(31)
    A = prescribed(600, 7, 1e3, seed=31)
    b = rng.standard_normal(600)
    w = rng.uniform(0.2, 5.0, 600)
    job = weighted_job(job_folder, A, b, w, input={"rows_per_block": 90})
    outcome = run(job)
    got = stored(outcome)
    root = np.sqrt(w)
    Aw, bw = A * root[:, None], b * root
    x, res, _, _ = scipy.linalg.lstsq(Aw, bw)
    kappa, amplification = condition(Aw), rhs_over_residual(Aw, bw, x)
    limit = bounds.lstsq_solution(7, kappa, residual_ratio(Aw, bw, x))
    assert bounds.relative_error(got["x"], x) <= limit
    sigma = np.sqrt(res / (600 - 7))
    sd_error = abs(outcome.report["residual_std"] - sigma) / sigma
    assert sd_error <= bounds.residual_std(7, kappa, amplification)
    stderr = sigma * np.sqrt(np.diag(svd_inverse_gram(Aw)))
    stderr_error = np.max(np.abs(got["x_stderr"] - stderr) / stderr)
    assert stderr_error <= bounds.standard_errors(7, kappa, amplification)


def test_zero_weights_drop_rows_and_degrees_of_freedom(job_folder: Path) -> None:
    rng = np.random.default_rng(32)
    A = rng.standard_normal((300, 4))
    b = rng.standard_normal(300)
    w = np.ones(300)
    w[::3] = 0.0
    outcome = run(weighted_job(job_folder, A, b, w))
    keep = w > 0
    x, res, _, _ = scipy.linalg.lstsq(A[keep], b[keep])
    kappa = condition(A[keep])
    limit = bounds.lstsq_solution(4, kappa, residual_ratio(A[keep], b[keep], x))
    assert bounds.relative_error(stored(outcome)["x"], x) <= limit
    assert outcome.report["degrees_of_freedom"] == int(keep.sum()) - 4
    sigma = np.sqrt(res / (keep.sum() - 4))
    sd_error = abs(outcome.report["residual_std"] - sigma) / sigma
    assert sd_error <= bounds.residual_std(4, kappa, rhs_over_residual(A[keep], b[keep], x))


@pytest.mark.parametrize(
    ("bad", "message"),
    [(-1.0, "row 17"), (np.nan, "row 17")],
    ids=["negative", "nan"],
)
def test_bad_weight_names_the_row(job_folder: Path, bad: float, message: str) -> None:
    A = np.random.default_rng(33).standard_normal((100, 3))
    w = np.ones(100)
    w[17] = bad
    job = weighted_job(job_folder, A, A[:, 0], w, input={"rows_per_block": 10})
    with pytest.raises(InputError, match=message):
        run(job)
    assert not (job_folder / "out.h5").exists()


def test_weights_of_wrong_length_are_refused(job_folder: Path) -> None:
    A = np.random.default_rng(34).standard_normal((100, 3))
    job = weighted_job(job_folder, A, A[:, 0], np.ones(99))
    with pytest.raises(InputError, match="expected 100 weights"):
        run(job)


def test_covariance_is_sigma2_times_inverse_normal_matrix(job_folder: Path) -> None:
    rng = np.random.default_rng(35)
    A = prescribed(400, 5, 1e2, seed=35)
    B = rng.standard_normal((400, 2))
    outcome = run(write_job(job_folder, A, B, solve={"covariance": True}))
    got = stored(outcome)
    assert got["x_covariance"].shape == (2, 5, 5)
    inverse = svd_inverse_gram(A)
    # x_stderr and the covariance's diagonal are one quantity, sigma sqrt(sum_k |w_jk|^2),
    # summed by two codes: n non-negative terms, relative error gamma_n each (Higham 2002,
    # eq. 3.5), and at most six more correctly rounded operations on each side.
    same = 2 * bounds.inner_products(5) + bounds.elementwise(6)
    for j, sigma in enumerate(outcome.report["residual_std"]):
        expected = sigma**2 * inverse
        error = np.linalg.norm(got["x_covariance"][j] - expected, 2) / np.linalg.norm(expected, 2)
        assert error <= bounds.inverse_gram(5, 1e2)
        root = np.sqrt(np.diag(got["x_covariance"][j]))
        assert np.max(np.abs(root - got["x_stderr"][:, j]) / got["x_stderr"][:, j]) <= same


def levelling_network(benchmarks: int, rng: np.random.Generator) -> np.ndarray:
    """Height differences between random pairs of benchmarks: one +1 and one -1 per row."""
    rows = 6 * benchmarks
    A = np.zeros((rows, benchmarks))
    pairs = np.array([rng.choice(benchmarks, 2, replace=False) for _ in range(rows)])
    A[np.arange(rows), pairs[:, 0]] = 1.0
    A[np.arange(rows), pairs[:, 1]] = -1.0
    return A


def test_levelling_network_without_datum_is_rank_n_minus_1(job_folder: Path) -> None:
    """No fixed height: the datum defect makes the rank n - 1; x is the minimum-norm
    solution in the scaled variables D x (D: the power of two nearest each column norm,
    the README's rule), i.e. numpy's pseudo-inverse solution of A D^-1, unscaled. The height
    differences, which no datum changes, equal those of the plain pseudo-inverse solution."""
    rng = np.random.default_rng(36)
    A = levelling_network(12, rng)
    heights = rng.uniform(10, 60, 12)
    b = A @ heights + 0.002 * rng.standard_normal(A.shape[0])
    outcome = run(write_job(job_folder, A, b, input={"rows_per_block": 20}))
    assert outcome.report["rank"] == 11
    assert sorted(outcome.report["rank_deficient_columns"]) == list(range(12))
    assert any("rank deficient" in w for w in outcome.report["warnings"])
    # Rank-deficient least squares is well posed for perturbations that keep the rank; its
    # condition is then sigma_1 / sigma_r (Wedin, BIT 13, 1973; Björck 1996, sec. 1.4.3,
    # from memory), the number lstsq_solution takes. x is the minimum-norm solution in the
    # scaled variables D x (D: powers of two nearest the column norms; README, "Rank").
    d = 2.0 ** np.round(np.log2(np.linalg.norm(A, axis=0)))
    s = np.linalg.svd(A / d, compute_uv=False)
    kappa = float(s[0] / s[10])
    expected = (np.linalg.pinv(A / d) @ b) / d
    x = stored(outcome)["x"]
    limit = bounds.lstsq_solution(12, kappa, residual_ratio(A, b, expected))
    assert bounds.relative_error(x * d, expected * d) <= limit
    # Height differences do not depend on the datum: they match the plain pseudo-inverse's.
    plain = np.linalg.pinv(A) @ b
    assert bounds.relative_error(x - x[0], plain - plain[0]) <= limit


def test_leverages_and_standardized_residuals(job_folder: Path) -> None:
    """Leverages equal the hat-matrix diagonal; one planted gross error is flagged alone."""
    rng = np.random.default_rng(37)
    A = np.column_stack([np.ones(500), rng.uniform(0, 10, (500, 3))])
    b = A @ np.array([2.0, 0.5, -1.0, 0.25]) + 0.01 * rng.standard_normal(500)
    b[123] += 0.2  # a 20-sigma blunder
    outcome = run(
        write_job(job_folder, A, b, input={"rows_per_block": 64}, solve={"residuals": True})
    )
    got = stored(outcome)
    kappa = condition(A)
    hat = np.sum(np.linalg.svd(A, full_matrices=False)[0] ** 2, axis=1)  # ||e_i^T U||^2
    assert np.max(np.abs(got["leverage"] - hat)) <= bounds.projector(4, kappa)
    x = scipy.linalg.lstsq(A, b)[0]
    r_error = np.linalg.norm(got["residuals"] - (b - A @ x)) / np.linalg.norm(b)
    assert r_error <= bounds.residual_vector(4, kappa)
    # The standardized residuals are formed from the stored residuals and leverages: the
    # same four correctly rounded operations (1 - h, sqrt, product, quotient) per entry.
    sigma = outcome.report["residual_std"]
    expected = got["residuals"] / (sigma * np.sqrt(1 - got["leverage"]))
    error = np.abs(got["standardized_residuals"] - expected) / np.abs(expected)
    assert np.max(error) <= bounds.elementwise(4)
    screening = outcome.report["residual_screening"]
    assert screening["flagged"] == 1
    assert screening["worst"][0]["row"] == 123
    assert len(screening["worst"]) == 20


def test_column_scaling_reports_both_conditions_and_keeps_x(job_folder: Path) -> None:
    rng = np.random.default_rng(38)
    A = prescribed(300, 4, 10.0, seed=38) * np.array([1e-6, 1.0, 1e4, 1e8])
    b = rng.standard_normal(300)
    outcome = run(write_job(job_folder, A, b, solve={"scale_columns": True}))
    scaling = outcome.report["column_scaling"]
    assert scaling["r_condition_unscaled"] > 1e12
    assert scaling["r_condition_equilibrated"] < 100
    # Reference: LAPACK on the equilibrated columns (the unscaled LAPACK solve itself is only
    # good to kappa u ~ 0.1 here), mapped back.
    # Compared in the equilibrated unknowns z = D x, where the bound's condition is that of
    # A D^-1 (a few units), not that of A.
    norms = np.linalg.norm(A, axis=0)
    scaled = A / norms
    z = scipy.linalg.lstsq(scaled, b)[0]
    limit = bounds.lstsq_solution(4, condition(scaled), residual_ratio(scaled, b, z))
    assert bounds.relative_error(stored(outcome)["x"] * norms, z) <= limit
    # R^T R = A^T A column-scaled (bounds.gram_residual holds for D^-1 (R^T R - A^T A) D^-1).
    R = storage.read_result(outcome.output)["R"]
    gram_error = np.linalg.norm((R.T @ R - A.T @ A) / np.outer(norms, norms))
    assert gram_error <= bounds.gram_residual(300, 4) * np.linalg.norm(scaled) ** 2
