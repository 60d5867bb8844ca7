"""R of one row block by folding cache-sized row pieces into a triangle (LAPACK tpqrt).

A whole-block ``geqrf`` streams the block through memory once per panel of reflectors and
needs a Fortran-ordered copy of it first. Folding works on pieces of :data:`FOLD_ROWS` rows:
each piece is copied to Fortran order, added to the block's Gram and folded into the running
triangle ``T`` with the triangular-pentagonal QR (``[T; piece] = Q [T'; 0]``), all while it
sits in cache. The result is the R of the block (``R^H R = A^H A`` to rounding), computed
with the same Householder reflections as any TSQR node, so the TSQR error analysis holds
(Demmel, Grigori, Hoemmen and Langou, SIAM J. Sci. Comput. 34 (2012)).

Measured on 65,536-row float64 blocks on one core (ms per block, copy and Gram included):
n = 64, 36 against 62 to 86 for copy + Gram + geqrf; n = 200, 243 against 720;
n = 256, 453 against 1185.
"""

from __future__ import annotations

import numpy as np

from rowfold.kernels.gram import gram_upper, hermitian_from_upper
from rowfold.kernels.householder import as_columns
from rowfold.kernels.nogil import tpqrt

# Rows per piece: 2048 x n stays in a 1-2 MB cache for the columns rowfold targets; 1024 to
# 4096 were within 10% of each other on 16 <= n <= 256 (measured, see module docstring).
FOLD_ROWS = 2048

# tpqrt's inner block size by width, measured with `benchmarks/kernel_choices.py --only-fold`
# (one BLAS thread, 16,384-row blocks): 16 was fastest or within the noise for n = 64, 200
# and 256; at n = 1024, 64 folded a block in 2.5 to 3.2 s against 3.8 s for 16 and 4.4 s
# for 128 (the whole-block geqrf took 2.5 s there, and 2.2 times the fold's time at n = 256).
FOLD_PANEL = 16
WIDE_FOLD_PANEL = 64
WIDE_FROM = 512


def fold_panel(width: int) -> int:
    """tpqrt's inner block size for a fold of ``width`` columns (see :data:`FOLD_PANEL`)."""
    return max(1, min(WIDE_FOLD_PANEL if width >= WIDE_FROM else FOLD_PANEL, width))


def folded_r(
    block: np.ndarray, rhs: np.ndarray | None = None, with_gram: bool = True
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Return R, ``Q^H rhs`` and the Gram ``A^H A`` of one row block.

    Parameters
    ----------
    block : ndarray, shape (rows, n)
        C- or Fortran-ordered; it is read, never written.
    rhs : ndarray, shape (rows,) or (rows, k), optional
        Right-hand sides, factored as extra columns of ``[A | B]``, so the returned
        ``Q^H B`` pairs with R.
    with_gram : bool
        Also accumulate ``A^H A`` (callers that have a cheaper Gram, e.g. from a CSR block,
        pass False).

    Returns
    -------
    R : ndarray, shape (n, n)
        Upper triangular with ``R^H R = A^H A``; diagonal signs as LAPACK leaves them.
    C : ndarray, shape (n, k) or None
        The first n rows of ``Q^H B``.
    gram : ndarray, shape (n, n), or None
        ``A^H A``, accumulated piece by piece (for the first-pass checks); None without
        ``with_gram``.
    """
    rows, n = block.shape
    extra = None if rhs is None else as_columns(rhs)
    dtype = block.dtype if extra is None else np.result_type(block, extra)
    width = n + (0 if extra is None else extra.shape[1])
    triangle = np.zeros((width, width), dtype=dtype, order="F")
    upper = np.zeros((n, n), dtype=dtype) if with_gram else None
    panel = fold_panel(width)
    for start in range(0, rows, FOLD_ROWS):
        piece = _fortran_piece(block, extra, start, dtype)
        if upper is not None:
            upper += gram_upper(piece[:, :n])
        tpqrt(triangle, piece, panel)
    C = None if extra is None else np.array(triangle[:n, n:])
    gram = None if upper is None else hermitian_from_upper(upper)
    return np.triu(triangle[:n, :n]), C, gram


def _fortran_piece(
    block: np.ndarray, extra: np.ndarray | None, start: int, dtype: np.dtype
) -> np.ndarray:
    """A Fortran-ordered copy of rows ``start:start+FOLD_ROWS`` of ``[block | extra]``."""
    stop = min(start + FOLD_ROWS, block.shape[0])
    n = block.shape[1]
    width = n if extra is None else n + extra.shape[1]
    piece = np.empty((stop - start, width), dtype=dtype, order="F")
    piece[:, :n] = block[start:stop]
    if extra is not None:
        piece[:, n:] = extra[start:stop]
    return piece
