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
