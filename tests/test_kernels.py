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
from hypothesis import given, settings
from hypothesis import strategies as st

from rowfold.kernels import (
    block_gram,
    householder_q,
    householder_r,
    positive_diagonal,
    solve_right_upper,
    stacked_r,
)

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
