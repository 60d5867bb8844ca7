"""Sparse inputs: a CSR group in HDF5 or Zarr, read by row range.

A CSR matrix is a group holding three 1-D arrays, ``data`` (the stored values),
``indices`` (their column numbers) and ``indptr`` (m + 1 offsets: row i owns
``data[indptr[i]:indptr[i + 1]]``), and an attribute ``shape = [m, n]``. The encoding
attributes of the scientific-Python ecosystem's on-disk sparse convention
(``encoding-type: csr_matrix``, ``encoding-version: 0.1.0``) are written too, and groups
written by other tools in that convention are read as they are; a group that declares
another encoding (``csc_matrix``: column-compressed, the same three arrays meaning something
else) or version is refused rather than misread. Rows
``[start, stop)`` are read by slicing ``indptr[start:stop + 1]`` and then the matching range
of ``indices`` and ``data``, so a worker reads only its own rows.

:func:`describe_csr` makes the cheap structural checks (the arrays exist and are 1-D, their
lengths agree with each other and with ``shape``, their dtypes can be read) without reading
the arrays; the per-block checks (``indptr`` non-decreasing, column numbers in range) belong
to the task that loads the block (:mod:`rowfold.blocks`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from rowfold.errors import InputError
from rowfold.storage import locations
from rowfold.storage.backends import ChunkCheck, input_backend
from rowfold.storage.chunks import row_range
from rowfold.storage.inputs import (
    _HDF5_LOCK,
    HDF5_SUFFIXES,
    KEEP_EVERY_CHUNK,
    TEXT,
    ArrayInfo,
    ArrayRef,
    _log_read,
    _missing,
    describe_array,
    forget_input,
    require_location,
)

CSR_ARRAYS = ("data", "indices", "indptr")
"""The arrays a CSR group holds."""

ENCODING = {"encoding-type": "csr_matrix", "encoding-version": "0.1.0"}
"""The group attributes of the on-disk sparse convention that describe our layout."""

WRITE_CHUNK = 1 << 16
"""Elements (rows, for the arrays beside the group) per on-disk chunk of every array
:func:`write_csr` writes. Fixed, whatever the length, so that the chunks of rows already
written keep their stored bytes when the group is written again with more rows (``update``
compares those bytes), and growable (HDF5 ``maxshape`` None)."""


@dataclass(frozen=True, slots=True)
class CsrInfo:
    """Shape and dtypes of a CSR group, read from its metadata only.

    Attributes
    ----------
    ref : ArrayRef
        The group (path + group name).
    shape : tuple of int
        ``(m, n)`` from the ``shape`` attribute.
    dtype : str
        numpy dtype string of ``data``.
    nnz : int
        Stored values (length of ``data`` and ``indices``).
    index_dtype : str
        numpy dtype string of ``indices``.
    chunk_rows : None
        Always None: a CSR group is not chunked by rows (kept so that block planning can
        treat dense and sparse descriptions alike).
    """

    ref: ArrayRef
    shape: tuple[int, ...]
    dtype: str
    nnz: int
    index_dtype: str
    chunk_rows: int | None = None


def _encoding(attrs: Any) -> dict[str, Any]:
    """The group's encoding attributes (text; absent ones left out)."""
    found = {}
    for key in ENCODING:
        value = attrs.get(key)
        if isinstance(value, bytes | np.bytes_):
            value = value.decode("utf-8", "replace")
        if value is not None:
            found[key] = value
    return found


def _members(ref: ArrayRef) -> dict[str, Any] | None:
    """Open the file and describe ``ref``: None when it is a dataset (dense input)."""
    require_location(ref)
    backend = input_backend(ref)
    try:
        found = backend.group_members(ref, ("shape", *ENCODING))
    except KeyError:
        raise _missing(ref) from None
    except Exception as exc:
        raise InputError(
            f"{ref.path}: cannot open as {backend.kind} "
            f"({locations.failure(exc, ref.storage_options)})"
        ) from None
    if found is None:
        return None
    arrays, attrs = found
    return {"arrays": arrays, "shape": attrs.get("shape"), **_encoding(attrs)}


def is_csr(ref: ArrayRef) -> bool:
    """True when ``ref`` names a group (a CSR matrix), False for a dense dataset."""
    return _members(ref) is not None


def describe_matrix(ref: ArrayRef) -> ArrayInfo | CsrInfo:
    """Describe the matrix ``ref`` names: a dense dataset or a CSR group, found by looking.

    Raises
    ------
    InputMissingError
        When the file or the name does not exist.
    InputError
        When a CSR group fails a structural check (see :func:`describe_csr`).
    """
    members = _members(ref)
    if members is None:
        return describe_array(ref)
    return _check_group(ref, members)


def describe_csr(ref: ArrayRef) -> CsrInfo:
    """Describe a CSR group and make the structural checks, without reading its arrays
    (beyond the first and last ``indptr`` entries).

    Raises
    ------
    InputError
        When an array is missing, not 1-D or of a dtype that cannot be read; when the
        ``shape`` attribute is missing or not two whole numbers; when ``indptr`` does not
        have m + 1 entries from 0 to nnz; when ``indices`` and ``data`` differ in length.
    """
    members = _members(ref)
    if members is None:
        raise InputError(f"{ref.describe()}: expected a CSR group, found a dataset")
    return _check_group(ref, members)


def _check_encoding(where: str, members: dict[str, Any]) -> None:
    """Refuse a group that declares an encoding other than ours (it would be misread)."""
    kind = members.get("encoding-type")
    if kind is not None and kind != ENCODING["encoding-type"]:
        raise InputError(
            f"{where}: attribute encoding-type is {kind!r}; only csr_matrix (row-compressed) "
            "groups are read; convert it to CSR (e.g. scipy.sparse's tocsr) and write it again"
        )
    version = members.get("encoding-version")
    if kind is not None and version is not None and version != ENCODING["encoding-version"]:
        raise InputError(
            f"{where}: attribute encoding-version is {version!r}; csr_matrix version "
            f"{ENCODING['encoding-version']} is the one read"
        )


def _check_group(ref: ArrayRef, members: dict[str, Any]) -> CsrInfo:
    where = ref.describe()
    _check_encoding(where, members)
    arrays: dict[str, tuple[tuple[int, ...], str]] = members["arrays"]
    missing = [name for name in CSR_ARRAYS if name not in arrays]
    if missing:
        found = ", ".join(sorted(arrays)) or "none"
        raise InputError(
            f"{where}: a CSR group needs arrays data, indices and indptr; "
            f"missing {', '.join(missing)} (found: {found})"
        )
    shape = _shape_attr(where, members["shape"])
    for name in CSR_ARRAYS:
        if len(arrays[name][0]) != 1:
            raise InputError(f"{where}/{name}: expected a 1-D array, found shape {arrays[name][0]}")
    for name in ("indices", "indptr"):
        if np.dtype(arrays[name][1]).kind not in "iu":
            raise InputError(
                f"{where}/{name}: dtype {np.dtype(arrays[name][1])} cannot be read as "
                "column numbers or offsets; expected an integer dtype"
            )
    nnz = arrays["data"][0][0]
    if arrays["indices"][0][0] != nnz:
        raise InputError(
            f"{where}: indices has {arrays['indices'][0][0]} entries but data has {nnz}; "
            "the CSR arrays disagree"
        )
    m = shape[0]
    if arrays["indptr"][0][0] != m + 1:
        raise InputError(
            f"{where}/indptr: expected m + 1 = {m + 1} entries (shape {list(shape)}), "
            f"found {arrays['indptr'][0][0]}"
        )
    indptr = ref.part("indptr")
    first, last = input_backend(indptr).read_ends(indptr, m)
    if first != 0 or last != nnz:
        raise InputError(
            f"{where}/indptr: expected to run from 0 to nnz = {nnz}, found {first} .. {last}"
        )
    return CsrInfo(ref, shape, arrays["data"][1], nnz, arrays["indices"][1])


def _shape_attr(where: str, raw: Any) -> tuple[int, int]:
    """The ``shape`` attribute as (m, n), or InputError."""
    if raw is None:
        raise InputError(f"{where}: CSR group has no 'shape' attribute; expected [m, n]")
    values = np.asarray(raw).reshape(-1)
    if values.size != 2 or values.dtype.kind not in "iuf" or np.any(values != np.round(values)):
        raise InputError(f"{where}: attribute 'shape' must be [m, n], found {raw!r}")
    m, n = (int(v) for v in values)
    if m < 0 or n < 0:
        raise InputError(f"{where}: attribute 'shape' must be >= 0, found [{m}, {n}]")
    return m, n


def read_csr_rows(
    ref: ArrayRef, start: int, stop: int, purpose: str = "data"
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read rows ``[start, stop)`` of a CSR group.

    Parameters
    ----------
    ref : ArrayRef
        The group. An HDF5 file stays open for the job's later reads (see
        :func:`rowfold.storage.inputs.open_dataset`); a Zarr store is opened for each read.
    start, stop : int
        Row range.
    purpose : str
        Recorded in the read log (``ROWFOLD_READ_LOG``): ``data`` or ``digest-rows``.

    Returns
    -------
    data, indices : numpy.ndarray
        The stored values (own dtype) and their column numbers (int64) of those rows.
    indptr : numpy.ndarray
        ``stop - start + 1`` offsets into them (int64), rebased to start at 0. When the
        ``indptr`` slice on disk decreases anywhere this is returned as read (rebased) with
        ``data`` and ``indices`` empty; checking it is the caller's job.

    Raises
    ------
    InputError
        When the arrays cannot be read.
    """
    _log_read(ref, start, stop, purpose)
    try:
        with input_backend(ref).csr_parts(ref) as (group, check):
            return _read_from(group, start, stop, check)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(
            f"{ref.describe()}: rows {start}..{stop - 1} cannot be read "
            f"({locations.failure(exc, ref.storage_options)})"
        ) from None


def require_csr_chunks(ref: ArrayRef, start: int, stop: int) -> None:
    """Raise InputError when a stored chunk holding rows ``[start, stop)`` of a CSR group is
    missing (named by the matrix rows that own its entries); reads only ``indptr``."""
    if not ref.checks_chunks:
        return
    with input_backend(ref).csr_parts(ref) as (group, check):
        _check_parts(group, start, stop, check)


def _check_parts(group: Mapping[str, Any], start: int, stop: int, check: ChunkCheck | None) -> None:
    """Run ``check`` over the indptr entries of rows ``[start, stop)`` and the value ranges
    they point to."""
    if check is None:
        return
    check("indptr", start, stop + 1, row_range)
    ptr = np.asarray(group["indptr"][start : stop + 1], dtype=np.int64)
    lo, hi = (int(ptr[0]), int(ptr[-1])) if ptr.size else (0, 0)
    if 0 <= lo <= hi:
        for part in ("data", "indices"):
            check(part, lo, hi, _entries(ptr, start, lo, hi))


def _entries(ptr: np.ndarray, start: int, lo: int, hi: int) -> Callable[[int, int], str]:
    """Describe a range of stored values by the matrix rows that own them."""

    def describe(first: int, end: int) -> str:
        first, end = max(first, lo), min(end, hi)
        rows = start + np.searchsorted(ptr, [first, end - 1], side="right") - 1
        return f"entries {first}..{end - 1}, rows {int(rows[0])}..{int(rows[1])}"

    return describe


def _read_from(
    group: Mapping[str, Any], start: int, stop: int, check: ChunkCheck | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if check is not None:
        check("indptr", start, stop + 1, row_range)
    ptr = np.asarray(group["indptr"][start : stop + 1], dtype=np.int64)
    lo, hi = (int(ptr[0]), int(ptr[-1])) if ptr.size else (0, 0)
    if lo < 0 or hi < lo or np.any(np.diff(ptr) < 0):
        data = np.zeros(0, dtype=group["data"].dtype)
        return data, np.zeros(0, dtype=np.int64), ptr - lo
    if check is not None:
        for part in ("data", "indices"):
            check(part, lo, hi, _entries(ptr, start, lo, hi))
    data = np.asarray(group["data"][lo:hi])
    indices = np.asarray(group["indices"][lo:hi], dtype=np.int64)
    return data, indices, ptr - lo


def write_csr(
    path: str | Path,
    group: str,
    matrix: Any,
    extra_arrays: dict[str, np.ndarray] | None = None,
) -> None:
    """Write a sparse matrix into the CSR layout rowfold reads (HDF5 or Zarr).

    Parameters
    ----------
    path : str or Path
        ``.h5``/``.hdf5`` file or ``.zarr`` store; created if missing, else opened for
        appending (other arrays in it are kept).
    group : str
        Group to write, e.g. ``network/A``; replaced if present. Name it in
        ``input.matrix``.
    matrix : scipy.sparse matrix or array
        Any scipy.sparse format (converted to CSR), or a dense 2-D array.
    extra_arrays : dict, optional
        Further arrays to write beside it (e.g. ``{"network/b": b, "network/w": w}``);
        each replaced if present.

    Examples
    --------
    >>> import scipy.sparse as sp
    >>> write_csr("levels.h5", "network/A", sp.random(1000, 20, density=0.1))  # doctest: +SKIP
    """
    import scipy.sparse as sp

    csr = sp.csr_array(matrix)
    arrays = {
        f"{group}/data": csr.data,
        f"{group}/indices": csr.indices,
        f"{group}/indptr": csr.indptr,
    }
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    shape = np.asarray(csr.shape, dtype=np.int64)
    extra = dict(extra_arrays or {})
    if target.suffix.lower() in HDF5_SUFFIXES:
        _write_hdf5(target, group, shape, arrays, extra)
    else:
        _write_zarr(target, group, shape, arrays, extra)


def _chunk(array: np.ndarray) -> tuple[int, ...]:
    return (WRITE_CHUNK, *array.shape[1:])


def _write_hdf5(
    target: Path,
    group: str,
    shape: np.ndarray,
    arrays: dict[str, np.ndarray],
    extra: dict[str, np.ndarray],
) -> None:
    forget_input(target)
    with _HDF5_LOCK, h5py.File(target, "a") as handle:
        for name in (group, *extra):
            if name in handle:
                del handle[name]
        created = handle.create_group(group)
        created.attrs["shape"] = shape
        created.attrs.update(ENCODING)
        for name, array in {**arrays, **extra}.items():
            if array.dtype.kind in "UO":  # text, e.g. parameter names
                handle.create_dataset(name, data=array.astype(object), dtype=TEXT)
                continue
            handle.create_dataset(
                name, data=array, chunks=_chunk(array), maxshape=(None, *array.shape[1:])
            )


def _write_zarr(
    target: Path,
    group: str,
    shape: np.ndarray,
    arrays: dict[str, np.ndarray],
    extra: dict[str, np.ndarray],
) -> None:
    import zarr

    root = zarr.open_group(str(target), mode="a")
    for name in (group, *extra):
        if name in root:
            del root[name]
    created = root.require_group(group)
    created.attrs.update({"shape": [int(v) for v in shape], **ENCODING})
    for name, array in {**arrays, **extra}.items():
        out = root.create_array(
            name,
            shape=array.shape,
            dtype=str if array.dtype.kind in "UO" else array.dtype,
            chunks=_chunk(array),
            config=KEEP_EVERY_CHUNK,
        )
        out[...] = array
