"""Row blocks: how an input is cut, and the task-side function that loads one block.

A :class:`BlockPlan` is small, frozen and picklable: it holds references to the arrays
(path + dataset name), the row bounds of each block and the working dtype. Tasks call
:func:`load_block` with the plan and a block index; the worker opens the file itself.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

from rowfold.errors import InputError
from rowfold.storage import ArrayInfo, ArrayRef, read_rows

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
    bounds : tuple of (start, stop)
        Row range of each block, in order, covering ``[0, m)``.
    weights : ArrayRef or None
        Per-row weights w >= 0; rows of A and B are scaled by sqrt(w) as they are read.
    column_scale : tuple of float or None
        Factors the columns of A are multiplied by as they are read (equilibration).
    """

    matrix: ArrayRef
    rhs: ArrayRef | None
    rows: int
    cols: int
    rhs_cols: int
    rhs_1d: bool
    dtype: str
    bounds: tuple[tuple[int, int], ...]
    weights: ArrayRef | None = None
    column_scale: tuple[float, ...] | None = None

    @property
    def blocks(self) -> int:
        """Number of row blocks."""
        return len(self.bounds)

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Read block ``index`` of A and of the rhs (see :func:`load_block`)."""
        return load_block(self, index)


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


def working_dtype(info: ArrayInfo, native: bool = False) -> np.dtype:
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


def split_rows(rows: int, per_block: int) -> tuple[tuple[int, int], ...]:
    """Cut ``[0, rows)`` into consecutive ranges of ``per_block`` rows (last one ragged)."""
    if rows == 0:
        return ((0, 0),)
    return tuple((start, min(start + per_block, rows)) for start in range(0, rows, per_block))


def load_block(plan: BlockPlan, index: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Read block ``index`` of A (and of the rhs) in the working dtype, Fortran order.

    Raises
    ------
    InputError
        When the block holds NaN or Inf; the message names the row block and the row.
    """
    start, stop = plan.bounds[index]
    a = np.asfortranarray(read_rows(plan.matrix, start, stop), dtype=plan.dtype)
    _require_finite(a, plan.matrix, index, start)
    b = None
    if plan.rhs is not None:
        b = read_rows(plan.rhs, start, stop).astype(plan.dtype, copy=False)
        b = b.reshape(stop - start, plan.rhs_cols)
        _require_finite(b, plan.rhs, index, start)
    if plan.column_scale is not None:
        a *= np.asarray(plan.column_scale, dtype=a.real.dtype)
    if plan.weights is not None:
        root = np.sqrt(load_weights(plan, index))
        a *= root[:, None]
        if b is not None:
            b = b * root[:, None]
    return a, b


def load_weights(plan: BlockPlan, index: int) -> np.ndarray:
    """Read block ``index`` of the weights as float64, checking that each is finite and >= 0.

    Raises
    ------
    InputError
        Naming the row block and the first bad row.
    """
    assert plan.weights is not None
    start, stop = plan.bounds[index]
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
    bad_rows = np.flatnonzero(~finite.reshape(block.shape[0], -1).all(axis=1))
    row = start + int(bad_rows[0])
    raise InputError(
        f"{ref.describe()}: row block {index} (rows {start}..{start + block.shape[0] - 1}) "
        f"holds NaN or Inf, first at row {row}; clean or drop those rows"
    )


def plan_blocks(
    matrix: ArrayInfo,
    rhs: ArrayInfo | None,
    rows_per_block: int | None,
    native: bool = False,
    weights: ArrayInfo | None = None,
) -> BlockPlan:
    """Validate the input shapes and cut them into row blocks.

    Parameters
    ----------
    matrix : ArrayInfo
        Description of A.
    rhs : ArrayInfo or None
        Description of the right-hand sides.
    rows_per_block : int or None
        Rows per block; None chooses with :func:`choose_rows_per_block`.
    native : bool
        Keep single precision for float32/complex64 input (see :func:`working_dtype`).
    weights : ArrayInfo or None
        Per-row weights (1-D, length m, real).

    Raises
    ------
    InputError
        When A is not a non-empty 2-D matrix with m >= n, or the rhs does not match it.
    """
    where = matrix.ref.describe()
    if len(matrix.shape) != 2:
        raise InputError(f"{where}: expected a 2-D matrix, found shape {matrix.shape}")
    rows, cols = matrix.shape
    if rows == 0 or cols == 0:
        raise InputError(f"{where}: the matrix is empty (shape {rows} x {cols})")
    if rows < cols:
        raise InputError(
            f"{where}: expected at least as many rows as columns, found {rows} x {cols}"
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
        cols=cols,
        rhs_cols=rhs_cols,
        rhs_1d=rhs_1d,
        dtype=np.dtype(dtype).str,
        bounds=split_rows(rows, per_block),
        weights=None if weights is None else weights.ref,
    )


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
