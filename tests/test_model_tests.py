"""The statistics of an adjustment, under their trade names, each checked against a
published value, a textbook formula or an independent dense computation.

What is checked, and against what (the source is named again beside each check):

- critical values: published tables (chi-square, Student's t, standard normal) and, for
  Pope's tau, the Beta form of the tau distribution (Thompson 1935);
- the tests' exact null distributions: seeded simulations whose rejection rates must lie
  in the binomial band around alpha;
- the a posteriori variance factor and the degrees of freedom: NIST StRD's certified
  analysis-of-variance tables;
- redundancy numbers: the closed-form leverage of simple linear regression (NIST Norris
  data), the single levelling loop (r_i = d_i / D), and the hat matrix from
  numpy.linalg.pinv; their sum f to a bound in units of u (tests/bounds.py);
- w, tau and externally studentized residuals: dense numpy, and explicit leave-one-out
  refits for the last.

Values recalled from memory are marked so; each was checked against scipy.stats here.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
from scipy import stats

from rowfold import model_tests, quality, runner
from rowfold.errors import RunError

import bounds
from nist_strd import load_dataset, lre, residual_anova
from support import write_job

# ---------------------------------------------------------------- helpers


def run(job: Path, *overrides: str) -> runner.RunOutcome:
    return runner.run_job(runner.load_job(job, overrides), inline=True)


def rows_of(outcome: runner.RunOutcome, *names: str) -> dict[str, np.ndarray]:
    with h5py.File(outcome.output, "r") as handle:
        return {name: handle[name][...] for name in names}


def weighted_job(
    folder: Path, A: np.ndarray, b: np.ndarray, w: np.ndarray, **sections: dict[str, Any]
) -> Path:
    """A job over A, b and per-row weights w (``input.weights``)."""
    job = write_job(folder, A, b, **sections)
    with h5py.File(folder / "input.h5", "a") as handle:
        handle["model/w"] = w
    text = job.read_text().replace("matrix: model/A", "matrix: model/A\n  weights: model/w")
    job.write_text(text)
    return job


def levelling_design(lines: list[tuple[int, int, float]], benchmarks: int) -> np.ndarray:
    """One row per levelled line (from, to, km): -1 at ``from``, +1 at ``to``."""
    A = np.zeros((len(lines), benchmarks))
    for row, (start, end, _) in enumerate(lines):
        A[row, start], A[row, end] = -1.0, 1.0
    return A


def hat_diagonal(Aw: np.ndarray) -> np.ndarray:
    """diag(A A^+) from numpy's pseudo-inverse (an independent dense reference)."""
    return np.einsum("ij,ji->i", Aw, np.linalg.pinv(Aw))


def condition(Aw: np.ndarray) -> float:
    sv = np.linalg.svd(Aw, compute_uv=False)
    rank = int(np.sum(sv > sv[0] * 1e-12))
    return float(sv[0] / sv[rank - 1])


def statistic_bound(
    z_ref: np.ndarray, r_ref: np.ndarray, scale: float, de: float, dr: float, dscale: float = 0.0
) -> np.ndarray:
    """First-order bound on |z - z_ref| for z = e / (scale sqrt(r)), from perturbations
    ``|de|`` of the residuals, ``|dr|`` of the redundancy numbers and ``dscale`` of the
    scale, differentiated term by term (the same construction as test_numerics)."""
    root = np.sqrt(r_ref)
    return de / (scale * root) + np.abs(z_ref) * (dr / (2 * r_ref) + dscale / scale)


# Table values (from memory; each checked against scipy.stats below), as found in any table
# of the distributions, e.g. NIST/SEMATECH e-Handbook of Statistical Methods, section
# 1.3.6.7 ("Tables for probability distributions"), or Abramowitz & Stegun, Handbook of
# Mathematical Functions, 1964, ch. 26. Three decimals; rounding leaves at most 5e-4.
CHI2_TABLE = {  # f: (chi2_{0.025}(f), chi2_{0.975}(f))
    5: (0.831, 12.833),
    10: (3.247, 20.483),
    30: (16.791, 46.979),
}
T_TABLE = {(0.05, 10): 2.228, (0.01, 10): 3.169, (0.05, 5): 2.571, (0.05, 30): 2.042}
NORMAL_TABLE = {0.05: 1.960, 0.01: 2.576}
TABLE_ROUNDING = 5e-4
# Baarda's critical value for alpha0 = 0.001 is quoted as 3.29 (two decimals) throughout
# survey practice (Baarda 1968; common practice, from memory).
BAARDA_CRITICAL = 3.29


# ---------------------------------------------------------------- 1. critical values


@pytest.mark.parametrize("dof", sorted(CHI2_TABLE))
def test_chi_square_bounds_are_the_published_table_values(dof: int) -> None:
    """Two-sided bounds at alpha = 0.05: chi2_{0.025}(f) and chi2_{0.975}(f), table above."""
    lower, upper = model_tests.chi_square_bounds(dof, 0.05)
    table_lower, table_upper = CHI2_TABLE[dof]
    assert abs(lower - table_lower) <= TABLE_ROUNDING
    assert abs(upper - table_upper) <= TABLE_ROUNDING


@pytest.mark.parametrize(("alpha", "dof"), sorted(T_TABLE))
def test_student_critical_values_are_the_published_table_values(alpha: float, dof: int) -> None:
    assert abs(model_tests.student_critical(alpha, dof) - T_TABLE[(alpha, dof)]) <= TABLE_ROUNDING


def test_normal_critical_values_are_the_published_ones() -> None:
    """1.960 and 2.576 (table above); 3.29 for Baarda's alpha0 = 0.001 (two decimals)."""
    for alpha, value in NORMAL_TABLE.items():
        assert abs(model_tests.normal_critical(alpha) - value) <= TABLE_ROUNDING
    assert abs(model_tests.normal_critical(0.001) - BAARDA_CRITICAL) <= 0.005


@pytest.mark.parametrize("dof", [2, 3, 10, 50, 1000])
@pytest.mark.parametrize("alpha", [0.05, 0.001])
def test_tau_critical_value_agrees_with_the_beta_form_of_the_tau_distribution(
    dof: int, alpha: float
) -> None:
    """Pope's tau quantile from Student's t (Pope 1976) against an independent route: for
    tau with f degrees of freedom, tau^2 / f is Beta(1/2, (f - 1)/2) (Thompson, Ann. Math.
    Statist. 6(4), 1935), so P(|tau| > c) = alpha gives c^2 = f beta.isf(alpha, ...). Two
    different special functions of scipy; they agree to 1e-9 relative (common practice for
    inverse incomplete beta and t functions, which are accurate to about 1e-13)."""
    tau = model_tests.tau_critical(alpha, dof)
    beta = np.sqrt(dof * stats.beta.isf(alpha, 0.5, (dof - 1) / 2))
    assert abs(tau - beta) <= 1e-9 * beta
    assert tau < np.sqrt(dof)  # |tau| <= sqrt(f) always (Pope 1976)


def test_tau_critical_value_tends_to_the_normal_one() -> None:
    """For large f the tau distribution tends to N(0, 1) (Pope 1976): the difference shrinks
    like 1/f."""
    z = model_tests.normal_critical(0.001)
    gaps = [abs(model_tests.tau_critical(0.001, f) - z) for f in (100, 1000, 10000)]
    assert gaps[0] > gaps[1] > gaps[2]
    assert gaps[2] <= 10 * z**3 / 10000  # first-order term of the expansion, generous


# ---------------------------------------------------------------- 2. the null distributions


def simulated_residuals(replications: int, seed: int) -> tuple[np.ndarray, np.ndarray, int, float]:
    """Weighted residuals e = (I - H) sqrt(w) eps of a fixed 14 x 3 weighted regression, one
    column per replication, eps_i ~ N(0, sigma0^2 / w_i); with the exact redundancy
    numbers, f and sigma0."""
    rng = np.random.default_rng(seed)
    m, n, sigma0 = 14, 3, 0.5
    A = np.column_stack([np.ones(m), rng.uniform(-2, 2, (m, n - 1))])
    w = rng.uniform(0.3, 3.0, m)
    Aw = np.sqrt(w)[:, None] * A
    hat = Aw @ np.linalg.pinv(Aw)
    eps = rng.standard_normal((m, replications)) * sigma0  # sqrt(w) eps ~ N(0, sigma0^2)
    e = (np.eye(m) - hat) @ eps
    return e, 1.0 - np.diagonal(hat), m - n, sigma0


def binomial_band(alpha: float, draws: int) -> float:
    """4.5 standard deviations of a rejection rate under H0 (binomial; a seeded simulation
    leaves this band with probability about 7e-6 per rate)."""
    return 4.5 * np.sqrt(alpha * (1 - alpha) / draws)


def test_each_test_rejects_a_fraction_alpha_under_the_null_hypothesis() -> None:
    """With normal errors of the stated sigma_i: the global test rejects alpha (alpha/2 in
    each tail, two-sided), and every observation's w-test (standard normal), tau test (tau
    distribution) and test on the externally studentized residual (Student's t, f - 1)
    reject alpha0 of the replications."""
    draws = 40_000
    e, redundancy, dof, sigma0 = simulated_residuals(draws, seed=61)
    alpha = 0.05
    model = model_tests.global_test(np.linalg.norm(e, axis=0), dof, sigma0, alpha)
    band = binomial_band(alpha, draws)
    assert abs(np.mean(~model.passed) - alpha) <= band
    assert abs(np.mean(model.statistic < model.lower) - alpha / 2) <= binomial_band(0.025, draws)
    assert abs(np.mean(model.statistic > model.upper) - alpha / 2) <= binomial_band(0.025, draws)
    assert abs(np.mean(model.p_value < alpha) - alpha) <= band
    s0 = np.linalg.norm(e, axis=0) / np.sqrt(dof)
    # the model_tests functions take rows x k; here k = the replications
    w = model_tests.standardized(e, redundancy, np.full(draws, sigma0), 0.0)
    tau = model_tests.standardized(e, redundancy, s0, 0.0)
    t = model_tests.externally_studentized(tau, dof)
    w_rate = np.mean(np.abs(w) > model_tests.normal_critical(alpha), axis=1)
    tau_rate = np.mean(np.abs(tau) > model_tests.tau_critical(alpha, dof), axis=1)
    t_rate = np.mean(np.abs(t) > model_tests.student_critical(alpha, dof - 1), axis=1)
    for rates in (w_rate, tau_rate, t_rate):
        assert np.all(np.abs(rates - alpha) <= band), rates


def test_tau_and_leave_one_out_tests_flag_the_same_observations() -> None:
    """t_i is a monotone function of tau_i (Cook & Weisberg 1982), so at the same alpha0
    both tests flag the same rows; only values within rounding of the critical value could
    differ."""
    e, redundancy, dof, _ = simulated_residuals(5_000, seed=62)
    s0 = np.linalg.norm(e, axis=0) / np.sqrt(dof)
    tau = model_tests.standardized(e, redundancy, s0, 0.0)
    t = model_tests.externally_studentized(tau, dof)
    c_tau = model_tests.tau_critical(0.05, dof)
    c_t = model_tests.student_critical(0.05, dof - 1)
    differ = (np.abs(tau) > c_tau) != (np.abs(t) > c_t)
    near = np.abs(np.abs(tau) - c_tau) <= 1e3 * bounds.unit_roundoff() * c_tau
    assert np.all(near[differ])
    assert np.count_nonzero(np.abs(tau) > c_tau) > 100  # the comparison is not vacuous


# ---------------------------------------------------------------- 3. NIST StRD


NIST_CASES = ["Norris", "Pontius", "NoInt1", "NoInt2", "Longley"]
# The certified residual SD needs 7 correct digits (tests/test_nist_strd.py); the relative
# error of a square is twice that of its root, so its LRE may be log10(2) lower.
VARIANCE_LRE_FLOOR = 7.0 - np.log10(2.0)


@pytest.mark.parametrize("name", NIST_CASES)
def test_variance_factor_and_degrees_of_freedom_match_nist_certified_anova(
    job_folder: Path, name: str
) -> None:
    """NIST StRD certified analysis of variance: the residual degrees of freedom are f, the
    residual mean square is the a posteriori variance factor s0^2 (unit weights), and with
    sigma0 = 1 the global statistic T is the certified residual sum of squares."""
    case, anova = load_dataset(name), residual_anova(name)
    outcome = run(write_job(job_folder, case.X, case.y))
    model = outcome.report["model_test"]
    assert model["degrees_of_freedom"] == anova.degrees_of_freedom
    assert outcome.report["degrees_of_freedom"] == anova.degrees_of_freedom
    assert lre(model["variance_factor"], anova.mean_square) >= VARIANCE_LRE_FLOOR
    assert lre(model["statistic"], anova.sum_of_squares) >= VARIANCE_LRE_FLOOR


@pytest.mark.parametrize("name", ["Norris", "Longley"])
def test_global_test_passes_at_the_certified_sigma_and_fails_at_half_of_it(
    job_folder: Path, name: str
) -> None:
    """With sigma0 = NIST's certified residual SD, T = f exactly in theory (the variance
    factor ratio is 1), inside the chi-square bounds; with half of it T = 4 f, beyond the
    upper bound (the table values checked above). Neither changes the exit status."""
    case, anova = load_dataset(name), residual_anova(name)
    f = anova.degrees_of_freedom
    job = write_job(job_folder, case.X, case.y)
    right = run(job, f"solve.sigma0={case.certified_residual_sd!r}")
    model = right.report["model_test"]
    assert lre(model["statistic"], float(f)) >= VARIANCE_LRE_FLOOR
    assert model["passed"] is True and right.status == 0
    assert model["lower"] < f < model["upper"]
    low = run(job, f"solve.sigma0={case.certified_residual_sd / 2!r}")
    model = low.report["model_test"]
    assert model["statistic"] > model["upper"] and model["passed"] is False
    assert model["p_value"] < 0.05
    assert low.status == 0  # a statistical finding, not a failure


def test_redundancy_numbers_of_simple_regression_follow_the_closed_form(
    job_folder: Path,
) -> None:
    """Simple linear regression y = b0 + b1 x: h_i = 1/m + (x_i - mean)^2 / Sxx (any
    regression text, e.g. Belsley, Kuh & Welsch, Regression Diagnostics, 1980; Montgomery,
    Peck & Vining, Introduction to Linear Regression Analysis, 5th ed. 2012 -- from memory),
    so r_i = 1 - h_i, here on NIST's Norris data; the r_i sum to f = m - 2."""
    case = load_dataset("Norris")
    m = case.n_obs
    outcome = run(
        write_job(
            job_folder, case.X, case.y, input={"rows_per_block": 8}, solve={"residuals": True}
        )
    )
    redundancy = rows_of(outcome, "redundancy")["redundancy"]
    x = case.X[:, 1]
    closed = 1.0 - (1.0 / m + (x - x.mean()) ** 2 / np.sum((x - x.mean()) ** 2))
    kappa = condition(case.X)
    # the leverage bound (sin-theta) plus the rounding of the closed form (a few u)
    limit = bounds.projector(2, kappa) + bounds.SAFETY * 8 * bounds.unit_roundoff()
    assert np.max(np.abs(redundancy - closed)) <= limit
    total = outcome.report["redundancy"]["total"]
    assert abs(total - (m - 2)) <= bounds.redundancy_total(m, 2, 2, m - 2, 8)


# ---------------------------------------------------------------- 4. levelling networks


LOOP_KM = np.array([1.2, 0.7, 2.3, 1.6, 0.9])


def loop_job(folder: Path, misclosure: float, sigma0: float) -> tuple[Path, np.ndarray]:
    """A single levelling loop 0 -> 1 -> 2 -> 3 -> 4 -> 0 (``LOOP_KM`` per line), benchmark
    0 fixed, weights 1/km, the observed differences closing with ``misclosure`` (m).
    Returns the job and the weighted design of the four free benchmarks."""
    A = levelling_design([(k, (k + 1) % 5, d) for k, d in enumerate(LOOP_KM)], 5)
    b = A @ np.array([0.0, 12.41, 15.07, 9.88, 4.52])
    b[2] += misclosure
    job = weighted_job(
        folder,
        A,
        b,
        1.0 / LOOP_KM,
        input={"fixed_columns": [0], "rows_per_block": 2},
        solve={"residuals": True, "sigma0": sigma0, "observation_test": "known_sigma0"},
    )
    return job, np.sqrt(1.0 / LOOP_KM)[:, None] * A[:, 1:], np.sqrt(1.0 / LOOP_KM) * b


def test_single_levelling_loop_redundancy_is_length_over_loop_length(job_folder: Path) -> None:
    """The classical single loop with weights 1/d_i (Baarda 1968; the levelling chapters of
    survey texts, e.g. Ghilani, Adjustment Computations, 6th ed. 2017 -- from memory): the
    misclosure phi is distributed in proportion to length, so r_i = d_i / D (f = 1), every
    |w_i| = phi / (sigma0 sqrt(D)) (the misclosure test), and T = w^2. Pope's tau needs
    f >= 2: with f = 1 it is not evaluated (nor are the leave-one-out residuals)."""
    phi, sigma0 = 0.011, 0.002  # 11 mm misclosure, 2 mm per sqrt(km)
    job, Aw, bw = loop_job(job_folder, phi, sigma0)
    outcome = run(job)
    got = rows_of(outcome, "redundancy", "studentized_residuals")
    D = LOOP_KM.sum()
    kappa = condition(Aw)
    dr = bounds.projector(4, kappa)
    assert np.max(np.abs(got["redundancy"] - LOOP_KM / D)) <= dr
    total = outcome.report["redundancy"]["total"]
    assert abs(total - 1.0) <= bounds.redundancy_total(5, 4, 4, 1, 2)
    w_loop = phi / (sigma0 * np.sqrt(D))
    test = outcome.report["observation_test"]
    assert test["test"] == "known_sigma0" and test["tested"] == 5
    de = bounds.residual_vector(4, kappa) * np.linalg.norm(bw)
    limit = statistic_bound(np.full(5, w_loop), LOOP_KM / D, sigma0, de, dr)
    for entry in test["worst"]:
        assert abs(abs(entry["statistic"]) - w_loop) <= limit[entry["row"]]
    e_norm = phi / np.sqrt(D)  # ||e||^2 = phi^2 / D
    model = outcome.report["model_test"]
    assert abs(model["statistic"] - w_loop**2) <= de * (2 * e_norm + de) / sigma0**2
    assert np.all(np.isnan(got["studentized_residuals"]))  # f = 1: no leave-one-out s0
    tau = run(job, "solve.observation_test=estimated").report["observation_test"]
    assert tau["evaluated"] is False and "f >= 2" in tau["reason"]


NETWORK_LINES = [  # (from, to, km): 7 benchmarks, 16 lines, benchmark 0 fixed: f = 10
    (0, 1, 1.2),
    (1, 2, 0.8),
    (2, 3, 1.5),
    (3, 4, 1.1),
    (4, 5, 0.9),
    (5, 6, 1.3),
    (6, 0, 1.0),
    (0, 3, 2.1),
    (1, 4, 1.7),
    (2, 5, 1.9),
    (3, 6, 1.4),
    (1, 6, 1.6),
    (2, 4, 1.2),
    (0, 5, 2.4),
    (4, 6, 0.7),
    (1, 3, 1.8),
]
SIGMA0 = 0.002  # m per sqrt(km): sigma_i = sigma0 sqrt(d_i), so w_i = sigma0^2 / sigma_i^2 = 1/d_i
BLUNDER_LINE, BLUNDER = 9, 0.02  # 20 mm on line 9 (1.9 km, sigma 2.8 mm)


def network(seed: int = 63) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The network's design (7 columns), observed differences (m) and weights (1/km)."""
    rng = np.random.default_rng(seed)
    d = np.array([line[2] for line in NETWORK_LINES])
    A = levelling_design(NETWORK_LINES, 7)
    heights = np.concatenate([[0.0], rng.uniform(2.0, 40.0, 6)])
    b = A @ heights + SIGMA0 * np.sqrt(d) * rng.standard_normal(d.size)
    b[BLUNDER_LINE] += BLUNDER
    return A, b, 1.0 / d


def test_levelling_network_statistics_match_a_dense_computation(job_folder: Path) -> None:
    """16 lines, 7 benchmarks, one fixed: f = 10. Against numpy (pinv hat matrix, lstsq):
    s0^2, T with the table bounds chi2_{0.025}(10) = 3.247 and chi2_{0.975}(10) = 20.483, the
    redundancy numbers and their sum 10, Baarda's w with the critical value 3.29 at alpha0
    = 0.001, and the planted 20 mm blunder found as the worst row."""
    A, b, w = network()
    job = weighted_job(
        job_folder,
        A,
        b,
        w,
        input={"fixed_columns": [0], "rows_per_block": 5},
        solve={"residuals": True, "sigma0": SIGMA0, "observation_test": "known_sigma0"},
    )
    outcome = run(job)
    report = outcome.report
    got = rows_of(outcome, "redundancy", "residuals")
    Aw, bw = np.sqrt(w)[:, None] * A[:, 1:], np.sqrt(w) * b
    e_ref = bw - Aw @ np.linalg.lstsq(Aw, bw, rcond=None)[0]
    r_ref = 1.0 - hat_diagonal(Aw)
    f = 10
    kappa = condition(Aw)
    dr = bounds.projector(6, kappa)
    de = bounds.residual_vector(6, kappa) * np.linalg.norm(bw)
    # redundancy numbers: the dense hat matrix, and their sum f (tests/bounds.py)
    assert np.max(np.abs(got["redundancy"] - r_ref)) <= dr
    assert abs(report["redundancy"]["total"] - f) <= bounds.redundancy_total(16, 6, 6, f, 5)
    assert report["redundancy"]["degrees_of_freedom"] == f
    # the variance factor and the global test
    model = report["model_test"]
    norm_ref = np.linalg.norm(e_ref)
    assert model["degrees_of_freedom"] == f
    assert abs(model["variance_factor"] - norm_ref**2 / f) <= de * (2 * norm_ref + de) / f
    assert (
        abs(model["statistic"] - (norm_ref / SIGMA0) ** 2) <= de * (2 * norm_ref + de) / SIGMA0**2
    )
    assert abs(model["lower"] - CHI2_TABLE[10][0]) <= TABLE_ROUNDING
    assert abs(model["upper"] - CHI2_TABLE[10][1]) <= TABLE_ROUNDING
    assert model["passed"] is bool(model["lower"] <= model["statistic"] <= model["upper"])
    # Baarda's w-test
    test = report["observation_test"]
    assert abs(test["critical_value"] - BAARDA_CRITICAL) <= 0.005
    w_ref = e_ref / (SIGMA0 * np.sqrt(r_ref))
    limit = statistic_bound(w_ref, r_ref, SIGMA0, de, dr)
    for entry in test["worst"]:
        row = entry["row"]
        assert abs(entry["statistic"] - w_ref[row]) <= limit[row]
        assert abs(entry["redundancy"] - r_ref[row]) <= dr
    assert test["worst"][0]["row"] == BLUNDER_LINE and test["worst"][0]["exceeds"]
    # the count, where no reference value lies within its bound of the critical value
    assert np.all(np.abs(np.abs(w_ref) - test["critical_value"]) > limit)
    assert test["exceeding"] == int(np.sum(np.abs(w_ref) > test["critical_value"]))
    assert test["tested"] == 16 and test["expected_false_alarms"] == pytest.approx(0.016)


def test_tau_and_leave_one_out_residuals_match_explicit_refits(job_folder: Path) -> None:
    """The same network with the a posteriori s0: tau_i = e_i / (s0 sqrt(r_i)) against the
    dense values, tau's critical value against the Beta form (Thompson 1935), and the
    externally studentized residuals against 16 explicit leave-one-out adjustments (numpy
    lstsq without the row: t_i = d_i / (s_(i) sqrt(1 + a_i N_(i)^-1 a_i^T)), the prediction
    form of Belsley, Kuh & Welsch 1980 -- from memory)."""
    A, b, w = network()
    job = weighted_job(job_folder, A, b, w, input={"fixed_columns": [0]}, solve={"residuals": True})
    outcome = run(job)
    got = rows_of(outcome, "standardized_residuals", "studentized_residuals")
    Aw, bw = np.sqrt(w)[:, None] * A[:, 1:], np.sqrt(w) * b
    m, f = 16, 10
    e_ref = bw - Aw @ np.linalg.lstsq(Aw, bw, rcond=None)[0]
    r_ref = 1.0 - hat_diagonal(Aw)
    s0 = np.linalg.norm(e_ref) / np.sqrt(f)
    tau_ref = e_ref / (s0 * np.sqrt(r_ref))
    t_ref = np.empty(m)
    for i in range(m):
        keep = np.arange(m) != i
        x_i, res, _, _ = np.linalg.lstsq(Aw[keep], bw[keep], rcond=None)
        s_i = np.sqrt(res[0] / (f - 1))
        spread = Aw[i] @ np.linalg.solve(Aw[keep].T @ Aw[keep], Aw[i])
        t_ref[i] = (bw[i] - Aw[i] @ x_i) / (s_i * np.sqrt(1.0 + spread))
    kappa = condition(Aw)
    de = bounds.residual_vector(6, kappa) * np.linalg.norm(bw)
    dr = bounds.projector(6, kappa)
    dtau = statistic_bound(tau_ref, r_ref, s0, de, dr, de / np.sqrt(f))
    assert np.all(np.abs(got["standardized_residuals"] - tau_ref) <= dtau)
    # dt/dtau = sqrt(f - 1) f / (f - tau^2)^(3/2), first order
    slope = np.sqrt(f - 1) * f / (f - tau_ref**2) ** 1.5
    # the refits' own rounding: one more backward-stable solve per row
    dt = slope * dtau + np.abs(t_ref) * bounds.lstsq_solution(6, kappa)
    assert np.all(np.abs(got["studentized_residuals"] - t_ref) <= dt)
    test = outcome.report["observation_test"]
    assert test["test"] == "estimated"
    beta = np.sqrt(f * stats.beta.isf(0.001, 0.5, (f - 1) / 2))
    assert abs(test["critical_value"] - beta) <= 1e-9 * beta
    worst = test["worst"][0]
    assert worst["row"] == BLUNDER_LINE
    assert abs(worst["studentized"] - t_ref[BLUNDER_LINE]) <= dt[BLUNDER_LINE]


def test_a_spur_line_is_uncontrolled_and_not_tested(job_folder: Path) -> None:
    """A benchmark reached by one line only (a spur): its line has h = 1, r = 0 (no other
    observation controls it), so it is counted as uncontrolled and gets no statistic."""
    A, b, w = network()
    spur = np.zeros((1, 8))
    spur[0, 3], spur[0, 7] = -1.0, 1.0
    A = np.vstack([np.column_stack([A, np.zeros(16)]), spur])
    b, w = np.append(b, 3.5), np.append(w, 1 / 0.6)
    job = weighted_job(job_folder, A, b, w, input={"fixed_columns": [0]}, solve={"residuals": True})
    outcome = run(job)
    got = rows_of(outcome, "redundancy", "standardized_residuals", "studentized_residuals")
    Aw = np.sqrt(w)[:, None] * A[:, 1:]
    assert 1.0 - hat_diagonal(Aw)[16] <= bounds.projector(7, condition(Aw))
    info = outcome.report["redundancy"]
    assert got["redundancy"][16] <= info["resolution"]
    assert info["uncontrolled"] == 1 and info["degrees_of_freedom"] == 10
    assert np.isnan(got["standardized_residuals"][16])
    assert np.isnan(got["studentized_residuals"][16])
    test = outcome.report["observation_test"]
    assert test["tested"] == 16 and 16 not in [entry["row"] for entry in test["worst"]]


# ---------------------------------------------------------------- 5. weights, gross errors


def test_rows_of_weight_zero_have_no_redundancy_and_are_out_of_the_sum(job_folder: Path) -> None:
    """A row of weight 0 is no observation: redundancy NaN (README), no statistic; the
    others' redundancy numbers sum to f = m' - n."""
    rng = np.random.default_rng(64)
    A = np.column_stack([np.ones(300), rng.uniform(-1, 1, (300, 3))])
    b = A @ np.array([1.0, 2.0, -0.5, 0.3]) + 0.05 * rng.standard_normal(300)
    w = rng.uniform(0.5, 2.0, 300)
    w[::7] = 0.0
    job = weighted_job(job_folder, A, b, w, input={"rows_per_block": 64}, solve={"residuals": True})
    outcome = run(job)
    got = rows_of(outcome, "redundancy", "standardized_residuals", "studentized_residuals")
    zero = w == 0
    for name in got:
        values = got[name].reshape(300, -1)
        assert np.all(np.isnan(values[zero])) and np.all(np.isfinite(values[~zero])), name
    used = int(np.count_nonzero(~zero))
    f = used - 4
    info = outcome.report["redundancy"]
    assert info["zero_weight_rows"] == int(zero.sum()) and info["observations"] == used
    assert abs(np.sum(got["redundancy"][~zero]) - f) <= bounds.redundancy_total(300, 4, 4, f, 64)
    assert abs(info["total"] - f) <= bounds.redundancy_total(300, 4, 4, f, 64)
    Aw = np.sqrt(w[~zero])[:, None] * A[~zero]
    assert np.max(np.abs(got["redundancy"][~zero] - (1 - hat_diagonal(Aw)))) <= (
        bounds.projector(4, condition(Aw))
    )


def test_a_gross_error_keeps_its_size_in_the_leave_one_out_residual(job_folder: Path) -> None:
    """A 100-sigma error in 500 rows: it inflates s0, so its tau stays below sqrt(f) and
    far below 100, while the externally studentized residual shows about sqrt(r_i) 100
    (its own s_(i) excludes it); s_(i) spreads by about 1/sqrt(2 f) = 3%, so 20% is a wide
    band (common practice)."""
    rng = np.random.default_rng(65)
    noise = 0.01
    A = np.column_stack([np.ones(500), rng.uniform(0, 10, (500, 3))])
    b = A @ np.array([2.0, 0.5, -1.0, 0.25]) + noise * rng.standard_normal(500)
    b[123] += 100 * noise
    outcome = run(
        write_job(job_folder, A, b, input={"rows_per_block": 64}, solve={"residuals": True})
    )
    worst = outcome.report["observation_test"]["worst"][0]
    assert worst["row"] == 123 and worst["exceeds"]
    expected = np.sqrt(worst["redundancy"]) * 100
    assert 0.8 * expected <= worst["studentized"] <= 1.2 * expected
    assert worst["tau"] < np.sqrt(496) and worst["tau"] < 0.3 * worst["studentized"]


# ---------------------------------------------------------------- 6. the gate and exit status


def small_job(folder: Path, **sections: dict[str, Any]) -> Path:
    rng = np.random.default_rng(66)
    A = np.column_stack([np.ones(200), rng.uniform(-1, 1, (200, 2))])
    b = A @ np.array([1.0, -2.0, 0.5]) + 0.1 * rng.standard_normal(200)
    return write_job(folder, A, b, **sections)


def test_failing_the_global_test_changes_the_exit_status_only_through_the_gate(
    job_folder: Path,
) -> None:
    """sigma0 ten times too small: T is about 100 f, the test fails. Without the gate the
    run exits 0; with gates.model_test it exits 3 and the gate names the p-value."""
    job = small_job(job_folder, solve={"sigma0": 0.01})
    plain = run(job)
    assert plain.report["model_test"]["passed"] is False and plain.status == 0
    gated = run(job, "gates.model_test=true")
    gate = gated.report["gates"]["model_test"]
    assert gated.status == 3 and gate["held"] is False and gate["evaluated"] is True
    assert gate["limit"] == 0.05 and gate["value"] < 0.05 and gate["rule"].startswith("value >=")
    right = run(job, "gates.model_test=true", "solve.sigma0=0.1")
    assert right.report["model_test"]["passed"] is True
    assert right.status == 0 and right.report["gates"]["model_test"]["held"] is True


@pytest.mark.parametrize("case", ["no-rhs", "no-degrees-of-freedom"])
def test_a_model_test_gate_that_cannot_be_evaluated_gives_exit_3(
    job_folder: Path, case: str
) -> None:
    rng = np.random.default_rng(67)
    if case == "no-rhs":
        job = write_job(job_folder, rng.standard_normal((50, 3)), gates={"model_test": True})
        reason = "no right-hand side"
    else:  # square: f = 0
        A = rng.standard_normal((4, 4))
        job = write_job(job_folder, A, A @ np.ones(4), gates={"model_test": True})
        reason = "no degrees of freedom"
    outcome = run(job)
    gate = outcome.report["gates"]["model_test"]
    assert outcome.status == 3 and gate["evaluated"] is False and gate["held"] is None
    assert reason in gate["reason"] and reason in outcome.report["model_test"]["reason"]
    assert outcome.report["gates_status"] == "not evaluated"


def test_redundancy_numbers_that_do_not_sum_to_the_degrees_of_freedom_stop_the_run(
    job_folder: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The code path's own check: leverages off by 0.1% make the total miss f by far more
    than the rounding bound, and the run fails (exit 4) without writing anything."""
    original = quality.leverages
    monkeypatch.setattr(quality, "leverages", lambda q, basis: 1.001 * original(q, basis))
    job = small_job(job_folder, solve={"residuals": True})
    with pytest.raises(RunError, match="redundancy numbers sum to") as raised:
        run(job)
    assert raised.value.exit_status == 4
    assert not (job_folder / "out.h5").exists()


def test_the_tally_keeps_the_true_worst_rows_in_fixed_memory() -> None:
    """Block by block, the tally keeps exactly the 20 largest |statistic| (against a full
    sort of all rows) and counts every exceedance."""
    rng = np.random.default_rng(68)
    m, k = 5_000, 2
    e = rng.standard_normal((m, k))
    redundancy = rng.uniform(0.2, 1.0, m)
    redundancy[::11] = np.nan  # rows of weight 0
    test = model_tests.ObservationTest(
        model_tests.KNOWN_SIGMA0, 0.001, m - 10, np.ones(k), 3.29, 1e-12
    )
    tally = model_tests.ObservationTally(k, 1e-12, test)
    for start in range(0, m, 700):
        stop = min(start + 700, m)
        tau = e[start:stop] / np.sqrt(redundancy[start:stop])[:, None]
        tally.add(start, e[start:stop], redundancy[start:stop], tau, tau)
        assert len(tally.worst) <= model_tests.WORST_ROWS
    statistic = e / np.sqrt(redundancy)[:, None]
    order = np.argsort(np.nan_to_num(np.abs(statistic), nan=-1.0), axis=None)[::-1][:20]
    expected = [divmod(int(i), k) for i in order]
    assert [(w["row"], w["rhs"]) for w in tally.worst_rows()] == expected
    assert list(tally.exceeding) == list(np.sum(np.abs(statistic) > 3.29, axis=0))
    assert tally.zero_weight == int(np.isnan(redundancy).sum())


def test_critical_values_and_p_values_agree_with_scipy_stats() -> None:
    """The distributions come from scipy.special (scipy.stats is slow to import) by the
    standard identities (chi-square quantiles through the regularized incomplete gamma,
    normal through ndtri, Student t through stdtrit); reference: scipy.stats's chi2, norm
    and t. They agree to the last bit with today's scipy; the test allows 1e-10 relative
    (common practice margin, far below any wrong formula's error, and room for a scipy that
    changes its inversion algorithm)."""

    def close(got: float | np.ndarray, want: float | np.ndarray) -> bool:
        return bool(np.allclose(got, want, rtol=1e-10, atol=0.0, equal_nan=True))

    for dof in (1, 2, 3, 7, 37, 997, 100_000):
        for alpha in (1e-6, 0.001, 0.01, 0.05, 0.5):
            lower, upper = model_tests.chi_square_bounds(dof, alpha)
            assert close(lower, stats.chi2.ppf(alpha / 2, dof))
            assert close(upper, stats.chi2.isf(alpha / 2, dof))
            assert close(model_tests.normal_critical(alpha), stats.norm.isf(alpha / 2))
            assert close(model_tests.student_critical(alpha, dof), stats.t.isf(alpha / 2, dof))
        t = np.array([0.0, -1.0, 1e-300, 0.5, dof * 0.9, dof, dof * 3.0, 1e300, np.inf, np.nan])
        tails = np.minimum(stats.chi2.cdf(t, dof), stats.chi2.sf(t, dof))
        expected = np.minimum(1.0, 2.0 * tails)
        assert close(model_tests.chi_square_p_value(t, dof), expected)
