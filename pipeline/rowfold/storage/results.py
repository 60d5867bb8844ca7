"""Result stores (HDF5 file or Zarr group) and reports, written atomically.

Everything is written under a temporary sibling whose name starts with ``.rowfold-tmp-``;
only a complete result is renamed into place. An HDF5 file is swapped with one
``os.replace``. A Zarr store is a folder, which cannot be replaced in one step: the old
folder is first renamed aside (``.rowfold-old-``), the new one renamed in, and the old one
removed. Leftovers of a killed run are removed by the next run to the same output.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import TracebackType
from typing import Any

import h5py
import numpy as np

from rowfold.errors import OutputError, RowfoldError, RunError
from rowfold.storage.inputs import _HDF5_LOCK, HDF5_SUFFIXES

TMP_PREFIX = ".rowfold-tmp-"
OLD_PREFIX = ".rowfold-old-"


def check_output_path(path: Path, overwrite: bool) -> None:
    """Refuse an output that exists without ``overwrite``, or whose folder is unwritable.

    Raises
    ------
    OutputError
        Naming the path and what to do.
    """
    if path.exists() and not overwrite:
        raise OutputError(
            f"{path}: output exists; set output.overwrite: true to replace it, "
            "or choose another output.path"
        )
    parent = path.parent
    if not parent.is_dir():
        raise OutputError(f"{path}: output folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{path}: output folder {parent} is not writable")


def report_paths(path: Path) -> tuple[Path, Path]:
    """Return the JSON and HTML report paths beside a result store."""
    stem = path.with_suffix("")
    return stem.with_name(stem.name + ".report.json"), stem.with_name(stem.name + ".report.html")


def _litter_pattern(path: Path) -> re.Pattern[str]:
    """Names of the temporary siblings a run writes for ``path`` (store, scratch, reports)."""
    json_path, html_path = report_paths(path)
    names = "|".join(re.escape(p.name) for p in (path, json_path, html_path))
    return re.compile(rf"^\.rowfold-(?:tmp|old)-(\d+)-(?:work-)?(?:{names})$")


def write_text_atomic(path: Path, text: str) -> None:
    """Write a text file under a temporary name and rename it into place."""
    tmp = path.with_name(f"{TMP_PREFIX}{os.getpid()}-{path.name}")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise OutputError(f"{path}: cannot write ({exc})") from None


def remove_litter(path: Path) -> None:
    """Remove temporary siblings that an earlier, killed run left beside ``path``.

    Only names a run for this very output writes are touched, and never those of this
    process (same pid).
    """
    pattern = _litter_pattern(path)
    if not path.parent.is_dir():
        return
    for stale in path.parent.iterdir():
        match = pattern.match(stale.name)
        if match and int(match.group(1)) != os.getpid():
            _remove(stale)


@contextmanager
def scratch_folder(path: Path) -> Iterator[Path]:
    """Yield a scratch folder path beside ``path`` (not created); remove it afterwards."""
    folder = path.with_name(f"{TMP_PREFIX}{os.getpid()}-work-{path.name}")
    try:
        yield folder
    finally:
        _remove(folder)


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        path.unlink(missing_ok=True)


def _jsonable(value: Any) -> Any:
    """Make attribute values storable in both HDF5 and Zarr (JSON text for containers)."""
    if isinstance(value, dict | list | tuple):
        return json.dumps(value, sort_keys=True, default=str)
    return value


class ResultWriter:
    """Write one result store under a temporary name and commit it into place.

    Use as a context manager; leaving the block without :meth:`commit` discards the
    temporary store.

    Parameters
    ----------
    path : Path
        Final path of the store (``.h5``/``.hdf5`` or ``.zarr``).
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self.tmp = path.with_name(f"{TMP_PREFIX}{os.getpid()}-{path.name}")
        self.is_hdf5 = path.suffix.lower() in HDF5_SUFFIXES
        self._handle: Any = None
        self._files: list[tuple[Path, Path]] = []

    def __enter__(self) -> ResultWriter:
        remove_litter(self.path)
        try:
            if self.is_hdf5:
                self._handle = h5py.File(self.tmp, "w")
            else:
                import zarr

                self._handle = zarr.open_group(str(self.tmp), mode="w")
        except OSError as exc:
            raise OutputError(f"{self.path}: cannot create the result ({exc})") from None
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self._handle is not None:
            try:
                self._close()
            except OSError:  # the temporary store is discarded anyway
                self._handle = None
            _remove(self.tmp)
        for tmp, _ in self._files:
            tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError) and not isinstance(exc, RowfoldError):
            reason = exc.strerror or str(exc)
            raise RunError(
                f"{self.path}: writing the result failed ({reason}); the previous result is kept"
            ) from None

    def _close(self) -> None:
        if self.is_hdf5 and self._handle is not None:
            with _HDF5_LOCK:
                self._handle.close()
        self._handle = None

    def create(self, name: str, shape: tuple[int, ...], dtype: Any, chunk_rows: int) -> None:
        """Create an empty array to be filled by :meth:`write_rows`."""
        chunks = (max(1, min(chunk_rows, shape[0] or 1)), *shape[1:])
        if self.is_hdf5:
            with _HDF5_LOCK:
                self._handle.create_dataset(name, shape=shape, dtype=dtype, chunks=chunks)
        else:
            self._handle.create_array(name, shape=shape, dtype=dtype, chunks=chunks)

    def write_rows(self, name: str, start: int, block: np.ndarray) -> None:
        """Write ``block`` into rows ``start .. start + len(block)`` of array ``name``."""
        if self.is_hdf5:
            with _HDF5_LOCK:
                self._handle[name][start : start + block.shape[0]] = block
        else:
            self._handle[name][start : start + block.shape[0]] = block

    def read_rows(self, name: str, start: int, stop: int) -> np.ndarray:
        """Read back rows of an array written earlier in this store."""
        if self.is_hdf5:
            with _HDF5_LOCK:
                return np.asarray(self._handle[name][start:stop])
        return np.asarray(self._handle[name][start:stop])

    def put(self, name: str, array: np.ndarray) -> None:
        """Write a whole (small) array."""
        array = np.asarray(array)
        if self.is_hdf5:
            with _HDF5_LOCK:
                self._handle.create_dataset(name, data=array)
        else:
            created = self._handle.create_array(name, shape=array.shape, dtype=array.dtype)
            created[...] = array

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Set store attributes; containers are stored as JSON text."""
        clean = {key: _jsonable(value) for key, value in attrs.items()}
        if self.is_hdf5:
            with _HDF5_LOCK:
                self._handle.attrs.update(clean)
        else:
            self._handle.attrs.update(clean)

    def add_file(self, final: Path, text: str) -> None:
        """Stage a text file (a report) to be swapped in together with the store."""
        tmp = final.with_name(f"{TMP_PREFIX}{os.getpid()}-{final.name}")
        tmp.write_text(text, encoding="utf-8")
        self._files.append((tmp, final))

    def commit(self) -> None:
        """Close the temporary store and rename it, and the staged files, into place."""
        self._close()
        try:
            if self.is_hdf5 or not self.path.exists():
                os.replace(self.tmp, self.path)
            else:
                aside = self.path.with_name(f"{OLD_PREFIX}{os.getpid()}-{self.path.name}")
                os.replace(self.path, aside)
                os.replace(self.tmp, self.path)
                _remove(aside)
            for tmp, final in self._files:
                os.replace(tmp, final)
        except OSError as exc:
            raise RunError(f"{self.path}: cannot commit the result ({exc})") from None
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
    try:
        if path.suffix.lower() in HDF5_SUFFIXES:
            with _HDF5_LOCK, h5py.File(path, "r") as handle:

                def visit(name: str, obj: Any) -> None:
                    if isinstance(obj, h5py.Dataset):
                        arrays[name] = {"shape": list(obj.shape), "dtype": obj.dtype.str}

                handle.visititems(visit)
                attrs = {key: _plain(value) for key, value in handle.attrs.items()}
        else:
            import zarr

            root = zarr.open_group(str(path), mode="r")
            for name, array in root.arrays():
                arrays[name] = {"shape": list(array.shape), "dtype": np.dtype(array.dtype).str}
            for name, group in root.groups():
                for sub, array in group.arrays():
                    arrays[f"{name}/{sub}"] = {
                        "shape": list(array.shape),
                        "dtype": np.dtype(array.dtype).str,
                    }
            attrs = {key: _plain(value) for key, value in root.attrs.items()}
    except Exception as exc:
        raise InputError(f"{path}: cannot read ({exc.__class__.__name__}: {exc})") from None
    return {"path": str(path), "arrays": arrays, "attrs": attrs}


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
                if isinstance(obj, h5py.Dataset) and name not in ROW_ARRAYS:
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
            out[f"{group_name}/{name}"] = np.asarray(array[...])
    return out


# Arrays with one row per input row: never read whole into memory.
ROW_ARRAYS = ("Q", "residuals", "standardized_residuals", "leverage")
