"""The result store's layout (``storage.result_store``): what each verb writes comes back,
bit for bit and under the documented names, from both HDF5 and Zarr result stores.

The arrays are random; the check is that reading returns exactly what was written
(storage must not round), and that the names are those SPEC.md and DEVELOPERS.md give.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from rowfold import storage

N, K, SEGMENTS = 4, 2, 3


def _answer(rng: np.random.Generator) -> storage.AnswerArrays:
    return storage.AnswerArrays(
        R=np.triu(rng.standard_normal((N, N))),
        x=rng.standard_normal((N, K)),
        x_stderr=rng.random((N, K)),
        qhb=rng.standard_normal((N, K)),
        x_covariance=rng.standard_normal((K, N, N)),
    )


def _state(rng: np.random.Generator) -> storage.StateArrays:
    return storage.StateArrays(
        R=np.triu(rng.standard_normal((N, N))),
        qhb=rng.standard_normal((N, K)),
        gram=rng.standard_normal((N, N)),
        residual_factor=np.triu(rng.standard_normal((K, K))),
        column_scale=rng.random(N),
        input_digests={},
        rows_done=1234,
        rows_used=1200,
        a_fro2=5.5,
    )


def _write(path: Path, answer: storage.AnswerArrays, state: storage.StateArrays, items: list):
    with storage.open_output(path, True, ()), storage.ResultWriter(path) as writer:
        storage.write_answer(writer, answer, [f"p{j}" for j in range(N)], {"method": "tsqr"})
        storage.write_state(writer, state)
        records = [{"label": f"s{i}"} for i in range(len(items))]
        storage.write_segments(writer, iter(items), len(items), records, [])
        writer.commit()


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_what_is_written_reads_back_exactly_under_its_names(tmp_path: Path, suffix: str) -> None:
    rng = np.random.default_rng(7)
    answer, state = _answer(rng), _state(rng)
    size = N + K
    items = [(rng.standard_normal((size, size)), rng.standard_normal((N, N))) for _ in range(3)]
    path = tmp_path / f"result{suffix}"
    _write(path, answer, state, items)
    stored = storage.read_result(path)
    assert "state/R" in stored and "state/gram" in stored
    for name in ("R", "x", "x_stderr", "qhb", "x_covariance"):
        assert np.array_equal(stored[name], getattr(answer, name)), name
    arrays, attrs = storage.read_state(path)
    assert np.array_equal(arrays["R"], state.R)
    assert np.array_equal(arrays["residual_factor"], state.residual_factor)
    assert np.array_equal(arrays["column_scale"], state.column_scale)
    assert (attrs["rows_done"], attrs["rows_used"], attrs["a_fro2"]) == (1234, 1200, 5.5)
    assert [s["label"] for s in attrs["segments"]] == ["s0", "s1", "s2"]
    for i, (factor, gram) in enumerate(items):
        assert np.array_equal(storage.read_item(path, storage.SEGMENT_FACTORS, i), factor)
        assert np.array_equal(storage.read_item(path, storage.SEGMENT_GRAMS, i), gram)
    assert storage.SEGMENT_FACTORS not in stored, "segment arrays are never read whole"


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_an_answer_without_rhs_writes_r_alone(tmp_path: Path, suffix: str) -> None:
    rng = np.random.default_rng(8)
    R = np.triu(rng.standard_normal((N, N)))
    state = storage.StateArrays(R, None, R.T @ R, None, np.ones(N), {}, 10, 10, 1.0)
    path = tmp_path / f"r_only{suffix}"
    _write(path, storage.AnswerArrays(R), state, [(R, R.T @ R)])
    stored = storage.read_result(path)
    assert "state/R" in stored and "state/gram" in stored
    assert np.array_equal(stored["R"], R)
    assert not {"x", "x_stderr", "qhb", "x_covariance"} & set(stored)
    arrays, _ = storage.read_state(path)
    assert "qhb" not in arrays and "residual_factor" not in arrays
