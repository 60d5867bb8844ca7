"""The Python API: ``rowfold.lstsq``, ``rowfold.qr``, ``rowfold.run`` and ``rowfold.open_result``.

The job runner is the core; these functions are one more client of it, beside the CLI.
``lstsq`` and ``qr`` build a job document from their arguments and validate it with the
job file's own parser (:func:`rowfold.spec.job_from_data`), so their options are the job
file's keys with the same names, the same defaults and the same messages. An in-memory
``A`` (numpy, dask, scipy.sparse or an xarray DataArray) is first written into a Zarr store,
row block by row block (a dask array by its own tasks, never whole), and read back from there
by the runner like any input: that costs one extra write of A. When every worker is a thread
of this process (no scheduler given, no active client, ``cluster.processes`` not true) and
the staged arrays hold at most :data:`MEMORY_STAGING_BYTES`, that store is a unique
``memory://`` store (fsspec's in-process file system), removed right after the run;
otherwise it is ``input.zarr`` in a temporary folder. The result store goes into a
temporary folder and is removed when the result no longer needs it (at once, unless Q or
row arrays are read lazily from it).

The work runs where a job runs (:func:`rowfold.cluster.open_engine`): the caller's active
``distributed.Client`` first, then Dask's ``scheduler-address``, else an embedded cluster.
A scheduler or worker on another machine cannot read this machine's temporary folder:
pass ``scratch=`` a folder on storage every worker shares, or give ``A`` as a reference to
a dataset on such storage.

Errors are :mod:`rowfold.errors` classes, which are also the builtin a caller would catch
(``JobError`` and ``InputError`` are ``ValueError``, a missing input is also
``FileNotFoundError``, a breakdown ``numpy.linalg.LinAlgError``, a run failure
``RuntimeError``). Exit statuses are the CLI's business; a failed quality gate is not an
error here (see ``result.quality.gates_status``).
"""

from __future__ import annotations

import copy
import difflib
import sys
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from rowfold import spec
from rowfold.api_results import LAZY_ARRAYS, LstsqResult, QRResult, read, read_report
from rowfold.errors import JobError, OutputError

__all__ = ["LstsqResult", "QRResult", "lstsq", "open_result", "qr", "run"]

# Input keys that ``A``, ``b`` and ``weights`` give (an option may not set them).
GIVEN_INPUT_KEYS = ("path", "matrix", "rhs", "weights")
# Names of the staged arrays inside the temporary input store.
STAGED = {"matrix": "A", "rhs": "b", "weights": "w"}
# Largest staged input (bytes of A, b and weights as given) copied into a memory:// store
# rather than onto disk: the copy doubles the memory the caller's arrays already take, so
# beyond this the disk copy is kept (our choice; a dask array may not fit in memory at all).
MEMORY_STAGING_BYTES = 256 * 2**20


def _option_table() -> dict[str, str]:
    """Job key -> its section, for every key an option may name without its section."""
    by_section: dict[str, tuple[str, ...]] = {
        "input": tuple(f.name for f in fields(spec.InputSpec) if f.name not in GIVEN_INPUT_KEYS),
        "method": tuple(f.name for f in fields(spec.MethodSpec) if f.name != "name"),
        "output": ("q", "measure_q"),
        "solve": tuple(f.name for f in fields(spec.SolveSpec)),
        "gates": tuple(f.name for f in fields(spec.GateSpec)),
        "cluster": (*spec.CLUSTER_KEYS, "profile"),
    }
    table: dict[str, str] = {}
    for section, keys in by_section.items():
        for key in keys:
            assert key not in table, f"job key {key} is in two sections"
            table[key] = section
    return table


OPTION_SECTIONS = _option_table()


def lstsq(
    A: Any,
    b: Any,
    weights: Any = None,
    method: str = "auto",
    *,
    scratch: str | Path | None = None,
    **options: Any,
) -> LstsqResult:
    """Least squares ``min_x ||W^(1/2) (A x - b)||_2`` for a tall matrix A.

    Parameters
    ----------
    A : array-like, dask array, scipy.sparse matrix, xarray.DataArray or mapping
        The m x n matrix. A DataArray's second dimension's coordinate gives the parameter
        names. A mapping names a dataset on disk with the job file's ``input`` keys, e.g.
        ``{"path": "obs.h5", "matrix": "design", "rhs": "offsets"}`` (read in place, no
        copy); ``b`` and ``weights`` are then dataset names in that file, or None.
    b : array-like, dask array, DataArray, str or None
        The right-hand side(s), (m,) or (m, k).
    weights : array-like, dask array, DataArray, str or None
        Row weights w >= 0 (``input.weights``).
    method : str
        ``method.name``: ``auto`` (default), ``tsqr``, ``cholqr2``, ``scholqr3``,
        ``bcgs2``, ``bmgs`` or ``rcholqr``.
    scratch : str or Path, optional
        Where the temporary copy of an in-memory A and the result go (default: the system's
        temporary folder). Must be on storage the workers share when the scheduler or a
        worker is on another machine.
    **options
        Job keys, by name (``refine=True``, ``tree="flat"``, ``workers=2``), as dotted
        keys (``**{"solve.refine": True}``) or as section mappings
        (``solve={"refine": True}``). ``output.path`` keeps the result store there.
        Differs from a job file only in ``solve.covariance``, true here.

    Returns
    -------
    LstsqResult

    Raises
    ------
    JobError
        (a ValueError) an option is unknown or invalid, with the job file's message.
    InputError
        (a ValueError; FileNotFoundError when missing) an input cannot be used.
    BreakdownError, RunError
        The method broke down, or the run failed.
    """
    if b is None and not (isinstance(A, Mapping) and A.get("rhs")):
        raise JobError(
            "rowfold.lstsq: b: a right-hand side is required (an array, or with A on disk "
            "a dataset name or A's 'rhs'); use rowfold.qr for R alone"
        )
    defaults = {"solve": {"covariance": True}}
    result = _factor("rowfold.lstsq", A, b, weights, method, scratch, options, defaults)
    if not isinstance(result, LstsqResult):
        raise JobError("rowfold.lstsq: the input names no right-hand side (input.rhs)")
    return result


def qr(
    A: Any,
    method: str = "auto",
    q: bool = False,
    *,
    scratch: str | Path | None = None,
    **options: Any,
) -> QRResult:
    """The QR factorization ``A = Q R`` of a tall matrix A (R with real diagonal >= 0).

    Parameters
    ----------
    A : array-like, dask array, scipy.sparse matrix, xarray.DataArray or mapping
        As for :func:`lstsq` (a mapping's ``rhs``, if any, is ignored).
    method : str
        ``method.name`` (``auto`` by default).
    q : bool
        Also form Q (``output.q``): ``result.Q`` is then an m x n dask array read from the
        result store block by block (the store stays while the array lives).
    scratch : str or Path, optional
        As for :func:`lstsq`.
    **options
        Job keys, as for :func:`lstsq`.

    Returns
    -------
    QRResult
        Without Q unless ``q``.
    """
    if isinstance(A, Mapping):
        A = {k: v for k, v in A.items() if k != "rhs"}
    options = {**options, "q": q}
    result = _factor("rowfold.qr", A, None, None, method, scratch, options, {})
    if isinstance(result, LstsqResult):  # cannot happen: no rhs
        raise JobError("rowfold.qr: unexpected right-hand side")
    return result


def run(job_or_path: str | Path | Mapping[str, Any], **overrides: Any) -> QRResult:
    """Run a job file (or a job document) as ``rowfold run`` does, and return its result.

    Parameters
    ----------
    job_or_path : str, Path or mapping
        A YAML job file, or its document as a mapping (relative paths then resolve against
        the current folder).
    **overrides
        Job keys as for :func:`lstsq` (``**{"method.name": "tsqr"}``, ``refine=True``);
        on a job file they act as ``--set`` does, with the same messages.

    Returns
    -------
    QRResult or LstsqResult
        Read back from the committed store (see :func:`open_result`). A failed quality
        gate does not raise: ``result.quality.gates_status`` says it.
    """
    from rowfold import runner

    values = _dotted("rowfold.run", overrides)
    if isinstance(job_or_path, Mapping):
        doc = copy.deepcopy(dict(job_or_path))
        for key, value in values.items():
            _put(doc, tuple(key.split(".")), value, "rowfold.run")
        job = spec.job_from_data(doc, "rowfold.run", Path.cwd())
    else:
        job = spec.load_job(job_or_path, values=values)
    outcome = runner.run_job(job)
    return read(_local_output(outcome.output), outcome.report)


def open_result(path: str | Path) -> QRResult:
    """Read a result store (and the report beside it) into a result object.

    R, x, standard errors and covariance are read into memory; Q, residuals, leverages and
    the other arrays with one row per input row stay on disk as dask arrays.

    Raises
    ------
    InputMissingError
        (also FileNotFoundError) when there is no store or no report beside it.
    """
    store = Path(path).expanduser().resolve()
    return read(store, read_report(store))


# ---------------------------------------------------------------- options -> job document


def _dotted(label: str, options: Mapping[str, Any]) -> dict[str, Any]:
    """Options as dotted job keys: ``refine`` -> ``solve.refine``, sections spread out."""
    out: dict[str, Any] = {}
    for key, value in options.items():
        if key in spec.SECTIONS and isinstance(value, Mapping):
            out.update({f"{key}.{sub}": item for sub, item in value.items()})
        elif "." in key or key == "name":
            out[key] = value
        elif key in OPTION_SECTIONS:
            out[f"{OPTION_SECTIONS[key]}.{key}"] = value
        else:
            close = difflib.get_close_matches(key, [*OPTION_SECTIONS, *spec.SECTIONS], 1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise JobError(
                f"{label}: option '{key}' is not a job key{hint}; give a key of the "
                "input, method, output, solve, gates or cluster section by name, as "
                "'section.key', or a section as a mapping"
            )
    return out


def _put(doc: dict[str, Any], keypath: tuple[str, ...], value: Any, label: str) -> None:
    """Set a dotted key in a job document (sections created as needed)."""
    node = doc
    for depth, part in enumerate(keypath[:-1]):
        child = node.setdefault(part, {})
        if not isinstance(child, dict):
            raise JobError(f"{label}: '{'.'.join(keypath[: depth + 1])}' is not a section")
        node = child
    node[keypath[-1]] = value


# ---------------------------------------------------------------- inputs


@dataclass
class _Source:
    """Where the job's input is: the ``input`` section, and what to stage before the run.

    ``arrays`` maps ``matrix``/``rhs``/``weights`` to in-memory arrays to write into the
    temporary store (empty for an on-disk reference); ``names`` are parameter names the
    input carries (an xarray coordinate).
    """

    section: dict[str, Any]
    arrays: dict[str, Any] = field(default_factory=dict)
    sparse: bool = False
    names: tuple[str, ...] | None = None

    @property
    def on_disk(self) -> bool:
        return not self.arrays


def _source(label: str, A: Any, b: Any, weights: Any) -> _Source:
    """Describe the input from the arguments (nothing is written yet)."""
    if isinstance(A, Mapping):
        return _on_disk(label, A, b, weights)
    names = _column_names(A)
    matrix = _data(A)
    sparse = _is_sparse(matrix)
    matrix = _floating(matrix)
    if len(matrix.shape) != 2:
        raise JobError(f"{label}: A: expected a 2-D matrix, found shape {tuple(matrix.shape)}")
    arrays: dict[str, Any] = {"matrix": matrix}
    for key, given in (("rhs", b), ("weights", weights)):
        if given is None:
            continue
        if isinstance(given, str):
            raise JobError(f"{label}: {key}: a dataset name needs A as an on-disk reference")
        array = _floating(_data(given))
        if array.shape[:1] != matrix.shape[:1] or array.ndim > (2 if key == "rhs" else 1):
            want = "(m,) or (m, k)" if key == "rhs" else "(m,)"
            raise JobError(
                f"{label}: {'b' if key == 'rhs' else key}: expected shape {want} with "
                f"m = {matrix.shape[0]} rows of A, found {tuple(array.shape)}"
            )
        arrays[key] = array
    section = {key: STAGED[key] for key in arrays}
    return _Source(section=section, arrays=arrays, sparse=sparse, names=names)


def _on_disk(label: str, A: Mapping[str, Any], b: Any, weights: Any) -> _Source:
    """An on-disk reference: the mapping is the job's ``input`` section."""
    section = dict(A)
    for key, given in (("rhs", b), ("weights", weights)):
        if given is None:
            continue
        if not isinstance(given, str):
            raise JobError(
                f"{label}: {key}: with A on disk, give it as a dataset name in the same "
                f"file (input.{key}), not as an array"
            )
        section[key] = given
    return _Source(section=section)


def _data(array: Any) -> Any:
    """The numpy or dask array behind an argument (an xarray DataArray's ``.data``)."""
    if _is_xarray(array):
        return array.data
    if _is_sparse(array) or type(array).__module__.startswith("dask."):
        return array
    return np.asarray(array)


def _floating(array: Any) -> Any:
    """Integer or boolean data as float64 (rowfold factors floating-point data)."""
    return array if np.dtype(array.dtype).kind in "fc" else array.astype(np.float64)


def _is_xarray(value: Any) -> bool:
    """An xarray DataArray (xarray is imported only if the caller already has it)."""
    xarray = sys.modules.get("xarray")
    return xarray is not None and isinstance(value, xarray.DataArray)


def _is_sparse(value: Any) -> bool:
    sparse = sys.modules.get("scipy.sparse")
    return sparse is not None and bool(sparse.issparse(value))


def _column_names(A: Any) -> tuple[str, ...] | None:
    """A DataArray's column coordinate (its second dimension), or a pandas DataFrame's
    columns, as parameter names."""
    if type(A).__module__.startswith("pandas.") and hasattr(A, "columns"):
        return tuple(str(name) for name in A.columns)
    if not _is_xarray(A) or A.ndim != 2:
        return None
    column = A.dims[1]
    if column not in A.coords:
        return None
    return tuple(str(value) for value in A.coords[column].values.tolist())


# ---------------------------------------------------------------- one factorization


def _factor(
    label: str,
    A: Any,
    b: Any,
    weights: Any,
    method: str,
    scratch: str | Path | None,
    options: Mapping[str, Any],
    defaults: Mapping[str, Mapping[str, Any]],
) -> QRResult:
    """Stage the input, run the job in a temporary folder, read the result back."""
    from rowfold.storage.arrays import memory_store, remove_memory_store

    source = _source(label, A, b, weights)
    folder = _temporary(label, scratch)
    staged: str | None = None
    try:
        job = _job(label, source, method, options, defaults, Path(folder.name))
        if _stage_in_memory(job.cluster, source):
            staged = memory_store()
            job = _job(label, source, method, options, defaults, Path(folder.name), staged)
        else:
            _check_reachable(label, job, source, scratch)
        return _run_staged(job, source, folder, staged)
    except BaseException:
        folder.cleanup()
        raise
    finally:
        if staged is not None:
            remove_memory_store(staged)


def _stage_in_memory(cluster: spec.ClusterSpec, source: _Source) -> bool:
    """Whether the staged arrays go into a ``memory://`` store: every worker is a thread
    of this process (Dask's threaded scheduler, or an embedded cluster of threads: no
    address, scheduler file, active client or configured scheduler, ``cluster.processes``
    not true) and they hold at most :data:`MEMORY_STAGING_BYTES`."""
    if source.on_disk or _staged_bytes(source) > MEMORY_STAGING_BYTES:
        return False
    from rowfold.cluster import active_client, configured_address, remote_scheduler

    if cluster.processes or remote_scheduler(cluster) is not None:
        return False
    if cluster.scheduler == "threads":
        return True
    given = cluster.address or cluster.scheduler_file
    return not given and active_client() is None and configured_address() is None


def _staged_bytes(source: _Source) -> int:
    """Bytes of the arrays to stage (a sparse matrix: its stored values and indices)."""
    total = 0
    for array in source.arrays.values():
        if _is_sparse(array):
            total += int(array.data.nbytes + array.indices.nbytes + array.indptr.nbytes)
        else:
            total += int(np.prod(array.shape, dtype=np.int64)) * np.dtype(array.dtype).itemsize
    return total


def _temporary(label: str, scratch: str | Path | None) -> tempfile.TemporaryDirectory[str]:
    where = None if scratch is None else Path(scratch).expanduser()
    if where is not None and not where.is_dir():
        raise OutputError(f"{label}: scratch {where}: not a folder; create it or give another")
    return tempfile.TemporaryDirectory(prefix="rowfold-", dir=where)


def _job(
    label: str,
    source: _Source,
    method: str,
    options: Mapping[str, Any],
    defaults: Mapping[str, Mapping[str, Any]],
    folder: Path,
    staged: str | None = None,
) -> spec.Job:
    """The job document of one call, validated by the job file's parser (an in-memory
    input staged at ``staged``, a ``memory://`` URL, or else in ``folder``)."""
    doc: dict[str, Any] = copy.deepcopy({key: dict(value) for key, value in defaults.items()})
    section = dict(source.section)
    if not source.on_disk:
        section["path"] = staged or str(folder / "input.zarr")
    if source.names is not None:
        section["parameter_names"] = list(source.names)
    doc["name"] = label
    doc["input"] = section
    doc["method"] = {"name": method}
    doc["output"] = {"path": str(folder / "result.zarr"), "overwrite": True}
    for key, value in _dotted(label, options).items():
        keypath = tuple(key.split("."))
        if keypath[0] == "input" and keypath[-1] in GIVEN_INPUT_KEYS and not source.on_disk:
            raise JobError(f"{label}: option '{key}' is given by A, b and weights")
        if keypath == ("output", "path"):
            doc["output"]["overwrite"] = False
        _put(doc, keypath, value, label)
    return spec.job_from_data(doc, label, Path.cwd())


def _check_reachable(label: str, job: spec.Job, source: _Source, scratch: Any) -> None:
    """Refuse a staged input that a scheduler or worker on another machine could not read."""
    if source.on_disk or scratch is not None:
        return
    from rowfold.cluster import remote_scheduler

    remote = remote_scheduler(job.cluster)
    if remote is not None:
        raise JobError(
            f"{label}: the Dask cluster has {remote} on another machine, which cannot read "
            "the temporary copy of A on this machine's disk; pass scratch= a folder that "
            "every worker shares, or A as a dataset on shared storage ({'path': ..., "
            "'matrix': ...})"
        )


def _run_staged(
    job: spec.Job,
    source: _Source,
    folder: tempfile.TemporaryDirectory[str],
    staged: str | None = None,
) -> Any:
    """Write the staged arrays (at ``staged``, or in the folder), run the job and read its
    result (the folder kept alive by the lazy arrays that read from it, or removed now)."""
    from rowfold import runner
    from rowfold.storage import arrays as staging

    store: Path | str = staged or Path(folder.name) / "input.zarr"
    dense = dict(source.arrays)
    if source.sparse:
        staging.stage_csr(store, STAGED["matrix"], dense.pop("matrix"))
    staging.stage_dense(store, {STAGED[key]: array for key, array in dense.items()})
    temporary = job.output.path == Path(folder.name) / "result.zarr"
    outcome = runner.run_job(job, html=not temporary)  # nobody opens a temporary store's page
    keep = folder if temporary else None
    result = read(_local_output(outcome.output), outcome.report, source.names, keep, temporary)
    if not temporary or not any(getattr(result, name, None) is not None for name in LAZY_ARRAYS):
        folder.cleanup()
    return result


def _local_output(output: Path | str) -> Path:
    """The result store as a local path; a result written to a URL is not read back here."""
    if isinstance(output, str):
        raise OutputError(
            f"{output}: the result was committed at this URL; the Python API reads back only "
            "local results (open it with xarray.open_zarr on the URL its pointer names)"
        )
    return output
