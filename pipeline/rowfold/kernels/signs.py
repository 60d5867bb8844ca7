"""Sign normalisation to the unique thin QR (diag(R) real and non-negative)."""

from __future__ import annotations

import numpy as np


def positive_diagonal(R: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Scale the rows of R so its diagonal is real and >= 0.

    With ``s_i = r_ii / |r_ii|`` (1 where ``r_ii == 0``) and ``D = diag(s)``, the returned
    R is ``D^H R``; the caller multiplies Q's columns by ``s`` (``Q <- Q D``) and the rows
    of ``Q^H b`` by ``conj(s)``. For full column rank this is the unique thin QR
    (Trefethen & Bau, Numerical Linear Algebra, 1997, Thm 7.2).

    Returns
    -------
    R : ndarray
        The normalised factor, diagonal exactly real.
    s : ndarray, shape (n,)
        The unit-modulus scale per column of Q.
    """
    diag = np.diagonal(R)
    size = np.abs(diag)
    s = np.where(size > 0, diag / np.where(size > 0, size, 1), 1).astype(R.dtype)
    out = np.conj(s)[:, None] * R
    np.fill_diagonal(out, size)
    return np.triu(out), s
