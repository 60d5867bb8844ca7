"""Property-based tests of the pure kernels over shapes, layouts, dtypes and partitions.

Reference: numpy/LAPACK (``numpy.linalg.qr``) and exact identities: R^H R = A^H A for any
QR of A; the R of a stacked partition equals the R of the whole up to row signs
(uniqueness of the thin QR, Trefethen & Bau 1997, Thm 7.2). Tolerances are the bounds of
tests/bounds.py: ``gram_residual`` and ``stable_qr`` (Householder's backward error, Higham
2002 Thm 19.4), ``r_factor`` (first-order perturbation of R), ``inner_products`` and
``triangular_solve`` for two computations of the same product or solve.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rowfold.kernels import (
    block_gram,
    householder_q,
    householder_r,
    nogil,
    positive_diagonal,
    solve_right_upper,
    stacked_r,
)
from rowfold.kernels.fold import FOLD_ROWS, WIDE_FROM, fold_panel, folded_r
from rowfold.kernels.gram import gram_upper

import bounds


@st.composite
def blocks(draw: st.DrawFn) -> np.ndarray:
    """A random block: 0..3n rows, 1..8 columns, real or complex, C or Fortran order."""
    n = draw(st.integers(1, 8))
    rows = draw(st.integers(0, 3 * n))
    complex_ = draw(st.booleans())
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((rows, n))
    if complex_:
        a = a + 1j * rng.standard_normal((rows, n))
    return np.asfortranarray(a) if draw(st.booleans()) else np.ascontiguousarray(a)


@settings(max_examples=60)
@given(blocks())
def test_householder_r_is_a_cholesky_factor_of_the_gram(a: np.ndarray) -> None:
    R, _ = householder_r(a)
    n = a.shape[1]
    assert R.shape == (n, n) and np.array_equal(R, np.triu(R))
    gram = a.conj().T @ a
    limit = bounds.gram_residual(a.shape[0], n, a.dtype) * float(np.linalg.norm(a)) ** 2
    assert np.linalg.norm(R.conj().T @ R - gram) <= limit


@settings(max_examples=60)
@given(blocks())
def test_householder_q_pairs_with_r(a: np.ndarray) -> None:
    R, _ = householder_r(a)
    Q = householder_q(a)
    assert Q.shape == a.shape
    limit = bounds.stable_qr(a.shape[1], a.dtype) * float(np.linalg.norm(a))
    assert np.linalg.norm(Q @ R - a) <= limit


@settings(max_examples=60)
@given(blocks(), st.integers(1, 5))
def test_stacked_partition_gives_the_unique_r(a: np.ndarray, parts: int) -> None:
    n = a.shape[1]
    cuts = np.linspace(0, a.shape[0], parts + 1).astype(int)
    pieces = [householder_r(a[s:e]) for s, e in itertools.pairwise(cuts)]
    stacked, _, _ = stacked_r(pieces, keep_q=False)
    whole, _ = householder_r(a)
    left, _ = positive_diagonal(stacked)
    right, _ = positive_diagonal(whole)
    assert np.all(np.real(np.diagonal(left)) >= 0)
    if a.shape[0] >= n and np.linalg.matrix_rank(a) == n:
        error = np.linalg.norm(left - right) / np.linalg.norm(a, 2)
        assert error <= bounds.r_factor(n, np.linalg.cond(a), a.dtype)


@settings(max_examples=60)
@given(blocks())
def test_gram_and_triangular_solve_match_numpy(a: np.ndarray) -> None:
    n = a.shape[1]
    twice = 2 * bounds.inner_products(a.shape[0], a.dtype) * float(np.linalg.norm(a)) ** 2
    assert np.linalg.norm(block_gram(a) - a.conj().T @ a) <= twice
    R = np.triu(np.random.default_rng(n).standard_normal((n, n))) + 4 * np.eye(n)
    expected = a @ np.linalg.inv(R)
    got = solve_right_upper(a, R)
    assert got.shape == a.shape
    limit = bounds.triangular_solve(n, np.linalg.cond(R), a.dtype) * np.linalg.norm(expected)
    assert np.linalg.norm(got - expected) <= limit


def test_zero_row_blocks_give_zeros() -> None:
    empty = np.zeros((0, 4))
    R, C = householder_r(empty, np.zeros((0, 2)))
    assert not R.any() and C is not None and not C.any()
    assert householder_q(empty).shape == (0, 4)
    assert not block_gram(empty).any()


def test_overwrite_keeps_the_same_r() -> None:
    """Bit-for-bit is legitimate here: the same LAPACK call on the same bits (a copy), where
    ``overwrite`` only decides whose memory it works in (kernels/householder.py relies on
    LAPACK being deterministic for the same input)."""
    a = np.asfortranarray(np.random.default_rng(3).standard_normal((50, 6)))
    expected, _ = householder_r(a.copy())
    got, _ = householder_r(a, overwrite=True)
    assert np.array_equal(got, expected)


# --- trsm with the GIL released (rowfold.kernels.nogil.solve_right_upper) -----------------

DTYPES = [np.float32, np.float64, np.complex64, np.complex128]


def _random(rng: np.random.Generator, shape: tuple[int, ...], dtype: type) -> np.ndarray:
    """Standard normal entries in ``dtype`` (complex: independent real and imaginary parts)."""
    values = rng.standard_normal(shape)
    if np.dtype(dtype).kind == "c":
        values = values + 1j * rng.standard_normal(shape)
    return values.astype(dtype)


def _laid_out(a: np.ndarray, layout: str) -> np.ndarray:
    """``a`` in C order, Fortran order, or as a row slice of a larger Fortran array."""
    if layout == "C":
        return np.ascontiguousarray(a)
    if layout == "F":
        return np.asfortranarray(a)
    padded = np.zeros((a.shape[0] + 5, a.shape[1]), dtype=a.dtype, order="F")
    padded[2 : 2 + a.shape[0]] = a
    return padded[2 : 2 + a.shape[0]]


def _assert_backward_stable(b: np.ndarray, x: np.ndarray, R: np.ndarray) -> None:
    """|B - X R| <= c |X| |R| entry by entry, c from Higham 2002 Thm 8.5
    (:func:`bounds.triangular_backward`); the residual is formed in long double, and the
    rounding of that evaluation (Higham 2002 eq. 3.5, gamma_{n+1} in long double's u, doubled
    for complex as a conservative reading of Lemma 3.5) is added to the allowance."""
    wide = np.clongdouble if np.iscomplexobj(x) else np.longdouble
    xw, rw, bw = (np.asarray(v, dtype=wide) for v in (x, R, b))
    residual = np.abs(bw - xw @ rw)
    size = np.abs(xw) @ np.abs(rw)
    n = R.shape[0]
    extended = 2 * n * float(np.finfo(np.longdouble).eps)
    allowance = bounds.triangular_backward(n, x.dtype) * size + extended * (np.abs(bw) + size)
    assert np.all(residual <= allowance * (1 + 1e-6))


@settings(max_examples=40)
@given(
    st.sampled_from(DTYPES),
    st.sampled_from(["C", "F", "F-slice"]),
    st.integers(0, 300),
    st.integers(1, 40),
    st.integers(0, 2**32 - 1),
)
def test_nogil_trsm_meets_the_substitution_backward_error_bound(
    dtype: type, layout: str, rows: int, n: int, seed: int
) -> None:
    """Higham 2002 Thm 8.5: substitution is componentwise backward stable whatever the
    condition of T, so R here is a random triangle (typically very ill-conditioned)."""
    rng = np.random.default_rng(seed)
    R = np.triu(_random(rng, (n, n), dtype)) + np.eye(n, dtype=dtype) * 0.1
    b = _laid_out(_random(rng, (rows, n), dtype), layout)
    before = b.copy()
    x = nogil.solve_right_upper(b, R)
    assert x is not None, "the GIL-released trsm must serve every BLAS dtype"
    assert x.shape == b.shape and x.dtype == np.dtype(dtype)
    assert np.array_equal(b, before), "the input block is left as it was"
    if layout == "F" and rows > 1 and n > 1:
        assert x.flags.f_contiguous
    _assert_backward_stable(b, x, R)
    via_gram = solve_right_upper(b, R)
    _assert_backward_stable(b, via_gram, R)


@pytest.mark.parametrize("dtype", DTYPES)
def test_nogil_trsm_can_work_in_place(dtype: type) -> None:
    rng = np.random.default_rng(11)
    R = np.triu(_random(rng, (6, 6), dtype)) + 4 * np.eye(6, dtype=dtype)
    b = _random(rng, (50, 6), dtype)
    work = b.copy()
    x = nogil.solve_right_upper(work, R, overwrite=True)
    assert x is work
    _assert_backward_stable(b, x, R)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("layout", ["C", "F"])
def test_nogil_trsm_keeps_non_finite_rows_non_finite(dtype: type, layout: str) -> None:
    """IEEE 754 arithmetic propagates NaN and Inf (inf - inf and 0 * inf are NaN): a row of
    B holding one gives a row of X holding one, never finite numbers; other rows are
    untouched by it (row i of X depends on row i of B only) and meet Thm 8.5."""
    rng = np.random.default_rng(5)
    n = 8
    R = np.triu(_random(rng, (n, n), dtype)) + 4 * np.eye(n, dtype=dtype)
    b = _random(rng, (40, n), dtype)
    b[3, 0] = np.inf
    b[7, 5] = -np.inf
    b[11, 2], b[11, 6] = np.inf, -np.inf  # inf - inf inside the substitution
    b[19, n - 1] = np.nan
    b[23, 0], b[23, 1] = np.inf, np.inf
    bad = ~np.isfinite(b).all(axis=1)
    x = nogil.solve_right_upper(_laid_out(b, layout), R)
    assert x is not None
    assert np.all(~np.isfinite(x[bad]).all(axis=1))
    assert np.isfinite(x[~bad]).all()
    _assert_backward_stable(b[~bad], x[~bad], R)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_trsm_refuses_a_non_finite_factor(bad: float) -> None:
    """An infinite diagonal entry would make trsm return 0 for that column (x / inf), a finite
    wrong number; both routes refuse the factor instead."""
    rng = np.random.default_rng(2)
    R = np.triu(rng.standard_normal((5, 5))) + 4 * np.eye(5)
    R[2, 2 if np.isinf(bad) else 4] = bad
    b = rng.standard_normal((20, 5))
    with pytest.raises(ValueError, match="NaN or Inf"):
        nogil.solve_right_upper(b, R)
    with pytest.raises(ValueError, match="NaN or Inf"):
        solve_right_upper(b, R)


def test_nogil_trsm_leaves_dtypes_without_blas_to_the_caller() -> None:
    """float16 has no BLAS routine: the GIL-released path declines (None), the caller's f2py
    route then serves it in float32 or wider; that answer still meets Thm 8.5 in float16's u."""
    rng = np.random.default_rng(4)
    R = (np.triu(rng.standard_normal((4, 4))) + 4 * np.eye(4)).astype(np.float16)
    b = rng.standard_normal((10, 4)).astype(np.float16)
    assert nogil.solve_right_upper(b, R) is None
    x = solve_right_upper(b, R)
    _assert_backward_stable(b, x.astype(np.float16), R)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("layout", ["C", "F"])
def test_a_non_finite_entry_reaches_the_gram_diagonal(dtype: type, layout: str) -> None:
    """The claim a folded NaN/Inf check would rest on: (A^H A)_jj = sum_i |a_ij|^2 is a sum of
    non-negative terms, so IEEE 754 (Higham 2002 sec. 2.3: inf + x = inf, NaN absorbs) makes
    it NaN or +inf when column j holds NaN or +-inf, with no inf - inf to cancel, even when
    the column also holds +inf and -inf (whose off-diagonal products do give NaN)."""
    rng = np.random.default_rng(8)
    n = 6
    a = _random(rng, (300, n), dtype)
    a[10, 0] = np.inf
    a[20, 1], a[21, 1] = np.inf, -np.inf
    a[30, 3] = np.nan
    if np.dtype(dtype).kind == "c":
        a[40, 4] = complex(0.0, -np.inf)
    bad_columns = ~np.isfinite(a).all(axis=0)
    with np.errstate(invalid="ignore", over="ignore"):
        diagonal = np.real(np.diagonal(gram_upper(_laid_out(a, layout))))
    assert np.array_equal(~np.isfinite(diagonal), bad_columns)
    assert np.all(np.isnan(diagonal[np.isnan(a).any(axis=0)]))


@pytest.mark.parametrize("width", [WIDE_FROM - 1, WIDE_FROM])
def test_fold_on_each_side_of_the_wide_panel_is_a_cholesky_factor(width: int) -> None:
    """folded_r switches tpqrt's inner block size at WIDE_FROM columns; on either side R is
    upper triangular with R^H R = A^H A to the Householder Gram-residual bound (the bound's
    source is in tests/bounds.py) and its Gram is A^H A to the inner-product bound."""
    assert fold_panel(WIDE_FROM - 1) != fold_panel(WIDE_FROM)
    rng = np.random.default_rng(width)
    a = rng.standard_normal((FOLD_ROWS + width + 7, width))  # two pieces, the last ragged
    R, _, gram = folded_r(a)
    assert np.array_equal(R, np.triu(R))
    exact = a.T @ a
    limit = bounds.gram_residual(a.shape[0], width, a.dtype) * float(np.linalg.norm(a)) ** 2
    assert np.linalg.norm(R.T @ R - exact) <= limit
    assert gram is not None
    assert (
        np.linalg.norm(gram - exact)
        <= 2 * bounds.inner_products(a.shape[0]) * float(np.linalg.norm(a)) ** 2
    )
