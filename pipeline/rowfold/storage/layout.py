"""How a result store is laid out for the ecosystem's readers: dimension names, array
attributes, HDF5 dimension scales, native JSON attributes and Zarr consolidated metadata.

Every array of a result has named dimensions, so that ``xarray.open_dataset`` (HDF5, read
through h5netcdf or netCDF-4) and ``xarray.open_zarr`` give a dataset with the right
dimensions and no ``phony_dim_*``. The shape rule for per-rhs arrays is one for all of them:
a 1-D rhs gives ``x``, ``x_stderr``, ``qhb`` of shape (n,) and ``residuals`` and the
standardized and studentized residuals of shape (m,); a rhs of k columns adds a trailing
``rhs`` dimension (k) to each.

Dimensions of the root group: ``rows`` (m), ``columns`` (the input's n columns, labelled with
the parameter names), ``columns_i`` (the second axis of n x n arrays: R's rows and the
covariance's other axis, labelled too), ``kept_columns`` (the columns left after
``input.fixed_columns``: Q's columns) and ``rhs`` (k). The ``state`` group (what ``update``
needs, in working coordinates) has ``kept_columns``, ``kept_columns_i``, ``rhs``, ``rhs_i``,
``digest_blocks``, ``bound`` and ``digest_bytes``. The ``segments`` group (one item per
live segment, :mod:`rowfold.segments`) has ``segments``, ``augmented`` and ``augmented_i``
(n+k: the columns of ``[A | b]``), ``kept_columns`` and ``kept_columns_i``.
"""

from __future__ import annotations

import json
import math
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

# name -> (dimension names of the 1-D form, of the 2-D form, ...); index = ndim - 1
_PER_RHS_COLUMNS = (("columns",), ("columns", "rhs"))
_PER_RHS_ROWS = (("rows",), ("rows", "rhs"))
DIMENSIONS: dict[str, tuple[tuple[str, ...], ...]] = {
    "R": ((), ("columns_i", "columns")),
    "x": _PER_RHS_COLUMNS,
    "x_stderr": _PER_RHS_COLUMNS,
    "qhb": _PER_RHS_COLUMNS,
    "x_covariance": ((), ("columns", "columns_i"), ("rhs", "columns", "columns_i")),
    "Q": ((), ("rows", "kept_columns")),
    "residuals": _PER_RHS_ROWS,
    "standardized_residuals": _PER_RHS_ROWS,
    "studentized_residuals": _PER_RHS_ROWS,
    "leverage": (("rows",),),
    "redundancy": (("rows",),),
    "state/R": ((), ("kept_columns_i", "kept_columns")),
    "state/gram": ((), ("kept_columns_i", "kept_columns")),
    "state/qhb": (("kept_columns",), ("kept_columns", "rhs")),
    "state/residual_factor": ((), ("rhs_i", "rhs")),
    "state/column_scale": (("kept_columns",),),
    "state/digest_bounds": ((), ("digest_blocks", "bound")),
    "segments/factor": ((), (), ("segments", "augmented_i", "augmented")),
    "segments/gram": ((), (), ("segments", "kept_columns_i", "kept_columns")),
}
_DIGEST_DIMS = ((), ("digest_blocks", "digest_bytes"))

# name -> (long_name, units or None when the input's units are not known)
DESCRIPTIONS: dict[str, tuple[str, str | None]] = {
    "R": ("triangular factor R of A (A = QR), input columns, fixed columns as zeros", None),
    "x": ("least-squares solution x minimising ||W^(1/2) (A x - b)||", None),
    "x_stderr": ("standard error of each parameter (a posteriori)", None),
    "qhb": ("Q^H b, the rhs projected on the column space", None),
    "x_covariance": ("covariance matrix of the parameters (a posteriori)", None),
    "Q": ("orthonormal factor Q (kept columns)", "1"),
    "residuals": ("residual b - A x (weighted rows)", None),
    "standardized_residuals": ("residual divided by its a priori standard deviation", "1"),
    "studentized_residuals": ("externally studentized residual (leave one out)", "1"),
    "leverage": ("leverage: diagonal of the hat matrix", "1"),
    "redundancy": ("redundancy number of each observation", "1"),
}

_NETCDF_DIMENSION_ONLY = "This is a netCDF dimension but not a netCDF variable."


def dimension_names(name: str, ndim: int) -> tuple[str, ...]:
    """The dimension names of array ``name`` with ``ndim`` dimensions.

    An array this table does not know gets ``<name>_dim<i>`` names, so none is unnamed.
    """
    forms = DIMENSIONS.get(name)
    if forms is None and name.startswith("state/digest_"):
        forms = _DIGEST_DIMS
    if forms is not None and 0 < ndim <= len(forms) and len(forms[ndim - 1]) == ndim:
        return forms[ndim - 1]
    base = name.rpartition("/")[2]
    return tuple(f"{base}_dim{i}" for i in range(ndim))


def array_attrs(name: str) -> dict[str, str]:
    """``long_name`` and, where known, ``units`` (CF's "1" for dimensionless)."""
    described = DESCRIPTIONS.get(name)
    if described is None:
        return {}
    long_name, units = described
    return {"long_name": long_name} if units is None else {"long_name": long_name, "units": units}


def json_value(value: Any) -> Any:
    """``value`` as plain JSON data (dicts, lists, numbers, text, null).

    NumPy scalars and arrays become numbers and lists; NaN and infinities become null,
    since JSON has no spelling for them; anything else becomes its text.
    """
    if isinstance(value, Mapping):
        return {str(k): json_value(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_value(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_value(value.tolist())
    if isinstance(value, np.generic):
        return json_value(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, complex):
        return {"re": json_value(value.real), "im": json_value(value.imag)}
    if value is None or isinstance(value, bool | int | float | str):
        return value
    return str(value)


def attach_scales(
    handle: Any,
    sizes: Mapping[str, Mapping[str, int]],
    arrays: Mapping[str, tuple[str, ...]],
    labelled: set[str],
) -> None:
    """Make HDF5 dimension scales for every named dimension and attach them.

    A dimension with labels (:meth:`ResultWriter.put_labels`) is its own scale; any other
    becomes a netCDF-4 "dimension only" scale (no stored data), as netCDF readers expect.
    """
    scales: dict[tuple[str, str], Any] = {}
    for group, dims in sizes.items():
        for dim, size in dims.items():
            path = f"{group}/{dim}" if group else dim
            if group == "" and dim in labelled:
                scale = handle[path]
            else:
                scale = handle.create_dataset(path, shape=(size,), dtype="f4")
                scale.attrs["NAME"] = np.bytes_(f"{_NETCDF_DIMENSION_ONLY}{size:>10}")
            scale.make_scale(dim)
            scales[group, dim] = scale
    for name, array_dims in arrays.items():
        group = name.rpartition("/")[0]
        if group == "" and name in labelled:
            continue
        dataset = handle[name]
        for axis, dim in enumerate(array_dims):
            dataset.dims[axis].attach_scale(scales[group, dim])


def is_dimension_only(dataset: Any) -> bool:
    """Whether an HDF5 dataset is a netCDF-4 dimension without data (not an array of ours)."""
    name = dataset.attrs.get("NAME")
    if isinstance(name, bytes | np.bytes_):
        name = name.decode("ascii", "replace")
    return isinstance(name, str) and name.startswith(_NETCDF_DIMENSION_ONLY)


def consolidate(path: Path) -> None:
    """Write a Zarr store's consolidated metadata (what ``xarray.open_zarr`` reads first)."""
    import zarr

    with warnings.catch_warnings():  # not yet in the v3 spec; xarray and zarr read it
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(path))


def to_json_text(value: Any) -> str:
    """JSON text of ``value`` (for HDF5 attributes)."""
    return json.dumps(json_value(value), sort_keys=True)
