"""Result stores (HDF5 file or Zarr group) and reports, committed together and atomically.

A run writes its store and reports under a staging folder created exclusively beside the
output and makes them the output in one commit (:mod:`rowfold.storage.commit` describes the
protocol: a journal written at the commit point, renames, recovery that finishes or rolls
back an interrupted commit). Each output is held by one process at a time
(:mod:`rowfold.storage.locks`); :func:`open_output` takes that lock, recovers what an
interrupted run left, and checks the output path: never the input itself, inside it or
around it, and only ever replacing what is recognisably a rowfold result.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Iterator, Sequence
from contextlib import ExitStack, contextmanager
from pathlib import Path
from types import TracebackType
from typing import Any

import h5py
import numpy as np

from rowfold import testhooks
from rowfold.errors import OutputError, RowfoldError, RunError
from rowfold.storage import commit as protocol
from rowfold.storage import layout
from rowfold.storage.backends import ResultStore, open_result_store
from rowfold.storage.inputs import _HDF5_LOCK, HDF5_SUFFIXES
from rowfold.storage.locks import OutputBusyError, output_lock

TMP_PREFIX = protocol.TMP_PREFIX
RESULT_MARK = "rowfold_version"  # the attribute every rowfold result store carries
HTML_MARK = "<title>rowfold report"  # how every rowfold HTML report begins (report.py)
REPORT_LIMIT = 256 * 2**20  # a larger file beside the output is not one of our reports

_LOG = logging.getLogger("rowfold.storage")


def check_output_path(path: Path, overwrite: bool, inputs: Sequence[Path] = ()) -> None:
    """Refuse an output that would destroy an input or something that is not a result.

    Refused: the output is an input (same real path or same file), lies inside an input
    store, or holds an input; its folder is missing or unwritable; it is a symbolic link;
    it exists without ``overwrite``; it exists but is not a rowfold result; or a file at
    one of its report paths is not a rowfold report (the commit would replace it).

    Raises
    ------
    OutputError
        Naming the path and what to do.
    """
    for source in inputs:
        _check_apart(path, Path(source))
    parent = path.parent
    if not parent.is_dir():
        raise OutputError(f"{path}: output folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{path}: output folder {parent} is not writable")
    if os.path.lexists(path):
        _check_existing(path, overwrite)
    _check_reports(path)


def _check_existing(path: Path, overwrite: bool) -> None:
    """An existing output is replaced only with ``overwrite`` and only if it is a result."""
    if path.is_symlink():
        raise OutputError(
            f"{path}: output.path is a symbolic link (to {os.readlink(path)}); rowfold would "
            "replace the link, not what it points to; set output.path to the real location"
        )
    if not overwrite:
        raise OutputError(
            f"{path}: output exists; set output.overwrite: true to replace it, "
            "or choose another output.path"
        )
    if not is_result(path):
        raise OutputError(
            f"{path}: exists but is not a rowfold result (no '{RESULT_MARK}' attribute); "
            "rowfold replaces only its own results; move it away or choose another output.path"
        )


def _check_apart(output: Path, source: Path) -> None:
    """The output must be neither the input, nor inside it, nor around it."""
    out_real = Path(os.path.realpath(output))
    src_real = Path(os.path.realpath(source))
    if out_real == src_real or _same_file(out_real, src_real):
        raise OutputError(
            f"{output}: output.path is the input {source}; writing the result would replace "
            "the input; choose another output.path"
        )
    if src_real in out_real.parents or any(_same_file(p, src_real) for p in out_real.parents):
        raise OutputError(
            f"{output}: output.path lies inside the input store {source}; "
            "choose an output outside it"
        )
    if out_real in src_real.parents or any(_same_file(p, out_real) for p in src_real.parents):
        raise OutputError(
            f"{output}: the input {source} lies inside output.path; "
            "replacing the output would delete it; choose another output.path"
        )


def _check_reports(path: Path) -> None:
    """Reports already beside the output are replaced with it: they must be rowfold's."""
    for report in report_paths(path):
        if os.path.lexists(report) and not _is_report(report):
            raise OutputError(
                f"{path}: {report.name} exists but is not a rowfold report, and this output's "
                "report would replace it; move it away or choose another output.path"
            )


def _is_report(path: Path) -> bool:
    """Whether ``path`` is a regular file that a rowfold commit wrote (JSON or HTML report)."""
    if path.is_symlink() or not path.is_file() or path.stat().st_size > REPORT_LIMIT:
        return False
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return False
    if path.suffix == ".html":
        return HTML_MARK in text[:4096]
    try:
        report = json.loads(text)
    except ValueError:
        return False
    return isinstance(report, dict) and RESULT_MARK in report


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def is_result(path: Path) -> bool:
    """Whether ``path`` is a rowfold result store (it carries :data:`RESULT_MARK`)."""
    try:
        if path.suffix.lower() in HDF5_SUFFIXES:
            if not path.is_file():
                return False
            with _HDF5_LOCK, h5py.File(path, "r") as handle:
                return RESULT_MARK in handle.attrs
        if not path.is_dir():
            return False
        import zarr

        return RESULT_MARK in zarr.open_group(str(path), mode="r").attrs
    except Exception:  # unreadable, another format, ...: not ours
        return False


def report_paths(path: Path) -> tuple[Path, Path]:
    """Return the JSON and HTML report paths beside a result store."""
    stem = path.with_suffix("")
    return stem.with_name(stem.name + ".report.json"), stem.with_name(stem.name + ".report.html")


@contextmanager
def open_output(
    path: Path, overwrite: bool, inputs: Sequence[Path] = (), wait: float = 0.0
) -> Iterator[None]:
    """Hold the output for a run: lock it, recover an interrupted commit, check the path.

    The path is checked before the lock too, so a refused output creates nothing.

    Parameters
    ----------
    path : Path
        The result store.
    overwrite : bool
        ``output.overwrite``.
    inputs : sequence of Path
        The job's input files or stores (the output must stay clear of them).
    wait : float
        Seconds to wait for another run holding the output (``--wait-lock``).

    Raises
    ------
    OutputError
        A refused path, or the output held by another process
        (:class:`~rowfold.storage.locks.OutputBusyError`).
    """
    check_output_path(path, overwrite, inputs)
    with claim_output(path, wait):
        check_output_path(path, overwrite, inputs)  # recovery may have changed what is there
        yield


@contextmanager
def claim_output(path: Path, wait: float = 0.0) -> Iterator[None]:
    """Hold the output's lock; on taking it, recover what interrupted runs left."""
    with output_lock(path, wait) as fresh:
        if fresh:
            recover_output(path)
        yield


def recover_output(path: Path) -> list[str]:
    """Finish or roll back an interrupted commit of ``path``; call while holding its lock."""
    notes = protocol.recover(path, report_paths(path))
    for note in notes:
        _LOG.warning(note)
    return notes


def recover_if_idle(path: Path) -> None:
    """Recover ``path`` if an interrupted run left something and no one holds it now.

    For read-only verbs (``inspect``): nothing is created unless there is something to
    recover. A busy output (its run's staging folder is no leftover) is left as it is; an
    output that cannot be locked or whose interrupted commit cannot be completed is left as
    it is too, with a note saying why, so that it can still be described.
    """
    if not protocol.leftovers(path, report_paths(path)):
        return
    try:
        with output_lock(path) as fresh:
            if fresh:
                recover_output(path)
    except OutputBusyError:
        return
    except OutputError as exc:
        _LOG.warning("%s", exc)


def write_text_atomic(path: Path, text: str) -> None:
    """Write a text file under a fresh exclusive temporary name and rename it into place."""
    tmp = protocol.exclusive_name(path.parent, TMP_PREFIX, path.name)
    try:
        protocol.write_new_file(tmp, text.encode("utf-8"))
        os.replace(tmp, path)
    except OSError as exc:
        protocol.remove_entry(tmp)
        raise OutputError(f"{path}: cannot write ({exc})") from None
    except BaseException:  # an interrupt: leave no temporary file behind
        protocol.remove_entry(tmp)
        raise


@contextmanager
def scratch_folder(path: Path) -> Iterator[Path]:
    """Create a fresh scratch folder beside ``path`` (exclusively); remove it afterwards."""
    try:
        folder = protocol.exclusive_dir(path.parent, protocol.WORK_PREFIX, path.name)
    except OSError as exc:
        raise OutputError(f"{path}: cannot create a scratch folder ({exc.strerror})") from None
    try:
        yield folder
    finally:
        protocol.remove_entry(folder)


class ResultWriter:
    """Write one result store (and its reports) in staging and commit them together.

    Use as a context manager; leaving the block without :meth:`commit` discards the staged
    store. Entering takes the output's lock unless this process already holds it.

    Parameters
    ----------
    path : Path
        Final path of the store (``.h5``/``.hdf5`` or ``.zarr``).
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._store: ResultStore | None = None
        self._staging: protocol.Staging | None = None
        self._files: list[str] = []
        self._claim = ExitStack()
        self._sizes: dict[str, dict[str, int]] = {}  # group -> dimension -> size
        self._arrays: dict[str, tuple[str, ...]] = {}  # array -> its dimension names
        self._labelled: set[str] = set()  # dimensions with a coordinate array

    @property
    def commit_id(self) -> str:
        """The id this commit records in the store (``rowfold_commit``) and the report."""
        assert self._staging is not None, "the writer is not open"
        return self._staging.commit_id

    def __enter__(self) -> ResultWriter:
        try:
            self._claim.enter_context(claim_output(self.path))
            self._open_staged()
        except OSError as exc:
            self.__exit__(None, None, None)
            raise OutputError(f"{self.path}: cannot create the result ({exc})") from None
        except BaseException:  # e.g. an interrupt: the with-block never starts, clean up here
            self.__exit__(None, None, None)
            raise
        testhooks.reached("writer:staged")
        return self

    def _open_staged(self) -> None:
        self._staging = protocol.Staging(self.path)
        self._store = open_result_store(self.path, self._staging.part(self.path.name))

    @property
    def store(self) -> ResultStore:
        """The staged store being written."""
        assert self._store is not None, "the writer is not open"
        return self._store

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self._store is not None:
            try:
                self._close()
            except OSError:  # the staged store is discarded anyway
                self._store = None
        if self._staging is not None:
            self._staging.discard()  # kept when past the commit point: recovery completes it
            self._staging = None
        self._claim.close()
        if isinstance(exc, OSError) and not isinstance(exc, RowfoldError):
            reason = exc.strerror or str(exc)
            raise RunError(
                f"{self.path}: writing the result failed ({reason}); the previous result is kept"
            ) from None

    def _close(self) -> None:
        if self._store is not None:
            self._store.close()
        self._store = None

    def create(self, name: str, shape: tuple[int, ...], dtype: Any, chunk_rows: int) -> None:
        """Create an empty array to be filled by :meth:`write_rows`."""
        chunks = (max(1, min(chunk_rows, shape[0] or 1)), *shape[1:])
        self.store.create(name, shape, dtype, chunks, self._dimensions(name, shape))

    def write_rows(self, name: str, start: int, block: np.ndarray) -> None:
        """Write ``block`` into rows ``start .. start + len(block)`` of array ``name``."""
        self.store.write_rows(name, start, block)
        testhooks.reached("writer:rows")

    def read_rows(self, name: str, start: int, stop: int) -> np.ndarray:
        """Read back rows of an array written earlier in this store."""
        return self.store.read_rows(name, start, stop)

    def put(self, name: str, array: np.ndarray) -> None:
        """Write a whole (small) array, with its dimension names and what it holds."""
        array = np.asarray(array)
        self.store.put(name, array, self._dimensions(name, array.shape))

    def put_labels(self, dimension: str, labels: Sequence[str]) -> None:
        """Write text labels along a dimension (a coordinate: the parameter names)."""
        self._dimensions(dimension, (len(labels),), (dimension,))
        self._labelled.add(dimension)
        values = np.array(list(labels), dtype=object)
        self.store.put_labels(dimension, values, {"long_name": f"parameter name along {dimension}"})

    def _dimensions(
        self, name: str, shape: tuple[int, ...], dims: tuple[str, ...] | None = None
    ) -> tuple[str, ...]:
        """Name the dimensions of array ``name``; record each one's size in its group."""
        dims = dims or layout.dimension_names(name, len(shape))
        group = name.rpartition("/")[0]
        sizes = self._sizes.setdefault(group, {})
        for dim, size in zip(dims, shape, strict=True):
            if sizes.setdefault(dim, size) != size:
                raise ValueError(f"{name}: dimension {dim} is {size} long, elsewhere {sizes[dim]}")
        self._arrays[name] = dims
        return dims

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Set store attributes: native JSON values in Zarr, JSON text for containers in HDF5."""
        self.store.set_attrs(attrs)

    def add_file(self, final: Path, text: str) -> None:
        """Stage a text file (a report, beside the store) to be committed with the store."""
        if final.parent != self.path.parent:
            raise ValueError(f"{final}: a committed file must lie beside {self.path}")
        assert self._staging is not None, "the writer is not open"
        self._staging.write_text(final.name, text)
        self._files.append(final.name)

    def commit(self) -> None:
        """Record the commit id, close the staged store, and commit it with the staged files.

        Raises
        ------
        RunError
            When the file system fails; before the commit point the previous result is
            kept, after it the next run (or ``check``/``inspect``) completes the commit.
        """
        assert self._staging is not None, "the writer is not open"
        self.set_attrs({"rowfold_commit": self.commit_id})
        store = self.store
        store.finish(self._sizes, self._arrays, self._labelled)
        self._close()
        store.closed(self._staging.part(self.path.name))
        staging = self._staging
        try:
            staging.commit([self.path.name, *self._files])
        except OSError as exc:
            if staging.past_commit_point:
                raise RunError(
                    f"{self.path}: the commit was interrupted ({exc}); {staging.folder.name} "
                    "records it and the next run, update, check or inspect of this output "
                    "completes it"
                ) from None
            raise RunError(
                f"{self.path}: cannot commit the result ({exc}); the previous result is kept"
            ) from None
        self._staging = None
        self._files = []


def describe_path(path: Path) -> dict[str, Any]:
    """List the arrays (name, shape, dtype) and attributes of an HDF5 file or Zarr store.

    Works for inputs and result stores alike; reads no array data.

    Raises
    ------
    InputMissingError
        When nothing exists at ``path``.
    """
    from rowfold.errors import InputError, InputMissingError

    if not path.exists():
        raise InputMissingError(f"{path}: not found")
    arrays: dict[str, dict[str, Any]] = {}
    groups: dict[str, dict[str, Any]] = {}  # groups with a ``shape`` attribute (CSR)
    try:
        if path.suffix.lower() in HDF5_SUFFIXES:
            with _HDF5_LOCK, h5py.File(path, "r") as handle:

                def visit(name: str, obj: Any) -> None:
                    if isinstance(obj, h5py.Dataset) and not layout.is_dimension_only(obj):
                        arrays[name] = _hdf5_array_info(obj)
                    elif isinstance(obj, h5py.Group) and "shape" in obj.attrs:
                        groups[name] = {k: _plain(v) for k, v in obj.attrs.items()}

                handle.visititems(visit)
                attrs = {key: _plain(value) for key, value in handle.attrs.items()}
        else:
            import zarr

            root = zarr.open_group(str(path), mode="r")
            for name, member in root.members(max_depth=None):
                if isinstance(member, zarr.Array):
                    arrays[name] = _zarr_array_info(member)
                elif "shape" in member.attrs:
                    groups[name] = {k: _plain(v) for k, v in member.attrs.items()}
            attrs = {key: _plain(value) for key, value in root.attrs.items()}
    except Exception as exc:
        raise InputError(f"{path}: cannot read ({exc.__class__.__name__}: {exc})") from None
    return {"path": str(path), "arrays": arrays, "groups": groups, "attrs": attrs}


def _hdf5_array_info(dataset: Any) -> dict[str, Any]:
    """Shape, dtype, chunks and compression of an HDF5 dataset (no data read)."""
    return {
        "shape": list(dataset.shape),
        "dtype": dataset.dtype.str,
        "chunks": None if dataset.chunks is None else list(dataset.chunks),
        "compression": dataset.compression,
    }


def _zarr_array_info(array: Any) -> dict[str, Any]:
    """Shape, dtype, chunks and compression of a Zarr array (no data read)."""
    try:
        codecs = [type(c).__name__ for c in (*array.filters, *array.compressors)]
    except (AttributeError, TypeError):
        codecs = []
    return {
        "shape": list(array.shape),
        "dtype": np.dtype(array.dtype).str,
        "chunks": list(array.chunks),
        "compression": ", ".join(codecs) or None,
    }


def _plain(value: Any) -> Any:
    """Turn an HDF5/Zarr attribute value into JSON-friendly data."""
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, str) and value[:1] in "[{":
        try:
            return json.loads(value)
        except ValueError:
            return value
    return value


def read_state(path: Path) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Read a result store's ``state/`` arrays and its attributes (for ``update``)."""
    arrays = {
        name.split("/", 1)[1]: value
        for name, value in read_result(path).items()
        if name.startswith("state/")
    }
    return arrays, describe_path(path)["attrs"]


def read_result(path: Path) -> dict[str, np.ndarray]:
    """Read every small array of a result store into memory (not the m-row arrays).

    Nested arrays are named with their group, e.g. ``state/R``.
    """
    out: dict[str, np.ndarray] = {}
    if path.suffix.lower() in HDF5_SUFFIXES:
        with _HDF5_LOCK, h5py.File(path, "r") as handle:

            def visit(name: str, obj: Any) -> None:
                if (
                    isinstance(obj, h5py.Dataset)
                    and name not in ROW_ARRAYS
                    and not layout.is_dimension_only(obj)
                ):
                    out[name] = np.asarray(obj[...])

            handle.visititems(visit)
        return out
    import zarr

    root = zarr.open_group(str(path), mode="r")
    for name, array in root.arrays():
        if name not in ROW_ARRAYS:
            out[name] = np.asarray(array[...])
    for group_name, group in root.groups():
        for name, array in group.arrays():
            if f"{group_name}/{name}" not in ROW_ARRAYS:
                out[f"{group_name}/{name}"] = np.asarray(array[...])
    return out


def read_item(path: Path, name: str, index: int) -> np.ndarray:
    """Read one item (the sub-array at ``index`` along the first axis) of a stored array,
    for example one segment's factor, without reading the rest."""
    if path.suffix.lower() in HDF5_SUFFIXES:
        with _HDF5_LOCK, h5py.File(path, "r") as handle:
            return np.asarray(handle[name][index])
    import zarr

    array: Any = zarr.open_group(str(path), mode="r")[name]
    return np.asarray(array[index])


# Arrays with one row per input row, or one item per segment: never read whole into memory.
ROW_ARRAYS = (
    "Q",
    "residuals",
    "standardized_residuals",
    "studentized_residuals",
    "leverage",
    "redundancy",
    "segments/factor",
    "segments/gram",
)
