"""Two hot LAPACK/BLAS calls made with the GIL released.

scipy's f2py wrappers for ``tpqrt`` and ``syrk``/``herk`` hold Python's GIL while LAPACK
runs, so two Dask worker threads factoring two blocks take turns instead of sharing the
cores (measured: 0.96x "speed-up" from a second thread on 65,536 x 64 blocks). These
functions call the very same routines from scipy's own LAPACK, through the function
pointers that :mod:`scipy.linalg.cython_lapack` and :mod:`scipy.linalg.cython_blas`
export, and ``ctypes`` releases the GIL for the call (measured: 1.99x with two threads).

When the pointers cannot be found (a scipy built differently), the f2py wrappers are used
and results are the same, only without the parallel speed-up.
"""

from __future__ import annotations

import ctypes
import functools
from typing import Any

import numpy as np
from scipy.linalg import blas, cython_blas, cython_lapack, lapack

_PREFIX = {
    np.dtype(np.float32): "s",
    np.dtype(np.float64): "d",
    np.dtype(np.complex64): "c",
    np.dtype(np.complex128): "z",
}


@functools.cache
def _routine(module: str, name: str, arguments: int) -> Any:
    """A ctypes callable for an exported scipy LAPACK/BLAS routine, or None."""
    api = ctypes.pythonapi
    api.PyCapsule_GetName.restype = ctypes.c_char_p
    api.PyCapsule_GetName.argtypes = [ctypes.py_object]
    api.PyCapsule_GetPointer.restype = ctypes.c_void_p
    api.PyCapsule_GetPointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
    table = (cython_lapack if module == "lapack" else cython_blas).__pyx_capi__
    capsule = table.get(name)
    if capsule is None:  # pragma: no cover - depends on the scipy build
        return None
    pointer = api.PyCapsule_GetPointer(capsule, api.PyCapsule_GetName(capsule))
    return ctypes.CFUNCTYPE(None, *([ctypes.c_void_p] * arguments))(pointer)


def _int(value: int) -> Any:
    """A pointer to a Fortran integer."""
    return ctypes.byref(ctypes.c_int(value))


def _char(value: str) -> Any:
    """A pointer to a Fortran character."""
    return ctypes.c_char_p(value.encode())


def _scalar(value: float, dtype: np.dtype) -> np.ndarray:
    """A one-element array holding ``value`` (its data pointer is what BLAS reads)."""
    return np.array([value], dtype=dtype)


def tpqrt(triangle: np.ndarray, piece: np.ndarray, panel: int) -> np.ndarray:
    """Fold ``piece`` into the upper triangle ``triangle`` in place: ``[T; P] = Q [T'; 0]``.

    Both arrays must be Fortran-ordered and of one supported dtype; ``piece`` is
    overwritten with the reflectors. Returns ``triangle``.
    """
    rows, n = piece.shape
    if rows == 0:
        return triangle
    call = _routine("lapack", _PREFIX[triangle.dtype] + "tpqrt", 12)
    if call is None:  # a scipy without the exported pointer: the f2py wrapper, GIL held
        (f2py,) = lapack.get_lapack_funcs(("tpqrt",), (triangle,))
        folded, _, _, _ = f2py(0, panel, triangle, piece, overwrite_a=1, overwrite_b=1)
        triangle[...] = folded
        return triangle
    tfactor = np.empty((panel, n), dtype=triangle.dtype, order="F")
    work = np.empty(panel * n, dtype=triangle.dtype)
    info = ctypes.c_int(0)
    call(
        *(_int(rows), _int(n), _int(0), _int(panel)),
        *(triangle.ctypes.data, _int(n), piece.ctypes.data, _int(rows)),
        *(tfactor.ctypes.data, _int(panel), work.ctypes.data, ctypes.byref(info)),
    )
    if info.value != 0:  # pragma: no cover - only on illegal arguments
        raise ValueError(f"tpqrt failed with info={info.value}")
    return triangle


def rank_k_upper(matrix: np.ndarray, transpose: bool) -> np.ndarray:
    """Return the upper triangle of ``M M^H`` (or of ``M^H M`` with ``transpose``).

    ``matrix`` must be Fortran-ordered. The strictly lower triangle of the result is zero.
    """
    complex_ = np.iscomplexobj(matrix)
    n, k = matrix.shape[::-1] if transpose else matrix.shape
    call = _routine("blas", _PREFIX[matrix.dtype] + ("herk" if complex_ else "syrk"), 10)
    if call is None:  # a scipy without the exported pointer: the f2py wrapper, GIL held
        (f2py,) = blas.get_blas_funcs(("herk" if complex_ else "syrk",), (matrix,))
        flag = (2 if complex_ else 1) if transpose else 0
        return np.triu(f2py(1.0, matrix, trans=flag, lower=0))
    out = np.zeros((n, n), dtype=matrix.dtype, order="F")
    if n == 0 or k == 0:
        return out
    scalar = matrix.real.dtype
    alpha, beta = _scalar(1.0, scalar), _scalar(0.0, scalar)
    trans = ("C" if complex_ else "T") if transpose else "N"
    call(
        *(_char("U"), _char(trans), _int(n), _int(k), alpha.ctypes.data),
        *(matrix.ctypes.data, _int(matrix.shape[0]), beta.ctypes.data, out.ctypes.data, _int(n)),
    )
    return out


def solve_right_upper(
    block: np.ndarray, R: np.ndarray, overwrite: bool = False
) -> np.ndarray | None:
    """Return ``block @ inv(R)`` for an upper triangular ``R``, by trsm with the GIL released.

    The result keeps the block's memory layout: a Fortran-ordered block is solved from the
    right (``X R = B``), a C-ordered one through its transpose (``R^T X^T = B^T``, the
    transpose and not the conjugate transpose, also for complex data), so neither layout is
    transposed or copied beyond the one copy that holds the result (none with ``overwrite``,
    when ``block`` is contiguous and already of the result's dtype).

    Returns None when this path cannot serve the call (a dtype BLAS has no routine for, or a
    scipy without the exported pointer); the caller then uses another route.

    Raises
    ------
    ValueError
        When ``R`` holds NaN or Inf: trsm would then return finite numbers for some rows
        (``x / inf`` is 0), which would be silently wrong.
    """
    dtype = np.result_type(block, R)
    call = _routine("blas", _PREFIX.get(dtype, "?") + "trsm", 11) if dtype in _PREFIX else None
    if call is None or block.ndim != 2:
        return None
    n = R.shape[0]
    if not np.isfinite(R).all():
        raise ValueError("triangular factor holds NaN or Inf; refusing to solve with it")
    factor = np.asfortranarray(R, dtype=dtype)
    out = _solve_buffer(block, dtype, overwrite)
    fortran = out.flags.f_contiguous and not out.flags.c_contiguous
    rows = block.shape[0]
    if rows == 0 or n == 0:
        return out
    alpha = _scalar(1.0, dtype)
    if fortran:  # X R = B, B rows x n with leading dimension rows
        shape, side, trans, lead = (rows, n), "R", "N", rows
    else:  # R^T X^T = B^T, B^T n x rows (Fortran view of the C block), leading dimension n
        shape, side, trans, lead = (n, rows), "L", "T", n
    call(
        *(_char(side), _char("U"), _char(trans), _char("N"), _int(shape[0]), _int(shape[1])),
        *(alpha.ctypes.data, factor.ctypes.data, _int(n), out.ctypes.data, _int(lead)),
    )
    return out


def _solve_buffer(block: np.ndarray, dtype: np.dtype, overwrite: bool) -> np.ndarray:
    """The array trsm overwrites: ``block`` itself when allowed and contiguous in the result's
    dtype, else a contiguous copy that keeps the block's order of strides (so a row slice of a
    Fortran array is copied column by column, not transposed)."""
    contiguous = block.flags.c_contiguous or block.flags.f_contiguous
    if overwrite and contiguous and block.dtype == dtype and block.flags.writeable:
        return block
    return np.array(block, dtype=dtype, order="K", copy=True)
