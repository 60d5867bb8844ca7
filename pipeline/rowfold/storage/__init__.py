"""Storage: every file handle rowfold opens lives here.

Inputs are read by row range from HDF5 or Zarr, dense (:mod:`.inputs`) or as a CSR group
(:mod:`.csr`); results and reports are committed together (:mod:`.results`, with the
protocol in :mod:`.commit` and one writer per output by :mod:`.locks`). Nothing here
knows about Dask. ``fingerprint`` and ``same_prefix`` are the format-aware ones from
:mod:`.csr`.
"""

from rowfold.storage.csr import (
    CsrInfo,
    describe_csr,
    describe_matrix,
    fingerprint,
    is_csr,
    read_csr_rows,
    same_prefix,
    write_csr,
)
from rowfold.storage.inputs import (
    ArrayInfo,
    ArrayRef,
    close_open_inputs,
    describe_array,
    read_rows,
    write_arrays,
)
from rowfold.storage.locks import OutputBusyError
from rowfold.storage.results import (
    ResultWriter,
    check_output_path,
    claim_output,
    describe_path,
    is_result,
    open_output,
    read_result,
    read_state,
    recover_if_idle,
    recover_output,
    report_paths,
    scratch_folder,
    write_text_atomic,
)

__all__ = [
    "ArrayInfo",
    "ArrayRef",
    "CsrInfo",
    "OutputBusyError",
    "ResultWriter",
    "check_output_path",
    "claim_output",
    "close_open_inputs",
    "describe_array",
    "describe_csr",
    "describe_matrix",
    "describe_path",
    "fingerprint",
    "is_csr",
    "is_result",
    "open_output",
    "read_csr_rows",
    "read_result",
    "read_rows",
    "read_state",
    "recover_if_idle",
    "recover_output",
    "report_paths",
    "same_prefix",
    "scratch_folder",
    "write_arrays",
    "write_csr",
    "write_text_atomic",
]
