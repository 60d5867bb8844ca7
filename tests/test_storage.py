"""Storage: one input contract every backend passes, and atomic result stores.

:class:`InputContract` is the shared contract for dense inputs read by row range (DESIGN.md,
``storage/``); each backend (HDF5, Zarr formats 3 and 2, a Zarr zip store, a Zarr store at a
``memory://`` URL) subclasses it and says only
how to write a file; each names the backend of :mod:`rowfold.storage.backends` that reads it,
and the backend protocol itself is checked there too. :class:`CsrContract` is the same for a
CSR group over each backend. Values are exact: reading rows must give back the very numbers
written.
:class:`TestResultWriter` checks that a result store appears only complete (DESIGN.md: "An
output is written to a temporary sibling and renamed into place only when complete").
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Any, ClassVar, Literal

import h5py
import numpy as np
import pytest
import zarr

from rowfold.errors import InputError, InputMissingError
from rowfold.storage import (
    ArrayRef,
    ResultWriter,
    backends,
    close_open_inputs,
    describe_array,
    describe_csr,
    read_csr_rows,
    read_result,
    read_rows,
    report_paths,
    write_arrays,
    write_csr,
)
from rowfold.storage.digests import csr_digest

ROWS, COLS, CHUNK = 23, 3, 5  # 23 = 4 full chunks of 5 and a ragged chunk of 3
TMP_PREFIX = ".rowfold-tmp-"
DTYPES = ["<f8", "<f4", "<i4", "<c16"]


def sample(dtype: str, shape: tuple[int, ...] = (ROWS, COLS)) -> np.ndarray:
    """Distinct values in every cell, so a misplaced row cannot go unnoticed."""
    values = np.arange(np.prod(shape), dtype=np.float64).reshape(shape) * 1.25 - 7.0
    if np.dtype(dtype).kind == "c":
        return (values + 1j * (values + 0.5)).astype(dtype)
    if np.dtype(dtype).kind == "i":
        return (values * 4).astype(dtype)
    return values.astype(dtype)


# Row ranges and what each exercises (chunks are 5 rows: 0-4, 5-9, 10-14, 15-19, 20-22).
RANGES = [
    pytest.param(0, ROWS, id="everything"),
    pytest.param(0, CHUNK, id="exactly-one-chunk"),
    pytest.param(3, 12, id="crosses-two-chunk-boundaries"),
    pytest.param(4, 6, id="two-rows-across-one-boundary"),
    pytest.param(9, 10, id="single-row-at-chunk-end"),
    pytest.param(18, ROWS, id="ragged-end"),
    pytest.param(20, ROWS, id="only-the-ragged-chunk"),
    pytest.param(ROWS - 1, ROWS, id="last-row"),
    pytest.param(7, 7, id="empty-inside"),
    pytest.param(0, 0, id="empty-at-start"),
    pytest.param(ROWS, ROWS, id="empty-at-end"),
]


class InputContract:
    """Behaviour every dense input backend must show. Subclasses define :meth:`write` and
    name the :class:`~rowfold.storage.backends.InputBackend` that reads them."""

    suffix: ClassVar[str]
    backend: ClassVar[type]

    def write(self, path: str, arrays: dict[str, np.ndarray], chunk_rows: int) -> None:
        """Write ``arrays`` (name -> array, names may hold '/') chunked by ``chunk_rows``."""
        raise NotImplementedError

    def location(self, folder: Path, stem: str) -> str:
        """Where an input named ``stem`` lives (a path in ``folder`` unless overridden)."""
        return str(folder / f"{stem}{self.suffix}")

    def make(self, folder: Path, dtype: str = "<f8") -> tuple[str, dict[str, np.ndarray]]:
        """Write a matrix, a 1-D and a 2-D rhs under a group; return (path, arrays)."""
        arrays = {
            "network/A": sample(dtype),
            "network/b": sample(dtype, (ROWS,)),
            "network/B": sample(dtype, (ROWS, 2)),
        }
        path = self.location(folder, "input")
        self.write(path, arrays, CHUNK)
        return path, arrays

    @pytest.mark.parametrize("dtype", DTYPES)
    def test_describe_array(self, tmp_path: Path, dtype: str) -> None:
        """Shape, dtype and rows per chunk, read without the data."""
        path, arrays = self.make(tmp_path, dtype)
        for name, array in arrays.items():
            info = describe_array(ArrayRef(path, name))
            assert info.shape == array.shape
            assert np.dtype(info.dtype) == array.dtype
            assert info.chunk_rows == CHUNK
            assert info.ref == ArrayRef(path, name)

    @pytest.mark.parametrize(("start", "stop"), RANGES)
    @pytest.mark.parametrize("name", ["network/A", "network/b", "network/B"])
    def test_read_rows_exact(self, tmp_path: Path, name: str, start: int, stop: int) -> None:
        """The rows read are the rows written, bit for bit, in the array's own dtype."""
        path, arrays = self.make(tmp_path)
        got = read_rows(ArrayRef(path, name), start, stop)
        want = arrays[name][start:stop]
        assert got.shape == want.shape
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)

    @pytest.mark.parametrize("dtype", DTYPES)
    def test_read_rows_keeps_dtype(self, tmp_path: Path, dtype: str) -> None:
        """float32, int32 and complex come back unconverted."""
        path, arrays = self.make(tmp_path, dtype)
        got = read_rows(ArrayRef(path, "network/A"), 3, 12)
        assert got.dtype == np.dtype(dtype)
        np.testing.assert_array_equal(got, arrays["network/A"][3:12])

    def test_consecutive_ranges_tile_the_array(self, tmp_path: Path) -> None:
        """Blocks of 7 rows (not a multiple of the chunk) put back together give the array."""
        path, arrays = self.make(tmp_path)
        ref = ArrayRef(path, "network/A")
        blocks = [read_rows(ref, s, min(s + 7, ROWS)) for s in range(0, ROWS, 7)]
        np.testing.assert_array_equal(np.concatenate(blocks), arrays["network/A"])

    def test_missing_dataset_lists_present(self, tmp_path: Path) -> None:
        """A missing dataset is InputMissingError (a FileNotFoundError) naming what exists."""
        path, arrays = self.make(tmp_path)
        with pytest.raises(InputMissingError) as caught:
            describe_array(ArrayRef(path, "network/Z"))
        assert isinstance(caught.value, FileNotFoundError)
        message = str(caught.value)
        assert "network/Z" in message
        for name in arrays:
            assert name in message, message

    def test_missing_file(self, tmp_path: Path) -> None:
        """A missing file is InputMissingError naming the path."""
        path = self.location(tmp_path, "absent")
        with pytest.raises(FileNotFoundError, match="absent"):
            describe_array(ArrayRef(path, "network/A"))

    def test_group_is_not_an_array(self, tmp_path: Path) -> None:
        """Naming a group where an array is expected is an InputError, not a crash."""
        path, _ = self.make(tmp_path)
        with pytest.raises(InputError, match="group"):
            describe_array(ArrayRef(path, "network"))

    def test_backend_is_chosen_by_location(self, tmp_path: Path) -> None:
        """One function picks the backend from the location alone."""
        path, _ = self.make(tmp_path)
        assert isinstance(backends.input_backend(ArrayRef(path, "network/A")), self.backend)

    @pytest.mark.parametrize(("start", "stop"), RANGES)
    def test_backend_reads_what_was_written(self, tmp_path: Path, start: int, stop: int) -> None:
        """The protocol's own describe and read give back what was written, exactly."""
        path, arrays = self.make(tmp_path)
        ref = ArrayRef(path, "network/A")
        backend = backends.input_backend(ref)
        assert backend.describe(ref).shape == arrays["network/A"].shape
        got = backend.read(ref, start, stop)
        assert got.dtype == arrays["network/A"].dtype
        np.testing.assert_array_equal(got, arrays["network/A"][start:stop])

    def test_backend_stored_chunks_match_the_layout(self, tmp_path: Path) -> None:
        """Stored chunks span the array's extent in chunks of the rows written per chunk,
        and every chunk of a fully written array is present."""
        path, arrays = self.make(tmp_path)
        ref = ArrayRef(path, "network/A")
        chunks = backends.input_backend(ref).stored_chunks(ref)
        assert chunks.extent == arrays["network/A"].shape
        assert chunks.shape == (CHUNK, COLS)
        for row_chunk in range(-(-ROWS // CHUNK)):
            _, stored = chunks.read((row_chunk, 0))
            assert stored is not None and len(stored) > 0


class TestHDF5Input(InputContract):
    """HDF5 through h5py, chunked by rows."""

    suffix = ".h5"
    backend = backends.Hdf5Input

    def write(self, path: str, arrays: dict[str, np.ndarray], chunk_rows: int) -> None:
        with h5py.File(path, "w") as handle:
            for name, array in arrays.items():
                handle.create_dataset(name, data=array, chunks=(chunk_rows, *array.shape[1:]))


class ZarrInput(InputContract):
    """A Zarr store of a given format."""

    suffix = ".zarr"
    backend = backends.ZarrInput
    zarr_format: ClassVar[Literal[2, 3]]

    def write(self, path: str, arrays: dict[str, np.ndarray], chunk_rows: int) -> None:
        root = zarr.open_group(path, mode="w", zarr_format=self.zarr_format)
        fill_group(root, arrays, chunk_rows)


def fill_group(root: Any, arrays: dict[str, np.ndarray], chunk_rows: int) -> None:
    """Create and fill each array of ``arrays`` in the Zarr group ``root``."""
    for name, array in arrays.items():
        created = root.create_array(
            name, shape=array.shape, dtype=array.dtype, chunks=(chunk_rows, *array.shape[1:])
        )
        created[...] = array


class TestZarrV3Input(ZarrInput):
    """Zarr format 3."""

    zarr_format = 3


class TestZarrV2Input(ZarrInput):
    """Zarr format 2 (stores written by older tools)."""

    zarr_format = 2


class TestZarrZipInput(InputContract):
    """A Zarr store inside one zip file (zarr's zip store), read through the same contract."""

    suffix = ".zarr.zip"
    backend = backends.ZarrInput

    def write(self, path: str, arrays: dict[str, np.ndarray], chunk_rows: int) -> None:
        from zarr.storage import ZipStore

        store = ZipStore(path, mode="w")
        try:
            fill_group(zarr.open_group(store=store, mode="w"), arrays, chunk_rows)
        finally:
            store.close()

    def teardown_method(self) -> None:
        close_open_inputs()  # zip stores stay open per process, like HDF5 files


class TestMemoryUrlInput(ZarrInput):
    """A Zarr store at an fsspec URL (``memory://``, fsspec's in-process file system: the
    same code path as ``s3://`` and the other object stores)."""

    suffix = ".zarr"
    zarr_format = 3

    def location(self, folder: Path, stem: str) -> str:
        return f"memory://{folder.name}/{stem}{self.suffix}"


# ---------------------------------------------------------------- CSR inputs

CSR_SHAPE = (41, 6)
CSR_RANGES = [
    pytest.param(0, CSR_SHAPE[0], id="everything"),
    pytest.param(3, 17, id="middle"),
    pytest.param(CSR_SHAPE[0] - 1, CSR_SHAPE[0], id="last-row"),
    pytest.param(9, 9, id="empty"),
]


def sparse_sample() -> Any:
    """A sparse matrix with distinct stored values and some empty rows."""
    import scipy.sparse as sp

    rng = np.random.default_rng(11)
    matrix = sp.random_array(CSR_SHAPE, density=0.3, rng=rng, format="csr")
    matrix.data = np.arange(1, matrix.nnz + 1, dtype=np.float64) * 0.75
    return matrix


class CsrContract:
    """Behaviour a CSR group shows over every backend holding its three arrays. Subclasses
    give the suffix, the backend and how to change or drop one stored array in place."""

    suffix: ClassVar[str]
    backend: ClassVar[type]

    def set_value(self, path: str, name: str, index: int, value: float) -> None:
        """Overwrite entry ``index`` of the array ``name`` in place."""
        raise NotImplementedError

    def drop(self, path: str, name: str) -> None:
        """Delete the array ``name``."""
        raise NotImplementedError

    def make(self, folder: Path) -> tuple[ArrayRef, Any]:
        """Write a sparse matrix as the group ``network/A``; return (ref, matrix)."""
        matrix = sparse_sample()
        path = folder / f"sparse{self.suffix}"
        write_csr(path, "network/A", matrix)
        return ArrayRef(str(path), "network/A"), matrix

    def teardown_method(self) -> None:
        close_open_inputs()

    def test_parts_are_read_by_the_backend(self, tmp_path: Path) -> None:
        """The group's arrays come from the backend the location picks."""
        ref, _ = self.make(tmp_path)
        assert isinstance(backends.input_backend(ref), self.backend)

    def test_describe(self, tmp_path: Path) -> None:
        """Shape, value dtype and stored-value count, as written."""
        ref, matrix = self.make(tmp_path)
        info = describe_csr(ref)
        assert info.shape == matrix.shape
        assert np.dtype(info.dtype) == matrix.data.dtype
        assert info.nnz == matrix.nnz

    @pytest.mark.parametrize(("start", "stop"), CSR_RANGES)
    def test_rows_exact(self, tmp_path: Path, start: int, stop: int) -> None:
        """A row range reads back the very rows scipy.sparse slices from what was written."""
        ref, matrix = self.make(tmp_path)
        data, indices, indptr = read_csr_rows(ref, start, stop)
        want = matrix[start:stop]
        np.testing.assert_array_equal(indptr, want.indptr)
        np.testing.assert_array_equal(indices, want.indices)
        np.testing.assert_array_equal(data, want.data)
        assert data.dtype == matrix.data.dtype

    def test_digest_stable_across_reads(self, tmp_path: Path) -> None:
        """The same rows digest the same, also after the handles are closed and reopened."""
        ref, _ = self.make(tmp_path)
        first = csr_digest(ref, 2, 30).digest
        assert csr_digest(ref, 2, 30).digest == first
        close_open_inputs()
        assert csr_digest(ref, 2, 30).digest == first

    def test_digest_sees_one_changed_value(self, tmp_path: Path) -> None:
        """Changing one stored value changes the digest of the rows owning it only."""
        ref, matrix = self.make(tmp_path)
        entry = matrix.nnz // 2
        row = int(np.searchsorted(matrix.indptr, entry, side="right")) - 1
        owning, before = csr_digest(ref, row, row + 1), csr_digest(ref, 0, row)
        close_open_inputs()
        self.set_value(ref.path, "network/A/data", entry, -1.5)
        assert csr_digest(ref, row, row + 1).digest != owning.digest
        assert csr_digest(ref, 0, row).digest == before.digest

    @pytest.mark.parametrize("part", ["data", "indices", "indptr"])
    def test_missing_member(self, tmp_path: Path, part: str) -> None:
        """A missing array is one line naming the file, the group and the array."""
        ref, _ = self.make(tmp_path)
        self.drop(ref.path, f"network/A/{part}")
        with pytest.raises(InputError) as caught:
            describe_csr(ref)
        message = str(caught.value)
        assert "\n" not in message
        assert ref.describe() in message and f"missing {part}" in message


class TestHdf5Csr(CsrContract):
    """A CSR group in an HDF5 file."""

    suffix = ".h5"
    backend = backends.Hdf5Input

    def set_value(self, path: str, name: str, index: int, value: float) -> None:
        with h5py.File(path, "a") as handle:
            handle[name][index] = value

    def drop(self, path: str, name: str) -> None:
        with h5py.File(path, "a") as handle:
            del handle[name]


class TestZarrCsr(CsrContract):
    """A CSR group in a Zarr store."""

    suffix = ".zarr"
    backend = backends.ZarrInput

    def set_value(self, path: str, name: str, index: int, value: float) -> None:
        array: Any = zarr.open_group(path, mode="a")[name]
        array[index] = value

    def drop(self, path: str, name: str) -> None:
        del zarr.open_group(path, mode="a")[name]


# ---------------------------------------------------------------- result stores


def digest(path: Path) -> str:
    """sha256 over a file, or over every file (name and bytes) below a folder."""
    sha = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for item in files:
        sha.update(item.relative_to(path.parent).as_posix().encode())
        sha.update(item.read_bytes())
    return sha.hexdigest()


def litter(folder: Path) -> list[str]:
    """Temporary or set-aside siblings left in ``folder``."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".rowfold-"))


def fill(writer: ResultWriter, r: np.ndarray, tag: str) -> None:
    """Write a small result: R, a streamed Q, attributes and a report."""
    writer.put("R", r)
    writer.create("Q", (10, 3), np.dtype("<f8"), 4)
    for start in range(0, 10, 4):
        writer.write_rows("Q", start, np.full((min(4, 10 - start), 3), float(start)))
    writer.set_attrs({"method": tag, "rows": 10, "job": {"name": tag}})
    writer.add_file(report_paths(writer.path)[0], f'{{"tag": "{tag}"}}')


@pytest.fixture(params=[".h5", ".zarr"])
def out(request: pytest.FixtureRequest, tmp_path: Path) -> Path:
    """An output path of each kind."""
    return tmp_path / f"result{request.param}"


class TestResultWriter:
    """Commit puts a complete store in place; anything else leaves the old one."""

    def test_commit_puts_store_in_place(self, out: Path) -> None:
        """After commit: the arrays, attributes and report are there and no temp is left."""
        r = np.triu(np.arange(1.0, 10.0).reshape(3, 3))
        with ResultWriter(out) as writer:
            fill(writer, r, "first")
            assert not out.exists()
            writer.commit()
        assert out.exists()
        assert litter(out.parent) == []
        stored = read_result(out)
        np.testing.assert_array_equal(stored["R"], r)
        assert "Q" not in stored
        assert report_paths(out)[0].read_text() == '{"tag": "first"}'
        attrs = _attrs(out)
        assert attrs["method"] == "first"
        assert int(attrs["rows"]) == 10

    def test_q_rows_written(self, out: Path) -> None:
        """Rows streamed with write_rows land where they were sent."""
        with ResultWriter(out) as writer:
            fill(writer, np.eye(3), "q")
            writer.commit()
        q = _array(out, "Q")
        np.testing.assert_array_equal(q[:, 0], [0.0] * 4 + [4.0] * 4 + [8.0] * 2)

    @pytest.mark.parametrize("previous", [False, True], ids=["fresh", "over-previous"])
    def test_no_commit_leaves_nothing(self, out: Path, previous: bool) -> None:
        """Leaving the block without commit: no new store, no temp, the old one unchanged."""
        if previous:
            with ResultWriter(out) as writer:
                fill(writer, np.eye(3), "old")
                writer.commit()
        before = {p.name: digest(p) for p in out.parent.iterdir()}
        with ResultWriter(out) as writer:
            fill(writer, 2 * np.eye(3), "new")
            assert litter(out.parent), "the writer should work under a temporary sibling"
        assert {p.name: digest(p) for p in out.parent.iterdir()} == before
        assert out.exists() is previous

    def test_error_inside_block_leaves_previous(self, out: Path) -> None:
        """An exception half way through: the exception propagates, the old store stays."""
        with ResultWriter(out) as writer:
            fill(writer, np.eye(3), "old")
            writer.commit()
        before = {p.name: digest(p) for p in out.parent.iterdir()}
        with pytest.raises(RuntimeError, match="half way"), ResultWriter(out) as writer:
            writer.put("R", 3 * np.eye(3))
            raise RuntimeError("half way")
        assert {p.name: digest(p) for p in out.parent.iterdir()} == before

    def test_commit_replaces_previous(self, out: Path) -> None:
        """A second commit replaces the store and its report, leaving nothing set aside."""
        for tag, scale in (("old", 1.0), ("new", 5.0)):
            with ResultWriter(out) as writer:
                fill(writer, scale * np.eye(3), tag)
                writer.commit()
        np.testing.assert_array_equal(read_result(out)["R"], 5.0 * np.eye(3))
        assert _attrs(out)["method"] == "new"
        assert report_paths(out)[0].read_text() == '{"tag": "new"}'
        assert litter(out.parent) == []

    def test_litter_of_killed_run_removed(self, out: Path) -> None:
        """Temporary stores a killed run left beside the output go on the next write."""
        stale = out.with_name(f"{TMP_PREFIX}99999-{out.name}")
        if out.suffix == ".zarr":
            (stale / "R").mkdir(parents=True)
        else:
            stale.write_bytes(b"partial")
        with ResultWriter(out) as writer:
            fill(writer, np.eye(3), "after-kill")
            writer.commit()
        assert litter(out.parent) == []

    def test_report_litter_of_killed_run_removed(self, out: Path) -> None:
        """A staged report left by a run killed just before commit goes too."""
        stale = report_paths(out)[0]
        stale = stale.with_name(f"{TMP_PREFIX}99999-{stale.name}")
        stale.write_text("{}")
        with ResultWriter(out) as writer:
            fill(writer, np.eye(3), "after-kill")
            writer.commit()
        assert litter(out.parent) == []

    def test_other_outputs_temporaries_untouched(self, out: Path) -> None:
        """Writing 'result' must not delete the temporary store of 'myresult' beside it."""
        other = out.with_name(f"{TMP_PREFIX}{os.getpid() + 1}-my{out.name}")
        other.write_bytes(b"another run, still going")
        with ResultWriter(out) as writer:
            fill(writer, np.eye(3), "mine")
            writer.commit()
        assert other.exists()


def _attrs(path: Path) -> dict[str, Any]:
    if path.suffix == ".h5":
        with h5py.File(path, "r") as handle:
            return dict(handle.attrs)
    return dict(zarr.open_group(str(path), mode="r").attrs)


def _array(path: Path, name: str) -> np.ndarray:
    if path.suffix == ".h5":
        with h5py.File(path, "r") as handle:
            return np.asarray(handle[name][...])
    array: Any = zarr.open_group(str(path), mode="r")[name]
    return np.asarray(array[...])


class TestKeptInputHandles:
    """Row reads keep one HDF5 handle open per file during a job (opening costs more than
    reading a block), but must never serve stale rows or keep a file from being written."""

    def test_rows_written_after_a_read_are_seen(self, tmp_path: Path) -> None:
        path = tmp_path / "a.h5"
        first, second = sample("<f8"), sample("<f8") + 100.0
        write_arrays(path, {"A": first})
        assert np.array_equal(read_rows(ArrayRef(str(path), "A"), 0, ROWS), first)
        write_arrays(path, {"A": second})  # the writer closes the kept handle first
        assert np.array_equal(read_rows(ArrayRef(str(path), "A"), 0, ROWS), second)

    def test_a_file_replaced_behind_rowfolds_back_is_reopened(self, tmp_path: Path) -> None:
        path, other = tmp_path / "a.h5", tmp_path / "b.h5"
        write_arrays(path, {"A": sample("<f8")})
        read_rows(ArrayRef(str(path), "A"), 0, 1)
        with h5py.File(other, "w") as handle:  # another program writes a new version
            handle["A"] = sample("<f8") * 3.0
        os.replace(other, path)
        assert np.array_equal(read_rows(ArrayRef(str(path), "A"), 0, ROWS), sample("<f8") * 3.0)

    def test_closing_lets_another_writer_append(self, tmp_path: Path) -> None:
        path = tmp_path / "a.h5"
        with h5py.File(path, "w") as handle:
            handle.create_dataset("A", data=sample("<f8"), maxshape=(None, COLS))
        read_rows(ArrayRef(str(path), "A"), 0, ROWS)
        close_open_inputs()
        with h5py.File(path, "a") as handle:  # fails while a read-only handle is open
            handle["A"].resize(ROWS + 2, axis=0)
            handle["A"][ROWS:] = 5.0
        assert np.array_equal(
            read_rows(ArrayRef(str(path), "A"), ROWS, ROWS + 2), np.full((2, COLS), 5.0)
        )
        close_open_inputs()
