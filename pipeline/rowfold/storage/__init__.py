"""Storage: every file handle rowfold opens lives here.

Inputs are read by row range from HDF5 or Zarr, dense (:mod:`.inputs`) or as a CSR group
(:mod:`.csr`); results and reports are committed together (:mod:`.results`, with the
protocol in :mod:`.commit` and one writer per output by :mod:`.locks`). Nothing here
knows about Dask. Row-block digests of inputs (what ``update`` and ``run --resume`` check)
are in :mod:`.digests`, first-pass checkpoints in :mod:`.checkpoints`. What a result
store holds under which names (answer, update state, segments) is :mod:`.result_store`.
"""

from rowfold.storage.csr import (
    CsrInfo,
    describe_csr,
    describe_matrix,
    is_csr,
    read_csr_rows,
    write_csr,
)
from rowfold.storage.digests import (
    block_digests,
    digest_arrays,
    extend_records,
    input_layout,
    input_record,
    layout_change,
    public_record,
    replace_blocks,
    stored_records,
)
from rowfold.storage.inputs import (
    ArrayInfo,
    ArrayRef,
    close_open_inputs,
    describe_array,
    read_names,
    read_rows,
    write_arrays,
)
from rowfold.storage.locks import OutputBusyError
from rowfold.storage.result_store import (
    SEGMENT_FACTORS,
    SEGMENT_GRAMS,
    AnswerArrays,
    StateArrays,
    write_answer,
    write_segments,
    write_state,
)
from rowfold.storage.results import (
    ResultWriter,
    check_output_path,
    claim_output,
    describe_path,
    is_result,
    open_output,
    read_item,
    read_result,
    read_state,
    recover_if_idle,
    recover_output,
    report_paths,
    scratch_folder,
    write_text_atomic,
)
from rowfold.storage.work import ScratchArray, ScratchFolder

__all__ = [
    "SEGMENT_FACTORS",
    "SEGMENT_GRAMS",
    "AnswerArrays",
    "ArrayInfo",
    "ArrayRef",
    "CsrInfo",
    "OutputBusyError",
    "ResultWriter",
    "ScratchArray",
    "ScratchFolder",
    "StateArrays",
    "block_digests",
    "check_output_path",
    "claim_output",
    "close_open_inputs",
    "describe_array",
    "describe_csr",
    "describe_matrix",
    "describe_path",
    "digest_arrays",
    "extend_records",
    "input_layout",
    "input_record",
    "is_csr",
    "is_result",
    "layout_change",
    "open_output",
    "public_record",
    "read_csr_rows",
    "read_item",
    "read_names",
    "read_result",
    "read_rows",
    "read_state",
    "recover_if_idle",
    "recover_output",
    "replace_blocks",
    "report_paths",
    "scratch_folder",
    "stored_records",
    "write_answer",
    "write_arrays",
    "write_csr",
    "write_segments",
    "write_state",
    "write_text_atomic",
]
