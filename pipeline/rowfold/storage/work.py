"""Scratch arrays that a method fills while it runs (e.g. Q built panel by panel).

Each scratch array lives in a Zarr v3 group ``scratch.zarr`` inside the job's scratch
folder and is chunked as one chunk per row block at full width, so tasks that write
different row blocks never touch the same chunk. Tasks receive the :class:`ArrayRef`
(plain strings), never an open handle: :func:`write_rows` opens the array inside the task,
and reading goes through :func:`rowfold.storage.inputs.read_rows`.
"""

from __future__ import annotations

import os
import stat
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rowfold.errors import RunError
from rowfold.storage.inputs import ArrayRef, read_rows

SCRATCH_GROUP = "scratch.zarr"


def create_work_array(
    folder: str | Path, name: str, rows: int, cols: int, dtype: Any, chunk_rows: int
) -> ArrayRef:
    """Create (or replace) a zero-filled scratch array and return its reference.

    Parameters
    ----------
    folder : str or Path
        The scratch folder (the runner creates it exclusively); created when missing, in
        an existing parent. A link there is refused, never followed.
    name : str
        Array name inside the scratch group.
    rows, cols : int
        Shape of the array.
    dtype : dtype-like
        Element type.
    chunk_rows : int
        Rows per chunk; use the rows per block so each row block owns one chunk.

    Returns
    -------
    ArrayRef
        Absolute path of the scratch group and the array name.

    Raises
    ------
    RunError
        When the array cannot be created.
    """
    import zarr

    target = Path(os.path.abspath(folder)) / SCRATCH_GROUP
    try:
        _own_folder(target.parent)
        group = zarr.open_group(str(target), mode="a", zarr_format=3)
        group.create_array(
            name,
            shape=(rows, cols),
            dtype=np.dtype(dtype),
            chunks=(max(1, chunk_rows), max(1, cols)),
            fill_value=0,
            compressors=None,
            overwrite=True,
        )
    except Exception as exc:
        raise RunError(
            f"{target}: cannot create the scratch array '{name}' "
            f"({exc.__class__.__name__}: {exc}); check that the output folder is writable"
        ) from None
    # zero-filled by design: a chunk no task has written yet reads as zeros
    return ArrayRef(str(target), name, missing_chunks="fill_value")


def _own_folder(folder: Path) -> None:
    """Create ``folder`` (not its parents) or accept it if it is a real folder, not a link."""
    try:
        os.mkdir(folder)
    except FileExistsError:
        if not stat.S_ISDIR(os.lstat(folder).st_mode):
            raise NotADirectoryError(f"{folder} is a link or a file, not a folder") from None


def write_rows(ref: ArrayRef, start: int, block: np.ndarray, col_start: int = 0) -> None:
    """Write ``block`` into rows ``start..`` and columns ``col_start..`` of a scratch array.

    Opens the array in ``r+`` mode, writes, and keeps nothing open. A block with no rows
    writes nothing.

    Raises
    ------
    RunError
        When the rows cannot be written.
    """
    rows, cols = block.shape
    if rows == 0 or cols == 0:
        return
    import zarr

    try:
        array = zarr.open_array(store=ref.path, path=ref.name, mode="r+")
        array[start : start + rows, col_start : col_start + cols] = block
    except Exception as exc:
        raise RunError(
            f"{ref.describe()}: rows {start}..{start + rows - 1} cannot be written "
            f"({exc.__class__.__name__}: {exc})"
        ) from None


@dataclass(frozen=True, slots=True)
class ScratchArray:
    """A scratch row array as a task carries it: its reference, never an open handle.

    Implements :class:`rowfold.methods.base.RowArray`: each call opens the array, reads or
    writes, and keeps nothing open.

    Attributes
    ----------
    ref : ArrayRef
        The scratch group and the array name.
    """

    ref: ArrayRef

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)``."""
        return np.asarray(read_rows(self.ref, start, stop))

    def write(self, start: int, block: np.ndarray, col_start: int = 0) -> None:
        """Write ``block`` at rows ``start..`` and columns ``col_start..``."""
        write_rows(self.ref, start, block, col_start)


@dataclass(frozen=True, slots=True)
class ScratchFolder:
    """The job's scratch folder as methods see it (:class:`rowfold.methods.base.Scratch`).

    Attributes
    ----------
    folder : Path
        The folder the runner created exclusively beside the output.
    """

    folder: Path

    def create(self, name: str, rows: int, cols: int, dtype: Any, chunk_rows: int) -> ScratchArray:
        """A new zero-filled ``rows x cols`` array (see :func:`create_work_array`)."""
        return ScratchArray(create_work_array(self.folder, name, rows, cols, dtype, chunk_rows))
