"""Per-block math on CSR row blocks (scipy.sparse), for sparse inputs.

A CSR block with ``nnz_i`` stored values in row i costs ``sum_i nnz_i^2`` for its Gram
``B^H B`` and ``nnz * n`` for a product ``B @ M`` with a dense n x n matrix, against
``rows * n^2`` for the same work on the densified block. Nothing here sees Dask, a file or
a path; every function works on zero-row blocks and on real and complex dtypes.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.linalg import solve_triangular

from rowfold.kernels.gram import gram_upper, hermitian_from_upper, solve_right_upper


def csr_block(
    data: np.ndarray,
    indices: np.ndarray,
    indptr: np.ndarray,
    cols: int,
    dtype: np.dtype | str,
) -> sp.csr_matrix:
    """Build a CSR block in ``dtype`` from its three arrays (``indptr`` starting at 0)."""
    rows = max(0, indptr.shape[0] - 1)
    return sp.csr_matrix(
        (np.asarray(data, dtype=dtype), indices, indptr), shape=(rows, cols), copy=False
    )


def canonical(block: sp.csr_matrix) -> sp.csr_matrix:
    """Sum duplicate entries, sort column numbers, drop stored zeros (in place; returned).

    After this the block's structure is exactly that of ``csr_matrix(block.toarray())``, so
    a sparse product on either gives the same bits (what :func:`rowfold.methods.cholesky`
    relies on to form Q the same way in every pass).
    """
    block.sum_duplicates()
    block.eliminate_zeros()
    return block


def scale(
    block: sp.csr_matrix, rows: np.ndarray | None, columns: np.ndarray | None
) -> sp.csr_matrix:
    """Multiply row i by ``rows[i]`` and column j by ``columns[j]`` (in place; returned)."""
    if columns is not None:
        block.data *= np.asarray(columns)[block.indices]
    if rows is not None:
        block.data *= np.repeat(np.asarray(rows), np.diff(block.indptr))
    return block


def keep_columns(block: sp.csr_matrix, keep: np.ndarray) -> sp.csr_matrix:
    """Return the block restricted to columns ``keep`` (in that order)."""
    return sp.csr_matrix(block[:, keep])


def sparse_gram(block: sp.csr_matrix) -> np.ndarray:
    """Return ``B^H B`` as a dense n x n Hermitian array (cost ~ sum of nnz_i^2)."""
    gram = np.asarray((block.conj().T @ block).toarray())
    gram = np.triu(gram) + np.triu(gram, 1).conj().T
    if np.iscomplexobj(gram):
        np.fill_diagonal(gram, np.real(np.diagonal(gram)))
    return gram


def sparse_gram_sums(block: sp.csr_matrix) -> dict[str, object]:
    """First-pass sums of a CSR block: ``a_fro2`` (||B||_F^2) and ``gram`` (B^H B).

    The same keys as :func:`rowfold.kernels.metrics.gram_sums` on the densified block.
    """
    return {
        "a_fro2": float(np.sum(np.abs(block.data) ** 2)),
        "gram": sparse_gram(block),
    }


def sparse_cross(block: sp.csr_matrix, other: np.ndarray) -> np.ndarray:
    """Return ``B^H other`` (n x k)."""
    return np.asarray(block.conj().T @ other.reshape(block.shape[0], -1))


def sparse_times(block: sp.csr_matrix, dense: np.ndarray) -> np.ndarray:
    """Return ``B @ dense`` as a dense array (cost ~ nnz * dense.shape[1])."""
    dtype = np.result_type(block.dtype, dense.dtype)
    if block.shape[0] == 0:
        return np.zeros((0, dense.shape[1]), dtype=dtype)
    return np.asarray(block @ dense, dtype=dtype)


def upper_inverse(R: np.ndarray) -> np.ndarray:
    """Return ``inv(R)`` of an upper triangular R, by a triangular solve on the identity."""
    eye = np.eye(R.shape[0], dtype=R.dtype)
    return np.ascontiguousarray(solve_triangular(R, eye, lower=False, check_finite=False))


# Column bands for :func:`banded_gram`: rows are grouped by the band of their first stored
# column. More bands skip more zeros but make smaller BLAS calls; 16 is a common-practice
# compromise, checked on the 3M x 200 levelling benchmark.
GRAM_BANDS = 16


def banded_gram(
    block: sp.csr_matrix,
    rhs: np.ndarray | None,
    inverse: np.ndarray,
    rest: tuple[np.ndarray, ...] = (),
) -> tuple[np.ndarray, np.ndarray | None]:
    """Return ``X^H X`` and ``X^H rhs`` for ``X = block inv(F1) inv(F2) ...``, skipping zeros.

    ``inverse`` is ``inv(F1)`` and ``rest`` the further upper triangular factors. A row
    whose first stored column is c has ``x_i[:c] = 0`` exactly, because every factor is
    upper triangular. Rows are grouped by the band of c, and each group's X is formed and
    multiplied only from its band's first column on. The values of X are the same, bit for
    bit, as those of the full product; only the order of the Gram's sums differs.

    Parameters
    ----------
    block : csr_matrix (rows, n)
        In canonical form (sorted column numbers, see :func:`canonical`).
    rhs : ndarray (rows, k) or None
    inverse : ndarray (n, n)
    rest : tuple of ndarray (n, n)

    Returns
    -------
    gram : ndarray (n, n), Hermitian
    cross : ndarray (n, k) or None
    """
    n = block.shape[1]
    dtype = np.result_type(block.dtype, inverse.dtype)
    upper = np.zeros((n, n), dtype=dtype)
    cross = None if rhs is None else np.zeros((n, rhs.shape[1]), dtype=dtype)
    order, bands = _band_order(block, n)
    grouped = block[order]  # one row gather; each band is then a contiguous row range
    rhs_grouped = None if rhs is None else rhs[order]
    for start, first, last in bands:
        x = np.asarray(grouped[first:last] @ inverse[:, start:], dtype=dtype)
        for factor in rest:
            x = solve_right_upper(x, factor[start:, start:], overwrite=True)
        upper[start:, start:] += gram_upper(x)
        if cross is not None and rhs_grouped is not None:
            cross[start:] += x.conj().T @ rhs_grouped[first:last]
    return hermitian_from_upper(upper), cross


def _band_order(block: sp.csr_matrix, n: int) -> tuple[np.ndarray, list[tuple[int, int, int]]]:
    """Rows with stored values, ordered by the band of their first column, and per band
    (first column of the band, first and last position in that order)."""
    counts = np.diff(block.indptr)
    stored = np.flatnonzero(counts)
    leading = block.indices[block.indptr[stored]]
    edges = np.linspace(0, n, min(GRAM_BANDS, max(n, 1)) + 1).astype(np.int64)
    band = np.searchsorted(edges, leading, side="right") - 1
    order = np.argsort(band, kind="stable")
    bounds = np.searchsorted(band[order], np.arange(len(edges)))
    bands = [
        (int(edges[i]), int(bounds[i]), int(bounds[i + 1]))
        for i in range(len(edges) - 1)
        if bounds[i + 1] > bounds[i]
    ]
    return stored[order], bands
