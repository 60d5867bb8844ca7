"""Storage: every file handle rowfold opens lives here.

Inputs are read by row range from HDF5 or Zarr (:mod:`.inputs`); results and reports are
written atomically (:mod:`.results`). Nothing here knows about Dask.
"""

from rowfold.storage.inputs import (
    ArrayInfo,
    ArrayRef,
    describe_array,
    fingerprint,
    read_rows,
    write_arrays,
)
from rowfold.storage.results import (
    ResultWriter,
    check_output_path,
    describe_path,
    read_result,
    remove_litter,
    report_paths,
    scratch_folder,
)

__all__ = [
    "ArrayInfo",
    "ArrayRef",
    "ResultWriter",
    "check_output_path",
    "describe_array",
    "describe_path",
    "fingerprint",
    "read_result",
    "read_rows",
    "remove_litter",
    "report_paths",
    "scratch_folder",
    "write_arrays",
]
