"""Tests of the NIST StRD reader in ``tests/nist_strd.py``.

Expected counts and values are those printed in the NIST/ITL Statistical Reference Datasets
(StRD) linear-regression files themselves (header and certified block), also tabulated in
``tests/data/nist-strd/SOURCE.md``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from nist_strd import DATASET_NAMES, LRE_CAP, NistCase, load_dataset, lre, worst_lre

# (name, observations, parameters, intercept) as printed in each NIST StRD file's header;
# Longley's header lists "B0,B1,...,B7" but its model and certified block have B0..B6.
HEADER_COUNTS = [
    ("Norris", 36, 2, True),
    ("Pontius", 40, 3, True),
    ("NoInt1", 11, 1, False),
    ("NoInt2", 3, 1, False),
    ("Filip", 82, 11, True),
    ("Longley", 16, 7, True),
    ("Wampler1", 21, 6, True),
    ("Wampler2", 21, 6, True),
    ("Wampler3", 21, 6, True),
    ("Wampler4", 21, 6, True),
    ("Wampler5", 21, 6, True),
]


def test_every_dataset_is_listed() -> None:
    """The table above covers the 11 NIST StRD linear-regression datasets."""
    assert [row[0] for row in HEADER_COUNTS] == list(DATASET_NAMES)


@pytest.mark.parametrize(
    ("name", "n_obs", "n_params", "intercept"), HEADER_COUNTS, ids=[r[0] for r in HEADER_COUNTS]
)
def test_counts_match_header(name: str, n_obs: int, n_params: int, intercept: bool) -> None:
    """Shapes follow the NIST StRD header: m observations, p parameters."""
    case = load_dataset(name)
    assert isinstance(case, NistCase)
    assert case.y.shape == (n_obs,)
    assert case.X.shape == (n_obs, n_params)
    assert case.certified_estimates.shape == (n_params,)
    assert case.certified_stderr.shape == (n_params,)
    assert (case.n_obs, case.n_params) == (n_obs, n_params)
    assert bool(np.all(case.X[:, 0] == 1.0)) is intercept
    assert np.all(np.isfinite(case.X)) and np.all(np.isfinite(case.y))


def test_norris_certified_values_as_printed() -> None:
    """NIST StRD Norris.dat, certified block: B0, B1, their SDs and the residual SD."""
    case = load_dataset("Norris")
    assert case.certified_estimates[0] == -0.262323073774029
    assert case.certified_estimates[1] == 1.00211681802045
    assert case.certified_stderr[0] == 0.232818234301152
    assert case.certified_stderr[1] == 0.429796848199937e-03
    assert case.certified_residual_sd == 0.884796396144373
    # First and last data lines of Norris.dat (y first, then x).
    assert case.y[0] == 0.1 and case.X[0, 1] == 0.2
    assert case.y[-1] == 0.2 and case.X[-1, 1] == 0.5


def test_longley_has_b0_to_b6() -> None:
    """NIST StRD Longley.dat: the header claims B0..B7, the certified block has B0..B6."""
    case = load_dataset("Longley")
    assert case.params == tuple(range(7))
    assert case.certified_estimates[6] == 1829.15146461355
    assert case.certified_residual_sd == 304.854073561965
    # First data line: y x1 x2 x3 x4 x5 x6.
    assert case.y[0] == 60323.0
    np.testing.assert_array_equal(case.X[0], [1.0, 83.0, 234289, 2356, 1590, 107608, 1947])


def test_filip_design_is_degree_ten_polynomial() -> None:
    """NIST StRD Filip.dat model: y = B0 + B1*x + ... + B10*x**10."""
    case = load_dataset("Filip")
    x = case.X[:, 1]
    assert x[0] == -6.860120914 and case.y[0] == 0.8116
    np.testing.assert_array_equal(case.X, np.column_stack([x**k for k in range(11)]))
    assert case.certified_estimates[10] == -0.402962525080404e-04
    assert case.certified_stderr[10] == 0.896632837373868e-05


def test_no_intercept_design() -> None:
    """NIST StRD NoInt2.dat: y = B1*x; data (3,4), (4,5), (4,6); certified B1 0.727272727272727."""
    case = load_dataset("NoInt2")
    assert case.params == (1,)
    np.testing.assert_array_equal(case.X[:, 0], [4.0, 5.0, 6.0])
    np.testing.assert_array_equal(case.y, [3.0, 4.0, 4.0])
    assert case.certified_estimates[0] == 0.727272727272727


@pytest.mark.parametrize("name", ["Wampler1", "Wampler2"])
def test_exact_fits_have_zero_certified_residual(name: str) -> None:
    """NIST StRD Wampler1 and Wampler2 are exact fits: residual SD and all SDs are 0."""
    case = load_dataset(name)
    assert case.certified_residual_sd == 0.0
    assert np.all(case.certified_stderr == 0.0)


@pytest.mark.parametrize("name", DATASET_NAMES)
def test_design_reproduces_certified_estimates(name: str) -> None:
    """LAPACK Householder QR on the parsed design recovers the NIST StRD estimates.

    A wrongly built design (a missing or misordered column) gives LRE near 0; the floor of 5
    sits below the worst Householder figure in ../shared/CHECKS.md (Wampler5, 5.8).
    """
    case = load_dataset(name)
    q, r = np.linalg.qr(case.X)
    beta = scipy.linalg.solve_triangular(r, q.T @ case.y)
    assert worst_lre(beta, case.certified_estimates) >= 5.0


def test_unknown_name_is_rejected() -> None:
    """Only the 11 StRD linear-regression files are known."""
    with pytest.raises(ValueError, match="unknown NIST StRD dataset"):
        load_dataset("Nonesuch")


@pytest.mark.parametrize(
    ("computed", "certified", "expected"),
    [
        pytest.param(1.0001, 1.0, 4.0, id="relative"),
        pytest.param(-2.002, -2.0, 3.0, id="relative-negative"),
        pytest.param(1e-9, 0.0, 9.0, id="absolute-when-certified-zero"),
        pytest.param(0.5, 0.5, LRE_CAP, id="exact-is-capped"),
        pytest.param(1.0 + 1e-16, 1.0, LRE_CAP, id="beyond-15-digits-is-capped"),
        pytest.param(math.nan, 1.0, 0.0, id="nan-scores-zero"),
    ],
)
def test_lre(computed: float, certified: float, expected: float) -> None:
    """LRE = -log10(|x-c|/|c|), or -log10|x-c| when c = 0, capped at 15 (McCullough 1998)."""
    assert lre(computed, certified) == pytest.approx(expected, abs=1e-6)


def test_worst_lre_takes_the_minimum() -> None:
    """The worst entry decides, as in McCullough's tables of per-dataset minima."""
    assert worst_lre(np.array([1.0, 2.002]), np.array([1.0, 2.0])) == pytest.approx(3.0, abs=1e-6)
