"""Gram products, Cholesky and triangular solves for the CholeskyQR family (BLAS-3)."""

from __future__ import annotations

import numpy as np
from numpy.linalg import LinAlgError
from scipy.linalg import blas, lapack

from rowfold.kernels import nogil
from rowfold.kernels.householder import as_columns
from rowfold.kernels.nogil import rank_k_upper


def block_gram(block: np.ndarray) -> np.ndarray:
    """Return ``block^H block`` (n x n, Hermitian) by syrk/herk, without copying the block.

    A C-ordered block is used through its transpose (a Fortran view), so neither layout
    is copied.
    """
    return hermitian_from_upper(gram_upper(block))


# syrk/herk, not gemm, for every width: measured on this project's 2-core AMD EPYC machine
# (OpenBLAS 0.3.31, SkylakeX kernel, one BLAS thread, 4 blocks of 65,536 rows, best of 3,
# benchmarks/kernel_choices.py, machine shared with other jobs so +-20%), seconds for 4 blocks:
#   n =  16: syrk 0.015, numpy A.T @ A 0.019, gemm 0.022
#   n =  64: syrk 0.095, numpy A.T @ A 0.111, gemm 0.134
#   n = 256: syrk 0.98,  numpy A.T @ A 0.88,  gemm 1.79
# numpy's A.T @ A is itself syrk for real data (numpy spots the transpose) plus filling the
# lower triangle; a true gemm does twice the flops and is slower at each width.


def gram_upper(block: np.ndarray) -> np.ndarray:
    """The upper triangle of ``block^H block`` (the strictly lower part is zero); add these
    up over pieces and call :func:`hermitian_from_upper` once."""
    n = block.shape[1]
    if block.shape[0] == 0:
        return np.zeros((n, n), dtype=block.dtype)
    if block.flags.c_contiguous and not block.flags.f_contiguous:
        # block.T is Fortran-ordered; (block.T)(block.T)^H = conj(block^H block)
        upper = rank_k_upper(block.T, transpose=False)
        return np.conj(upper) if np.iscomplexobj(block) else upper
    return rank_k_upper(np.asfortranarray(block), transpose=True)


def hermitian_from_upper(upper: np.ndarray) -> np.ndarray:
    """The Hermitian matrix whose upper triangle is ``upper`` (real diagonal)."""
    gram = np.triu(upper) + np.triu(upper, 1).conj().T
    if np.iscomplexobj(gram):
        np.fill_diagonal(gram, np.real(np.diagonal(gram)))
    return gram


def cross_product(block: np.ndarray, other: np.ndarray) -> np.ndarray:
    """Return ``block^H other`` (n x k)."""
    return block.conj().T @ as_columns(other)


def cholesky_upper(gram: np.ndarray) -> np.ndarray:
    """Upper Cholesky factor R with ``R^H R = gram`` (LAPACK potrf).

    Raises
    ------
    numpy.linalg.LinAlgError
        When the matrix is not numerically positive definite; the message gives the
        leading minor that failed.
    """
    (potrf,) = lapack.get_lapack_funcs(("potrf",), (gram,))
    factor, info = potrf(gram, lower=0, clean=1, overwrite_a=0)
    if info > 0:
        raise LinAlgError(f"Cholesky breakdown at leading minor {info} of {gram.shape[0]}")
    if info < 0:  # pragma: no cover - only on illegal arguments
        raise ValueError(f"potrf failed with info={info}")
    return np.asarray(factor)


def solve_right_upper(block: np.ndarray, R: np.ndarray, overwrite: bool = False) -> np.ndarray:
    """Return ``block @ inv(R)`` for upper triangular R, by trsm (no inverse formed).

    The result keeps the block's layout: a C-ordered block is solved through its
    transpose (``R^-T block^T``), so neither layout is transposed. The GIL-released trsm of
    :func:`rowfold.kernels.nogil.solve_right_upper` is used when it can serve the call
    (``overwrite`` lets it work in ``block`` itself); scipy's f2py wrapper otherwise.

    Raises
    ------
    ValueError
        When R holds NaN or Inf (the solve would give finite numbers that are wrong).
    """
    solved = nogil.solve_right_upper(block, R, overwrite=overwrite)
    if solved is not None:
        return solved
    if not np.isfinite(R).all():
        raise ValueError("triangular factor holds NaN or Inf; refusing to solve with it")
    return _f2py_solve_right_upper(block, R)


def _f2py_solve_right_upper(block: np.ndarray, R: np.ndarray) -> np.ndarray:
    """``block @ inv(R)`` through scipy's f2py trsm wrapper (holds the GIL while it runs)."""
    dtype = np.result_type(block, R)
    if block.shape[0] == 0:
        return np.zeros(block.shape, dtype=dtype)
    factor = R.astype(dtype, copy=False)
    (trsm,) = blas.get_blas_funcs(("trsm",), (factor,))
    if block.flags.c_contiguous and not block.flags.f_contiguous:
        solved = trsm(1.0, factor, block.T.astype(dtype, copy=False), side=0, lower=0, trans_a=1)
        return np.asarray(solved).T
    return np.asarray(trsm(1.0, factor, np.asfortranarray(block, dtype=dtype), side=1, lower=0))
