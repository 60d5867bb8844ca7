"""The in-cache block fold (tpqrt) and the GIL-free LAPACK/BLAS calls behind it.

References: numpy/LAPACK (``numpy.linalg.qr``, ``a.conj().T @ a``) and the uniqueness of
the thin QR with a positive diagonal (Trefethen & Bau 1997, Thm 7.2). Bounds from
tests/bounds.py: R against R to ``r_factor`` (first-order perturbation of R), R^H R against
A^H A to ``gram_residual`` (Householder's backward error, Higham 2002 Thm 19.4), and two
computations of the same products to ``inner_products`` (Higham 2002 eq. 3.13).
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from rowfold.kernels import block_gram, nogil, positive_diagonal
from rowfold.kernels import fold as fold_module
from rowfold.kernels.fold import folded_r
from rowfold.kernels.nogil import rank_k_upper, tpqrt

import bounds
from support import lapack_r, prescribed

DTYPES = [np.float32, np.float64, np.complex64, np.complex128]


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("transpose", [False, True])
def test_rank_k_upper_matches_numpy(dtype: type, transpose: bool) -> None:
    rng = np.random.default_rng(1)
    m = rng.standard_normal((7, 300)).astype(dtype)
    if np.iscomplexobj(m):
        m = m + 1j * rng.standard_normal(m.shape).astype(dtype)
    matrix = np.asfortranarray(m.T if transpose else m)
    got = rank_k_upper(matrix, transpose)
    expected = matrix.conj().T @ matrix if transpose else matrix @ matrix.conj().T
    assert np.array_equal(np.tril(got, -1), np.zeros_like(got))
    bound = 2 * bounds.inner_products(300, dtype) * float(np.linalg.norm(m)) ** 2
    assert np.linalg.norm(got - np.triu(expected)) <= bound


@pytest.mark.parametrize("dtype", DTYPES)
def test_tpqrt_folds_a_piece_into_the_triangle(dtype: type) -> None:
    a = prescribed(40, 6, 1e3, seed=2, dtype=dtype)
    top = np.asfortranarray(np.linalg.qr(a[:10], mode="r"))
    folded = tpqrt(top, np.asfortranarray(a[10:]), 4)
    gram = a.conj().T @ a
    assert np.array_equal(folded, np.triu(folded))
    limit = bounds.gram_residual(40, 6, dtype) * float(np.linalg.norm(a)) ** 2
    assert np.linalg.norm(folded.conj().T @ folded - gram) <= limit


@pytest.mark.parametrize("dtype", [np.float64, np.complex128])
@pytest.mark.parametrize("layout", ["C", "F"])
@pytest.mark.parametrize("condition", [1e2, 1e8, 1e12])
def test_folded_r_equals_lapack_r(dtype: type, layout: str, condition: float) -> None:
    a = np.asarray(prescribed(5000, 12, condition, seed=3, dtype=dtype), order=layout)
    R, C, gram = folded_r(a)
    signed, _ = positive_diagonal(R)
    expected = lapack_r(a)
    assert C is None
    assert np.array_equal(R, np.triu(R))
    r_error = np.linalg.norm(signed - expected) / np.linalg.norm(a, 2)
    assert r_error <= bounds.r_factor(12, condition)
    limit = 2 * bounds.inner_products(5000, dtype) * np.linalg.norm(a) ** 2
    assert np.linalg.norm(gram - a.conj().T @ a) <= limit


def test_folded_r_pairs_the_rhs_with_r() -> None:
    rng = np.random.default_rng(4)
    a = prescribed(6000, 8, 1e4, seed=4)
    b = rng.standard_normal((6000, 2))
    R, C, _ = folded_r(a, b)
    assert C is not None and C.shape == (8, 2)
    x = np.linalg.solve(R, C)
    expected = np.linalg.lstsq(a, b, rcond=None)[0]
    ratio = np.linalg.norm(b - a @ expected) / (np.linalg.norm(a, 2) * np.linalg.norm(expected))
    assert bounds.relative_error(x, expected) <= bounds.lstsq_solution(8, 1e4, ratio)


@pytest.mark.parametrize("rows", [0, 1, 3, fold_module.FOLD_ROWS, fold_module.FOLD_ROWS + 1])
def test_folded_r_on_short_and_ragged_blocks(rows: int) -> None:
    a = np.random.default_rng(rows).standard_normal((rows, 5))
    R, _, gram = folded_r(a)
    assert R.shape == (5, 5) and np.array_equal(R, np.triu(R))
    scale = np.linalg.norm(a) ** 2
    assert np.linalg.norm(R.T @ R - a.T @ a) <= bounds.gram_residual(rows, 5) * scale
    assert np.linalg.norm(gram - block_gram(a)) <= 2 * bounds.inner_products(rows) * scale


def test_two_threads_fold_the_same_r_as_one() -> None:
    """The GIL-free calls must be safe to run from two Dask worker threads at once.

    A race (shared workspace, a wrong pointer) gives an R that is wrong by O(1); the BLAS
    may split its work differently when two threads call it at once, which changes only
    the rounding. So each R computed alongside another must meet the same bounds as the
    one computed alone: R^H R = A^H A to ``bounds.gram_residual``, and the R computed
    alone to ``bounds.r_factor`` (was bit-for-bit equality, which no code promises across
    thread counts)."""
    blocks = [prescribed(20000, 16, 1e6, seed=s) for s in range(4)]
    alone = [folded_r(block)[0] for block in blocks]
    together: dict[int, np.ndarray] = {}

    def work(index: int) -> None:
        together[index] = folded_r(blocks[index])[0]

    threads = [threading.Thread(target=work, args=(i,)) for i in range(len(blocks))]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    for index, expected in enumerate(alone):
        block, got = blocks[index], together[index]
        gram_error = np.linalg.norm(got.T @ got - block.T @ block) / np.linalg.norm(block) ** 2
        assert gram_error <= bounds.gram_residual(20000, 16)
        signed, _ = positive_diagonal(got)
        reference, _ = positive_diagonal(expected)
        r_error = np.linalg.norm(signed - reference) / np.linalg.norm(block, 2)
        assert r_error <= bounds.r_factor(16, 1e6)


@pytest.mark.parametrize("dtype", [np.float64, np.complex128])
def test_fallback_without_exported_pointers_gives_the_same_results(
    dtype: type, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A scipy whose Cython LAPACK lacks the pointers falls back to the f2py wrappers: the
    same LAPACK and BLAS routines, so R to the R-factor bound and the Gram and rank-k
    updates to twice the inner-product rounding (the wrappers may copy the arrays, and
    nothing promises the very same bits)."""
    a = prescribed(3000, 7, 1e5, seed=9, dtype=dtype)
    fast_r, _, fast_gram = folded_r(a)
    monkeypatch.setattr(nogil, "_routine", lambda *_: None)
    slow_r, _, slow_gram = folded_r(a)
    assert slow_gram is not None and fast_gram is not None
    slow, _ = positive_diagonal(slow_r)
    fast, _ = positive_diagonal(fast_r)
    assert np.linalg.norm(slow - fast) / np.linalg.norm(a, 2) <= bounds.r_factor(7, 1e5)
    twice = 2 * bounds.inner_products(3000, dtype) * np.linalg.norm(a) ** 2
    assert np.linalg.norm(slow_gram - fast_gram) <= twice
    for transpose in (False, True):
        m = np.asfortranarray(a if transpose else a.T)
        expected = m.conj().T @ m if transpose else m @ m.conj().T
        got = rank_k_upper(m, transpose)
        assert np.linalg.norm(got - np.triu(expected)) <= twice
