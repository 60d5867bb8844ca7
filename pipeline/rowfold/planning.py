"""The plan stage: a job's inputs described and cut into row blocks, without reading data."""

from __future__ import annotations

from pathlib import Path

from rowfold import storage
from rowfold.blocks import BlockPlan, plan_blocks
from rowfold.errors import InputError
from rowfold.spec import Job, check_fits_input, check_names, check_parameter_names
from rowfold.storage import locations


def plan_job(job: Job) -> BlockPlan:
    """Describe the job's input arrays and cut them into row blocks (reads no data).

    ``input.matrix`` may name a dense dataset or a CSR group; which one is found by looking.
    """
    matrix = storage.describe_matrix(input_ref(job, job.input.matrix))
    rhs = None
    if job.input.rhs is not None:
        rhs = storage.describe_array(input_ref(job, job.input.rhs))
    weights = None
    if job.input.weights is not None:
        weights = storage.describe_array(input_ref(job, job.input.weights))
    native = job.method.precision == "native"
    plan = plan_blocks(
        matrix, rhs, job.input.rows_per_block, native, weights, job.input.fixed_columns
    )
    check_fits_input(job, plan.rows, plan.cols)
    return plan


def input_ref(job: Job, name: str) -> storage.ArrayRef:
    """The reference tasks carry to array ``name`` of the job's input (a path or URL, and
    the storage options as JSON text: no open handle, no credential object)."""
    spec = job.input
    return storage.ArrayRef(str(spec.path), name, spec.missing_chunks, spec.storage_options)


# Fewer rows per block than this many times the columns draws a warning (common practice:
# a block's QR costs about 2 b n^2 flops and leaves an n x n factor to reduce, so below a
# few n rows per block the reduction tree does as much work as the blocks).
MIN_BLOCK_ROWS_PER_COLUMN = 4


def block_warnings(plan: BlockPlan) -> list[str]:
    """Warnings about the input: HDF5 read by URL (slow), and the block size (too few rows
    per block for the columns)."""
    found = hdf5_url_warnings(plan)
    least = MIN_BLOCK_ROWS_PER_COLUMN * plan.cols
    if plan.blocks <= 1 or plan.per_block >= least:
        return found
    return [
        *found,
        f"input.rows_per_block: {plan.per_block} rows per block for {plan.cols} columns "
        f"({plan.blocks} blocks) is fewer than {MIN_BLOCK_ROWS_PER_COLUMN}n = {least}; "
        f"the reduction of the blocks' factors then costs as much as the blocks themselves; "
        f"use at least {least} (or auto)",
    ]


def hdf5_url_warnings(plan: BlockPlan) -> list[str]:
    """The cost of an HDF5 or NetCDF-4 input read by URL, said once per job."""
    ref = plan.matrix
    if not (locations.is_url(ref.path) and ref.is_hdf5):
        return []
    return [
        f"{ref.path}: an HDF5 file read by URL costs a ranged request per HDF5 chunk (and "
        "per piece of its metadata), far slower than a local file; copy it to a local path, "
        "or convert it to Zarr with chunks of a few MB (e.g. 65,536 rows of 8 float64 "
        "columns is 4 MiB)"
    ]


def parameter_names(job: Job, plan: BlockPlan) -> tuple[str, ...]:
    """The name of every input column: from ``input.parameter_names`` (a list, or a 1-D
    dataset of text in the input file), else ``x0 .. x{n-1}``.

    Raises
    ------
    JobError, InputError
        When the names are not one distinct non-empty text per input column, or the
        dataset cannot be read (exit 2, before anything is computed).
    """
    given = job.input.parameter_names
    if given is None:
        return tuple(f"x{j}" for j in range(plan.input_cols))
    if isinstance(given, str):
        ref = input_ref(job, given)
        found = storage.read_names(ref)
        try:
            names = check_names(found)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{ref.describe()}: parameter names: {exc}") from None
        check_parameter_names(job, names, plan.input_cols, f"dataset {ref.describe()}")
        return names
    check_parameter_names(job, given, plan.input_cols, "the list")
    return given


def validate_job(job: Job) -> BlockPlan:
    """Check what a job reads (shapes, types, names) without computing; return its plan.

    Raises
    ------
    JobError, InputError
        When a key or an input does not fit (exit 2).
    """
    plan = plan_job(job)
    parameter_names(job, plan)
    return plan


def wants_q(job: Job) -> bool:
    """Q is formed when it is written or measured (``output.measure_q``), when a gate needs
    its figures, or when refinement or leverages need its blocks."""
    gates = job.gates.orthogonality is not None or job.gates.residual is not None
    wanted = job.output.q or job.output.measure_q
    return wanted or gates or job.solve.refine or job.solve.residuals


def input_paths(job: Job) -> tuple[Path, ...]:
    """The input files or stores an output must stay clear of (a URL input is not on this
    machine's disk, so no local output can overlap it)."""
    path = job.input.path
    return () if isinstance(path, str) else (path,)
