"""Row blocks: how an input is cut, and the task-side function that loads one block.

A :class:`BlockPlan` is small, frozen and picklable: it holds references to the arrays
(path + dataset name), the row bounds of each block and the working dtype. Tasks call
:func:`load_block` with the plan and a block index; the worker opens the file itself.

The matrix is a dense dataset or a CSR group (``plan.sparse``). :func:`load_block` gives a
dense Fortran block either way (a CSR block is densified, one block at a time);
:func:`load_sparse_block` gives a CSR block for methods with a sparse-aware pass. Both
apply the same checks, column selection (``input.fixed_columns``), column scaling and
row weights, so a densified sparse block equals the dense block bit for bit.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import scipy.sparse as sp

from rowfold.errors import InputError
from rowfold.kernels import sparse as sparse_kernels
from rowfold.storage import ArrayInfo, ArrayRef, CsrInfo, read_csr_rows, read_rows

# Target bytes of A per row block for rows_per_block: auto (see choose_rows_per_block).
AUTO_BLOCK_BYTES = 32 * 2**20
# A block is at least this many times taller than wide, so the local QR pays off.
MIN_ASPECT = 4


@dataclass(frozen=True, slots=True)
class BlockPlan:
    """The row blocks of one job.

    Attributes
    ----------
    matrix : ArrayRef
        The m x n matrix A.
    rhs : ArrayRef or None
        Right-hand sides, m or m x k.
    rows, cols : int
        m and n.
    rhs_cols : int
        k (0 without rhs).
    rhs_1d : bool
        True when the rhs dataset is 1-D (results keep that shape).
    dtype : str
        Working dtype (float64 or complex128).
    per_block : int
        Rows per block; the blocks cover ``[first_row, m)`` in order, the last one ragged.
    weights : ArrayRef or None
        Per-row weights w >= 0; rows of A and B are scaled by sqrt(w) as they are read.
    column_scale : tuple of float or None
        Factors the columns of A are multiplied by as they are read (equilibration).
    first_row : int
        First row the plan covers (0, or the rows an earlier result consumed, for update).
    sparse : bool
        True when ``matrix`` is a CSR group (see :mod:`rowfold.storage.csr`).
    fixed_columns : tuple of int
        Columns of the input left out as they are read (``input.fixed_columns``, held
        fixed at zero); ``cols`` counts the kept ones, in input order.
    """

    matrix: ArrayRef
    rhs: ArrayRef | None
    rows: int
    cols: int
    rhs_cols: int
    rhs_1d: bool
    dtype: str
    per_block: int
    first_row: int = 0
    weights: ArrayRef | None = None
    column_scale: tuple[float, ...] | None = None
    sparse: bool = False
    fixed_columns: tuple[int, ...] = ()

    @property
    def blocks(self) -> int:
        """Number of row blocks (at least one, which may be empty)."""
        return max(1, -(-(self.rows - self.first_row) // self.per_block))

    def bound(self, index: int) -> tuple[int, int]:
        """Row range ``(start, stop)`` of block ``index``."""
        start = self.first_row + index * self.per_block
        return start, min(start + self.per_block, self.rows)

    @property
    def bounds(self) -> list[tuple[int, int]]:
        """Row ranges of every block, in order (for the client; tasks use :meth:`bound`).

        The plan stores only ``first_row`` and ``per_block``, so it stays a few hundred
        bytes however many blocks there are: every task carries it.
        """
        return [self.bound(i) for i in range(self.blocks)]

    @property
    def input_cols(self) -> int:
        """Columns of the matrix as stored (kept plus fixed)."""
        return self.cols + len(self.fixed_columns)

    @property
    def kept_columns(self) -> np.ndarray:
        """Input column numbers of the kept columns, ascending."""
        return np.setdiff1d(np.arange(self.input_cols), np.asarray(self.fixed_columns, int))

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Read block ``index`` of A and of the rhs (see :func:`load_block`)."""
        return load_block(self, index)

    def load_for_products(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Read block ``index`` in the file's own (C) order, for products only."""
        return load_block(self, index, "C")

    def load_sparse(self, index: int) -> tuple[sp.csr_matrix, np.ndarray | None]:
        """Read block ``index`` of a CSR matrix and of the rhs (see :func:`load_sparse_block`)."""
        return load_sparse_block(self, index)


# Rows copied at a time when reordering a block to Fortran layout (cache-sized pieces copy
# about 40% faster than one whole-block transpose; measured on 65,536 x 64 float64).
TRANSPOSE_ROWS = 512


def to_fortran(array: np.ndarray, dtype: Any = None) -> np.ndarray:
    """A Fortran-ordered copy of a 2-D array (in the given dtype), copied in row pieces."""
    if array.flags.f_contiguous and (dtype is None or array.dtype == np.dtype(dtype)):
        return array
    out = np.empty(array.shape, dtype=dtype or array.dtype, order="F")
    for start in range(0, array.shape[0], TRANSPOSE_ROWS):
        out[start : start + TRANSPOSE_ROWS] = array[start : start + TRANSPOSE_ROWS]
    return out


def load_for_products(source: BlockSource, index: int) -> tuple[np.ndarray, np.ndarray | None]:
    """A block for Gram products, triangular solves and residuals, in whichever layout
    costs no copy (a plan's blocks come in the file's C order)."""
    if isinstance(source, BlockPlan):
        return source.load_for_products(index)
    return source.load(index)


class BlockSource(Protocol):
    """Anything that yields row blocks of a tall matrix by index, inside a task.

    :class:`BlockPlan` is the source of the input itself; methods derive others (e.g. a
    column panel minus its projection on earlier panels). Sources must be small, frozen
    and picklable: tasks carry them to the workers.
    """

    @property
    def blocks(self) -> int:
        """Number of row blocks."""
        ...

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Return (block, rhs block or None) for block ``index``."""
        ...


def working_dtype(info: ArrayInfo | CsrInfo, native: bool = False) -> np.dtype:
    """Return the dtype rowfold computes in for an input dtype.

    float64/complex128 by default; with ``native`` (``method.precision: native``),
    float32 and complex64 inputs keep their single precision.

    Raises
    ------
    InputError
        For non-numeric dtypes.
    """
    dtype = np.dtype(info.dtype)
    if native and dtype in (np.dtype(np.float32), np.dtype(np.complex64)):
        return dtype
    if dtype.kind == "c":
        return np.dtype(np.complex128)
    if dtype.kind in "fiu":
        return np.dtype(np.float64)
    raise InputError(
        f"{info.ref.describe()}: dtype {dtype} is not numeric; expected a float, integer "
        "or complex dataset"
    )


def choose_rows_per_block(rows: int, cols: int, itemsize: int, chunk_rows: int | None) -> int:
    """Pick rows per block for ``rows_per_block: auto``.

    Rule: about :data:`AUTO_BLOCK_BYTES` of A per block, at least ``MIN_ASPECT * n`` rows,
    rounded to a whole number of on-disk row chunks when the input is chunked by rows,
    and never more than m.
    """
    target = max(AUTO_BLOCK_BYTES // max(1, cols * itemsize), MIN_ASPECT * cols, 1)
    if chunk_rows and chunk_rows > 0:
        target = max(chunk_rows, (target // chunk_rows) * chunk_rows)
    return max(1, min(target, rows))


def load_block(
    plan: BlockPlan, index: int, layout: str = "F"
) -> tuple[np.ndarray, np.ndarray | None]:
    """Read block ``index`` of A (and of the rhs) in the working dtype.

    ``layout`` is ``"F"`` (Fortran order, what LAPACK's QR needs) or ``"C"`` (the order the
    file hands over: no copy; enough for Gram products, triangular solves and residuals).

    A CSR matrix is read as a CSR block (:func:`load_sparse_block`) and densified.

    Raises
    ------
    InputError
        When the block holds NaN or Inf; the message names the row block and the row.
        For a CSR matrix also when the block's arrays are inconsistent.
    """
    if plan.sparse:
        block, b = load_sparse_block(plan, index)
        return block.toarray(order=layout), b
    start, stop = plan.bound(index)
    order = to_fortran if layout == "F" else np.ascontiguousarray
    a = order(read_rows(plan.matrix, start, stop), dtype=plan.dtype)
    _require_finite(a, plan.matrix, index, start)
    b = _load_rhs(plan, index)
    if plan.fixed_columns:
        a = order(a[:, plan.kept_columns])
    if plan.column_scale is not None:
        a *= np.asarray(plan.column_scale, dtype=a.real.dtype)
    if plan.weights is not None:
        root = np.sqrt(load_weights(plan, index))
        a *= root[:, None]
        if b is not None:
            b = b * root[:, None]
    return a, b


def load_sparse_block(plan: BlockPlan, index: int) -> tuple[sp.csr_matrix, np.ndarray | None]:
    """Read block ``index`` of a CSR matrix (and of the rhs) in the working dtype.

    The block is checked (``indptr`` non-decreasing, lengths that agree, column numbers
    in range, values finite), restricted to the kept columns, scaled and weighted like
    :func:`load_block`, and put in canonical form (sorted column numbers, no duplicates,
    no stored zeros).

    Raises
    ------
    InputError
        Naming the row block and the first bad row.
    """
    start, stop = plan.bound(index)
    data, indices, indptr = read_csr_rows(plan.matrix, start, stop)
    _check_csr_block(plan, index, data, indices, indptr)
    block = sparse_kernels.csr_block(data, indices, indptr, plan.input_cols, plan.dtype)
    b = _load_rhs(plan, index)
    if plan.fixed_columns:
        block = sparse_kernels.keep_columns(block, plan.kept_columns)
    columns = None
    if plan.column_scale is not None:
        columns = np.asarray(plan.column_scale, dtype=block.data.real.dtype)
    root = None
    if plan.weights is not None:
        root = np.sqrt(load_weights(plan, index))
        if b is not None:
            b = b * root[:, None]
    return sparse_kernels.canonical(sparse_kernels.scale(block, root, columns)), b


def _load_rhs(plan: BlockPlan, index: int) -> np.ndarray | None:
    """Read block ``index`` of the rhs as ``rows x k`` in the working dtype (unweighted)."""
    if plan.rhs is None:
        return None
    start, stop = plan.bound(index)
    b = read_rows(plan.rhs, start, stop).astype(plan.dtype, copy=False)
    b = b.reshape(stop - start, plan.rhs_cols)
    _require_finite(b, plan.rhs, index, start)
    return b


def _check_csr_block(
    plan: BlockPlan, index: int, data: np.ndarray, indices: np.ndarray, indptr: np.ndarray
) -> None:
    """Raise InputError unless one CSR row block is consistent and finite."""
    start, stop = plan.bound(index)
    where = f"{plan.matrix.describe()}: row block {index} (rows {start}..{stop - 1})"
    steps = np.diff(indptr)
    if steps.size and steps.min() < 0:
        at = int(np.flatnonzero(steps < 0)[0])
        raise InputError(
            f"{where}: indptr decreases at row {start + at} (giving it {int(steps[at])} "
            "stored values); indptr must be non-decreasing"
        )
    expected = int(indptr[-1]) if indptr.size else 0
    if data.shape[0] != expected or indices.shape[0] != expected:
        raise InputError(
            f"{where}: indptr gives {expected} stored values but data and indices hold "
            f"{data.shape[0]} and {indices.shape[0]} there; the CSR arrays disagree"
        )
    bad = np.flatnonzero((indices < 0) | (indices >= plan.input_cols))
    if bad.size:
        row = start + int(np.searchsorted(indptr, bad[0], side="right")) - 1
        raise InputError(
            f"{where}: column index {int(indices[bad[0]])} at row {row} is outside "
            f"0..{plan.input_cols - 1}; the matrix has {plan.input_cols} columns"
        )
    if np.dtype(data.dtype).kind in "fc" and not np.isfinite(data).all():
        first = int(np.flatnonzero(~np.isfinite(data))[0])
        row = start + int(np.searchsorted(indptr, first, side="right")) - 1
        raise InputError(f"{where} holds NaN or Inf, first at row {row}; clean or drop those rows")


def load_weights(plan: BlockPlan, index: int) -> np.ndarray:
    """Read block ``index`` of the weights as float64, checking that each is finite and >= 0.

    Raises
    ------
    InputError
        Naming the row block and the first bad row.
    """
    assert plan.weights is not None
    start, stop = plan.bound(index)
    w = np.asarray(read_rows(plan.weights, start, stop), dtype=np.float64).reshape(-1)
    bad = np.flatnonzero(~(np.isfinite(w) & (w >= 0)))
    if bad.size:
        row = start + int(bad[0])
        raise InputError(
            f"{plan.weights.describe()}: row block {index} (rows {start}..{stop - 1}): weight "
            f"{w[bad[0]]!r} at row {row}; weights must be finite and >= 0"
        )
    return w


def _require_finite(block: np.ndarray, ref: ArrayRef, index: int, start: int) -> None:
    """Raise InputError naming the first row with NaN or Inf."""
    finite = np.isfinite(block)
    if finite.all():
        return
    bad_rows = np.flatnonzero(~(finite if finite.ndim == 1 else finite.all(axis=1)))
    row = start + int(bad_rows[0])
    raise InputError(
        f"{ref.describe()}: row block {index} (rows {start}..{start + block.shape[0] - 1}) "
        f"holds NaN or Inf, first at row {row}; clean or drop those rows"
    )


def plan_blocks(
    matrix: ArrayInfo | CsrInfo,
    rhs: ArrayInfo | None,
    rows_per_block: int | None,
    native: bool = False,
    weights: ArrayInfo | None = None,
    fixed_columns: tuple[int, ...] = (),
) -> BlockPlan:
    """Validate the input shapes and cut them into row blocks.

    Parameters
    ----------
    matrix : ArrayInfo or CsrInfo
        Description of A: a dense array, or a CSR group (already checked structurally by
        :func:`rowfold.storage.describe_csr`).
    rhs : ArrayInfo or None
        Description of the right-hand sides.
    rows_per_block : int or None
        Rows per block; None chooses with :func:`choose_rows_per_block`.
    native : bool
        Keep single precision for float32/complex64 input (see :func:`working_dtype`).
    weights : ArrayInfo or None
        Per-row weights (1-D, length m, real).
    fixed_columns : tuple of int
        Input columns to leave out (``input.fixed_columns``).

    Raises
    ------
    InputError
        When A is not a non-empty 2-D matrix with m >= n (n counting the kept columns),
        the rhs does not match it, or a fixed column does not exist.
    """
    where = matrix.ref.describe()
    if len(matrix.shape) != 2:
        raise InputError(f"{where}: expected a 2-D matrix, found shape {matrix.shape}")
    rows, cols = matrix.shape
    if rows == 0 or cols == 0:
        raise InputError(f"{where}: the matrix is empty (shape {rows} x {cols})")
    fixed = _check_fixed(where, fixed_columns, cols)
    if rows < cols - len(fixed):
        raise InputError(
            f"{where}: expected at least as many rows as columns, found {rows} x "
            f"{cols - len(fixed)}" + (f" ({len(fixed)} fixed columns left out)" if fixed else "")
        )
    dtype = working_dtype(matrix, native)
    rhs_cols, rhs_1d = _check_rhs(rhs, rows)
    _check_weights(weights, rows)
    if rhs is not None:
        dtype = np.result_type(dtype, working_dtype(rhs, native))
    per_block = rows_per_block or choose_rows_per_block(
        rows, cols, np.dtype(dtype).itemsize, matrix.chunk_rows
    )
    return BlockPlan(
        matrix=matrix.ref,
        rhs=None if rhs is None else rhs.ref,
        rows=rows,
        cols=cols - len(fixed),
        rhs_cols=rhs_cols,
        rhs_1d=rhs_1d,
        dtype=np.dtype(dtype).str,
        per_block=per_block,
        weights=None if weights is None else weights.ref,
        sparse=isinstance(matrix, CsrInfo),
        fixed_columns=fixed,
    )


def _check_fixed(where: str, fixed_columns: tuple[int, ...], cols: int) -> tuple[int, ...]:
    """Return the fixed columns sorted, or raise InputError when one does not exist or
    none would be left."""
    fixed = tuple(sorted(set(fixed_columns)))
    outside = [j for j in fixed if not 0 <= j < cols]
    if outside:
        raise InputError(
            f"{where}: input.fixed_columns names column {outside[0]}, but the matrix has "
            f"columns 0..{cols - 1}"
        )
    if len(fixed) == cols:
        raise InputError(f"{where}: input.fixed_columns fixes all {cols} columns; keep one")
    return fixed


def expand_columns(plan: BlockPlan, array: np.ndarray, axes: tuple[int, ...] = (0,)) -> np.ndarray:
    """Put per-column results back in input column numbering, zeros for fixed columns.

    ``array`` has ``plan.cols`` entries along each axis in ``axes`` (e.g. ``x`` along 0,
    ``R`` or a covariance along (0, 1), or along (-2, -1) for a stack); the result has
    ``plan.input_cols`` there. A plan without fixed columns returns ``array`` itself.
    """
    if not plan.fixed_columns:
        return array
    kept = plan.kept_columns
    shape = list(array.shape)
    for axis in axes:
        shape[axis] = plan.input_cols
    out = np.zeros(shape, dtype=array.dtype)
    index: list[Any] = [slice(None)] * array.ndim
    grids = np.ix_(*[kept] * len(axes))
    for axis, grid in zip(axes, grids, strict=True):
        index[axis] = grid
    out[tuple(index)] = array
    return out


def _check_weights(weights: ArrayInfo | None, rows: int) -> None:
    """Raise InputError unless the weights are a real 1-D array of length m."""
    if weights is None:
        return
    where = weights.ref.describe()
    if len(weights.shape) != 1 or weights.shape[0] != rows:
        raise InputError(
            f"{where}: expected {rows} weights (one per row of A), found shape {weights.shape}"
        )
    if np.dtype(weights.dtype).kind not in "fiu":
        raise InputError(f"{where}: weights must be real numbers, found dtype {weights.dtype}")


def _check_rhs(rhs: ArrayInfo | None, rows: int) -> tuple[int, bool]:
    """Return (k, is_1d) for the right-hand sides, or raise InputError."""
    if rhs is None:
        return 0, False
    where = rhs.ref.describe()
    if len(rhs.shape) not in (1, 2):
        raise InputError(f"{where}: expected a 1-D or 2-D rhs, found shape {rhs.shape}")
    if rhs.shape[0] != rows:
        raise InputError(f"{where}: rhs has {rhs.shape[0]} rows, expected {rows} (rows of A)")
    k = 1 if len(rhs.shape) == 1 else rhs.shape[1]
    if k == 0:
        raise InputError(f"{where}: rhs has no columns")
    return k, len(rhs.shape) == 1
