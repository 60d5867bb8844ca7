"""CSR groups in the scientific-Python ecosystem's on-disk sparse convention (group
attributes ``encoding-type: csr_matrix``, ``encoding-version: 0.1.0`` and ``shape``; arrays
``data``, ``indices``, ``indptr``, as anndata writes them) are read without conversion, and
``write_csr`` writes those attributes; a group declaring another encoding is refused, never
misread.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import scipy.sparse as sp
import yaml

from rowfold.cli import main
from rowfold.storage import describe_path, read_result, write_arrays
from rowfold.storage.csr import write_csr

import bounds

ROWS, COLS = 400, 6


def network(seed: int = 5) -> tuple[sp.csr_array, np.ndarray]:
    """An invented levelling-like sparse design: each row ties two of the columns, plus
    one row per column (a weak datum), so the matrix has full column rank."""
    rng = np.random.default_rng(seed)
    rows, cols, vals = [], [], []
    for i in range(ROWS - COLS):
        a, b = rng.choice(COLS, 2, replace=False)
        rows += [i, i]
        cols += [int(a), int(b)]
        vals += [1.0, -1.0]
    for j in range(COLS):
        rows.append(ROWS - COLS + j)
        cols.append(j)
        vals.append(0.1)
    A = sp.csr_array((vals, (rows, cols)), shape=(ROWS, COLS))
    return A, A @ rng.uniform(5, 50, COLS) + 1e-3 * rng.standard_normal(ROWS)


def write_convention_group(path: Path, matrix: Any, kind: str, version: str = "0.1.0") -> None:
    """Write a sparse group the way the on-disk convention lays it out (not via rowfold)."""
    compressed = sp.csr_array(matrix) if kind == "csr_matrix" else sp.csc_array(matrix)
    parts = {"data": compressed.data, "indices": compressed.indices, "indptr": compressed.indptr}
    attrs = {"encoding-type": kind, "encoding-version": version}
    if path.suffix == ".h5":
        with h5py.File(path, "a") as handle:
            group = handle.create_group("X")
            group.attrs.update(attrs)
            group.attrs["shape"] = np.asarray(compressed.shape, dtype=np.int64)
            for name, array in parts.items():
                group.create_dataset(name, data=array)
        return
    import zarr

    group = zarr.open_group(str(path), mode="a").require_group("X")
    group.attrs.update({**attrs, "shape": list(compressed.shape)})
    for name, array in parts.items():
        group.create_array(name, shape=array.shape, dtype=array.dtype)[...] = array


def job(folder: Path, data: Path) -> Path:
    spec = {
        "name": "fen-levelling",
        "input": {"path": data.name, "matrix": "X", "rhs": "b"},
        "output": {"path": "out.zarr", "overwrite": True},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(spec), encoding="utf-8")
    return path


def prepared(tmp_path: Path, suffix: str, kind: str, version: str = "0.1.0") -> Path:
    A, b = network()
    data = tmp_path / f"levels{suffix}"
    write_arrays(data, {"b": b})
    write_convention_group(data, A, kind, version)
    return job(tmp_path, data)


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_convention_csr_group_is_read_as_it_is(tmp_path: Path, suffix: str) -> None:
    A, b = network()
    assert main(["--quiet", "run", str(prepared(tmp_path, suffix, "csr_matrix")), "--inline"]) == 0
    x = read_result(tmp_path / "out.zarr")["x"]
    dense = A.toarray()
    reference = np.linalg.lstsq(dense, b, rcond=None)[0]
    s = np.linalg.svd(dense, compute_uv=False)
    kappa = float(s[0] / s[-1])
    r = b - dense @ reference
    ratio = float(np.linalg.norm(r) / (s[0] * np.linalg.norm(reference)))
    # Least-squares perturbation bound (Wedin 1973; Higham 2002, Thm 20.1): bounds.py.
    assert bounds.relative_error(x, reference) <= bounds.lstsq_solution(COLS, kappa, ratio)


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
@pytest.mark.parametrize(
    ("kind", "version", "says"),
    [
        ("csc_matrix", "0.1.0", "encoding-type is 'csc_matrix'"),
        ("csr_matrix", "9.0.0", "encoding-version is '9.0.0'"),
    ],
)
def test_other_encodings_are_refused_not_misread(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    suffix: str,
    kind: str,
    version: str,
    says: str,
) -> None:
    assert main(["run", str(prepared(tmp_path, suffix, kind, version)), "--inline"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and says in err[0] and f"levels{suffix}:X" in err[0]
    assert not (tmp_path / "out.zarr").exists()


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_write_csr_writes_the_encoding_attributes(tmp_path: Path, suffix: str) -> None:
    A, _ = network()
    path = tmp_path / f"written{suffix}"
    write_csr(path, "net/A", A)
    attrs = describe_path(path)["groups"]["net/A"]
    assert attrs["encoding-type"] == "csr_matrix"
    assert attrs["encoding-version"] == "0.1.0"
    assert list(attrs["shape"]) == [ROWS, COLS]
