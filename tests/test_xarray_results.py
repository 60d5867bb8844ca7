"""Result stores open in xarray as they are: HDF5 through h5netcdf, Zarr through
``xarray.open_zarr`` (consolidated metadata), with named dimensions and no ``phony_dim_*``,
parameter names on the ``columns`` coordinate, and native JSON attributes in Zarr.

Every value xarray shows is checked against the same store read by rowfold's own reader
(:func:`rowfold.storage.read_result`): the same stored bytes read two ways must be equal.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.sparse as sp

from rowfold import storage
from rowfold.cli import main
from rowfold.storage import write_arrays, write_csr

from support import prescribed, read_store, run_inline, write_job

xr = pytest.importorskip("xarray")
pytest.importorskip("h5netcdf")

NAMES = ["north", "east", "height", "scale"]
ROWS, COLS = 120, 4


def open_result(path: Path, group: str | None = None) -> Any:
    """The result as an xarray Dataset, the way a user opens it."""
    if path.suffix == ".h5":
        return xr.open_dataset(path, engine="h5netcdf", group=group)
    return xr.open_zarr(path, group=group)


def problem(k: int | None, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    A = prescribed(ROWS, COLS, 1e3, seed=seed)
    b = rng.standard_normal(ROWS if k is None else (ROWS, k))
    return A, b


def run_job(tmp_path: Path, suffix: str, k: int | None, **sections: Any) -> Path:
    A, b = problem(k)
    sections.setdefault("input", {})["parameter_names"] = NAMES
    sections.setdefault("solve", {})["residuals"] = True
    job = write_job(tmp_path, A, b, suffix=suffix, out_suffix=suffix, **sections)
    assert run_inline(job).status == 0
    return tmp_path / f"out{suffix}"


def assert_no_phony(ds: Any) -> None:
    phony = [d for d in ds.dims if str(d).startswith("phony_dim")]
    assert not phony, f"unnamed dimensions: {phony}"


def assert_values_match(ds: Any, stored: dict[str, np.ndarray]) -> None:
    for name, value in stored.items():
        if "/" in name or name not in ds.variables or value.dtype.kind in "UOS":
            continue
        np.testing.assert_array_equal(ds[name].values, value, err_msg=name)


SUFFIXES = [".h5", ".zarr"]


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_one_rhs_column_opens_with_named_dimensions(tmp_path: Path, suffix: str) -> None:
    out = run_job(tmp_path, suffix, None)
    stored = read_store(out)
    with open_result(out) as ds:
        assert_no_phony(ds)
        assert ds["R"].dims == ("columns_i", "columns")
        assert ds["x"].dims == ("columns",)
        assert ds["x_stderr"].dims == ("columns",)
        assert ds["qhb"].dims == ("columns",)
        for name in ("residuals", "standardized_residuals", "studentized_residuals"):
            assert ds[name].dims == ("rows",), name
            assert ds[name].shape == (ROWS,), name
        assert ds["leverage"].dims == ("rows",)
        assert ds.sizes["rows"] == ROWS and ds.sizes["columns"] == COLS
        assert list(ds["columns"].values) == NAMES
        assert list(ds["columns_i"].values) == NAMES
        assert ds["x"].attrs["long_name"].startswith("least-squares solution")
        assert ds["leverage"].attrs["units"] == "1"
        assert_values_match(ds, stored)
        residuals = storage.read_rows(storage.ArrayRef(str(out), "residuals"), 0, ROWS)
        np.testing.assert_array_equal(ds["residuals"].values, residuals)


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_several_rhs_columns_add_the_rhs_dimension(tmp_path: Path, suffix: str) -> None:
    out = run_job(tmp_path, suffix, 2, solve={"covariance": True})
    stored = read_store(out)
    with open_result(out) as ds:
        assert_no_phony(ds)
        assert ds["x"].dims == ("columns", "rhs") and ds["x"].shape == (COLS, 2)
        assert ds["qhb"].dims == ("columns", "rhs")
        assert ds["residuals"].dims == ("rows", "rhs") and ds["residuals"].shape == (ROWS, 2)
        assert ds["x_covariance"].dims == ("rhs", "columns", "columns_i")
        assert_values_match(ds, stored)


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_q_and_the_state_group_have_named_dimensions(tmp_path: Path, suffix: str) -> None:
    out = run_job(tmp_path, suffix, None, output={"q": True})
    stored = read_store(out)
    with open_result(out) as ds:
        assert ds["Q"].dims == ("rows", "kept_columns")
        np.testing.assert_array_equal(ds["Q"].values, stored["Q"])
    with open_result(out, "state") as state:
        assert_no_phony(state)
        assert state["R"].dims == ("kept_columns_i", "kept_columns")
        assert state["digest_bounds"].dims == ("digest_blocks", "bound")
        np.testing.assert_array_equal(state["R"].values, stored["state/R"])


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_segment_arrays_after_update_have_named_dimensions(tmp_path: Path, suffix: str) -> None:
    A, b = problem(None)
    job = write_job(tmp_path, A[:80], b[:80], suffix=suffix, out_suffix=suffix)
    assert run_inline(job).status == 0
    write_arrays(tmp_path / f"input{suffix}", {"model/A": A, "model/b": b}, chunk_rows=64)
    assert main(["--quiet", "update", str(job), "--inline"]) == 0
    out = tmp_path / f"out{suffix}"
    stored = read_store(out)
    with open_result(out, "segments") as seg:
        assert_no_phony(seg)
        assert seg["factor"].dims == ("segments", "augmented_i", "augmented")
        assert seg["factor"].shape == (2, COLS + 1, COLS + 1)
        assert seg["gram"].dims == ("segments", "kept_columns_i", "kept_columns")
        for index in range(2):
            item = storage.read_item(out, "segments/factor", index)
            np.testing.assert_array_equal(seg["factor"].values[index], item)
    with open_result(out) as ds:
        assert ds["x"].dims == ("columns",)
        np.testing.assert_array_equal(ds["x"].values, stored["x"])


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_csr_input_result_opens_the_same_way(tmp_path: Path, suffix: str) -> None:
    A, b = problem(None)
    A[np.abs(A) < 0.05] = 0.0
    write_csr(tmp_path / f"sparse{suffix}", "net/A", sp.csr_array(A), {"net/b": b})
    job = write_job(
        tmp_path,
        A,
        b,
        suffix=suffix,
        out_suffix=suffix,
        input={"path": f"sparse{suffix}", "matrix": "net/A", "rhs": "net/b"},
    )
    assert run_inline(job).status == 0
    out = tmp_path / f"out{suffix}"
    stored = read_store(out)
    with open_result(out) as ds:
        assert_no_phony(ds)
        assert ds["R"].dims == ("columns_i", "columns")
        assert list(ds["columns"].values) == [f"x{j}" for j in range(COLS)]
        assert_values_match(ds, stored)


def test_zarr_attributes_are_native_json(tmp_path: Path) -> None:
    out = run_job(tmp_path, ".zarr", None, input={"fixed_columns": [3]})
    import zarr

    attrs = zarr.open_group(str(out), mode="r").attrs
    assert isinstance(attrs["job"], dict) and attrs["job"]["input"]["matrix"] == "model/A"
    assert isinstance(attrs["inputs"], dict)
    assert isinstance(attrs["provenance"], dict)
    assert attrs["fixed_columns"] == [3]
    assert isinstance(attrs["segments"], list)
    with open_result(out) as ds:
        assert ds.attrs["fixed_columns"] == [3]
        assert ds["x"].dims == ("columns",) and ds.sizes["columns"] == COLS


def readme_example() -> str:
    """The xarray example of the README's Outputs section."""
    text = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    outputs = text.split("## Outputs", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", outputs, re.S)
    found = [block for block in blocks if "xarray" in block]
    assert len(found) == 1, "the Outputs section has one xarray example"
    return found[0]


def test_readme_xarray_example_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    code = readme_example()
    path = re.findall(r"open_zarr\(\"([^\"]+)\"\)", code)
    assert len(path) == 1, "the example opens one Zarr result by its path"
    monkeypatch.chdir(tmp_path)
    (tmp_path / path[0]).parent.mkdir(parents=True)
    run_job(tmp_path, ".zarr", None, output={"path": str(tmp_path / path[0])})
    namespace: dict[str, Any] = {}
    exec(compile(code, "README.md", "exec"), namespace)
    with namespace["ds"] as ds:
        assert ds["x"].dims == ("columns",)
        assert list(ds["columns"].values) == NAMES
        assert ds.sizes["rows"] == ROWS
