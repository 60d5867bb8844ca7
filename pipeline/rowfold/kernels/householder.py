"""Householder QR of one block, and of a stack of small R factors, by LAPACK.

The right-hand sides get the block's own reflectors (``ormqr``), so ``Q^H B`` comes from the
same pass, and R stays the R of A alone; stacked R factors are reduced with ``[R | C]``
side by side.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack


def as_columns(values: np.ndarray) -> np.ndarray:
    """View a 1-D array as one column; 2-D arrays pass through (works for zero rows)."""
    return values[:, None] if values.ndim == 1 else values


def _geqrf(work: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Run LAPACK geqrf in place on a Fortran-ordered array; return (qr, tau)."""
    (geqrf,) = lapack.get_lapack_funcs(("geqrf",), (work,))
    qr, tau, _, info = geqrf(work, overwrite_a=1)
    if info != 0:  # pragma: no cover - only on illegal arguments
        raise ValueError(f"geqrf failed with info={info}")
    return qr, tau


def _form_q(qr: np.ndarray, tau: np.ndarray, cols: int) -> np.ndarray:
    """Form the first ``cols`` columns of Q from geqrf's reflectors (orgqr/ungqr)."""
    name = "ungqr" if np.iscomplexobj(qr) else "orgqr"
    (orgqr,) = lapack.get_lapack_funcs((name,), (qr,))
    q, _, info = orgqr(qr[:, :cols], tau[:cols], overwrite_a=0)
    if info != 0:  # pragma: no cover - only on illegal arguments
        raise ValueError(f"{name} failed with info={info}")
    return np.asarray(q)


def _augment(block: np.ndarray, rhs: np.ndarray | None) -> np.ndarray:
    """Return a Fortran-ordered copy of ``[block | rhs]``."""
    parts = [block] if rhs is None else [block, as_columns(rhs)]
    dtype = np.result_type(*parts)
    return np.asfortranarray(np.concatenate(parts, axis=1).astype(dtype, copy=False))


def householder_r(
    block: np.ndarray, rhs: np.ndarray | None = None, overwrite: bool = False
) -> tuple[np.ndarray, np.ndarray | None]:
    """Return R (n x n) and ``Q^H rhs`` (n x k) of a block, padded with zero rows.

    Parameters
    ----------
    block : ndarray, shape (rows, n)
        Any number of rows, including fewer than n and zero.
    rhs : ndarray, shape (rows, k), optional
        Right-hand sides carried through the same reflectors.
    overwrite : bool
        Let LAPACK work in the block itself when it is Fortran-ordered (saves a copy of
        the block; its contents are destroyed).

    Returns
    -------
    R : ndarray, shape (n, n)
        Upper triangular; signs of the diagonal as LAPACK leaves them.
    C : ndarray, shape (n, k) or None
        ``Q^H rhs`` restricted to the first n rows.
    """
    rows, n = block.shape
    k = 0 if rhs is None else as_columns(rhs).shape[1]
    dtype = np.result_type(block, rhs) if rhs is not None else block.dtype
    R = np.zeros((n, n), dtype=dtype)
    C = None if rhs is None else np.zeros((n, k), dtype=dtype)
    if rows == 0:
        return R, C
    in_place = overwrite and block.flags.f_contiguous and block.flags.writeable
    work = block if in_place and block.dtype == dtype else np.array(block, dtype=dtype, order="F")
    qr, tau = _geqrf(work)
    top = min(rows, n)
    R[:top] = np.triu(qr[:top, :n])
    if C is not None and rhs is not None:
        C[:top] = _apply_qh(qr, tau, as_columns(rhs).astype(dtype))[:top]
    return R, C


def _apply_qh(qr: np.ndarray, tau: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Return ``Q^H values`` from geqrf's reflectors (LAPACK ormqr/unmqr).

    Applying the block's own reflectors (rather than factoring ``[A | B]`` together) keeps
    R exactly the R of A alone, so a later pass that re-forms the block's Q from A gets
    the very Q that produced R.
    """
    complex_ = np.iscomplexobj(qr)
    (ormqr,) = lapack.get_lapack_funcs(("unmqr" if complex_ else "ormqr",), (qr,))
    reflectors = min(qr.shape)
    columns = values.shape[1]
    result, _, info = ormqr(
        "L",
        "C" if complex_ else "T",
        qr[:, :reflectors],
        tau[:reflectors],
        np.asfortranarray(values),
        max(1, 64 * columns),
    )
    if info != 0:  # pragma: no cover - only on illegal arguments
        raise ValueError(f"ormqr failed with info={info}")
    return np.asarray(result)


def householder_q(block: np.ndarray) -> np.ndarray:
    """Return the thin Householder Q of a block, padded with zero columns to n.

    The Q returned pairs with the R of :func:`householder_r` on the same block
    (LAPACK is deterministic for the same input), so ``Q @ R`` reproduces the block.
    """
    rows, n = block.shape
    Q = np.zeros((rows, n), dtype=block.dtype)
    if rows == 0:
        return Q
    qr, tau = _geqrf(np.array(block, order="F"))  # one copy, whatever the layout
    top = min(rows, n)
    Q[:, :top] = _form_q(qr, tau, top)
    return Q


def stacked_r(
    parts: list[tuple[np.ndarray, np.ndarray | None]], keep_q: bool
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Reduce stacked (R, C) pairs from child blocks to one (R, C) pair.

    Parameters
    ----------
    parts : list of (R_j, C_j)
        Each R_j is n x n upper triangular; C_j is n x k or None.
    keep_q : bool
        Also return the node's Q (p*n x n), needed later to form the thin Q.

    Returns
    -------
    R : ndarray (n, n)
    C : ndarray (n, k) or None
    Q : ndarray (p*n, n) or None
    """
    stack_r = np.concatenate([part[0] for part in parts], axis=0)
    has_c = parts[0][1] is not None
    stack_c = np.concatenate([part[1] for part in parts], axis=0) if has_c else None
    n = stack_r.shape[1]
    work = _augment(stack_r, stack_c)
    qr, tau = _geqrf(work)
    R = np.triu(qr[:n, :n])
    C = np.array(qr[:n, n:]) if has_c else None
    Q = _form_q(qr[:, :n].copy(order="F"), tau, n) if keep_q else None
    return R, C, Q
