"""The in-cache block fold (tpqrt) and the GIL-free LAPACK/BLAS calls behind it.

References: numpy/LAPACK (``numpy.linalg.qr``, ``a.conj().T @ a``) and the uniqueness of
the thin QR with a positive diagonal (Trefethen & Bau 1997, Thm 7.2). The R bound is the
Householder backward-error bound gamma_{cmn} (Higham 2002, ch. 19; theorem number
from memory) turned into a forward bound by kappa; the constants (10 to 100) are common
practice, not published.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from rowfold.kernels import block_gram, nogil, positive_diagonal
from rowfold.kernels import fold as fold_module
from rowfold.kernels.fold import folded_r
from rowfold.kernels.nogil import rank_k_upper, tpqrt

from support import lapack_r, prescribed

U = 2.0**-53
DTYPES = [np.float32, np.float64, np.complex64, np.complex128]


def unit(dtype: type) -> float:
    """Unit roundoff of a dtype."""
    return float(np.finfo(np.dtype(dtype)).eps) / 2


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
    bound = 10 * 300 * unit(dtype) * float(np.linalg.norm(m)) ** 2
    assert np.linalg.norm(got - np.triu(expected)) <= bound


@pytest.mark.parametrize("dtype", DTYPES)
def test_tpqrt_folds_a_piece_into_the_triangle(dtype: type) -> None:
    a = prescribed(40, 6, 1e3, seed=2, dtype=dtype)
    top = np.asfortranarray(np.linalg.qr(a[:10], mode="r"))
    folded = tpqrt(top, np.asfortranarray(a[10:]), 4)
    gram = a.conj().T @ a
    assert np.array_equal(folded, np.triu(folded))
    assert np.linalg.norm(folded.conj().T @ folded - gram) <= 100 * 6 * unit(dtype)


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
    assert np.linalg.norm(signed - expected) <= 100 * 12 * U * condition
    assert np.linalg.norm(gram - a.conj().T @ a) <= 10 * 5000 * U


def test_folded_r_pairs_the_rhs_with_r() -> None:
    rng = np.random.default_rng(4)
    a = prescribed(6000, 8, 1e4, seed=4)
    b = rng.standard_normal((6000, 2))
    R, C, _ = folded_r(a, b)
    assert C is not None and C.shape == (8, 2)
    x = np.linalg.solve(R, C)
    expected = np.linalg.lstsq(a, b, rcond=None)[0]
    assert np.linalg.norm(x - expected) <= 100 * 8 * U * 1e4**2 * np.linalg.norm(expected)


@pytest.mark.parametrize("rows", [0, 1, 3, fold_module.FOLD_ROWS, fold_module.FOLD_ROWS + 1])
def test_folded_r_on_short_and_ragged_blocks(rows: int) -> None:
    a = np.random.default_rng(rows).standard_normal((rows, 5))
    R, _, gram = folded_r(a)
    assert R.shape == (5, 5) and np.array_equal(R, np.triu(R))
    assert np.linalg.norm(R.T @ R - a.T @ a) <= 100 * 5 * U * max(1.0, np.linalg.norm(a) ** 2)
    assert np.linalg.norm(gram - block_gram(a)) <= 10 * 5 * U * max(1.0, np.linalg.norm(a) ** 2)


def test_two_threads_fold_the_same_r_as_one() -> None:
    """The GIL-free calls must be safe to run from two Dask worker threads at once."""
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
        assert np.array_equal(together[index], expected)


@pytest.mark.parametrize("dtype", [np.float64, np.complex128])
def test_fallback_without_exported_pointers_gives_the_same_results(
    dtype: type, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A scipy whose Cython LAPACK lacks the pointers falls back to the f2py wrappers."""
    a = prescribed(3000, 7, 1e5, seed=9, dtype=dtype)
    fast_r, _, fast_gram = folded_r(a)
    monkeypatch.setattr(nogil, "_routine", lambda *_: None)
    slow_r, _, slow_gram = folded_r(a)
    assert slow_gram is not None and fast_gram is not None
    assert np.linalg.norm(slow_r - fast_r) <= 100 * 7 * U * 1e5 * np.linalg.norm(fast_r)
    assert np.linalg.norm(slow_gram - fast_gram) <= 100 * 3000 * U * np.linalg.norm(fast_gram)
    for transpose in (False, True):
        m = np.asfortranarray(a if transpose else a.T)
        expected = m.conj().T @ m if transpose else m @ m.conj().T
        got = rank_k_upper(m, transpose)
        assert np.linalg.norm(got - np.triu(expected)) <= 100 * 3000 * U * np.linalg.norm(a) ** 2
