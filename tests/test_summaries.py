"""Bounded-size summaries of standardized residuals (rowfold.summaries).

References: numpy's min, max and median of the same rows; for the reservoir, the
inclusion probability of a uniform sample of k rows out of N is k / N for every row
(Li, ACM TOMS 20(4), 1994), checked with a binomial tolerance of 5 standard deviations.
"""

from __future__ import annotations

import numpy as np
import pytest

from rowfold import summaries
from rowfold.summaries import Extremes, Reservoir, RowBins


def blocks(rows: int, size: int) -> list[tuple[int, int]]:
    return [(start, min(start + size, rows)) for start in range(0, rows, size)]


@pytest.mark.parametrize(("rows", "block"), [(1000, 1000), (1000, 37), (10_007, 999), (60, 7)])
def test_row_bins_give_exact_extremes_and_medians_within_their_resolution(
    rows: int, block: int
) -> None:
    rng = np.random.default_rng(rows + block)
    z = rng.standard_normal((rows, 2)) * np.array([1.0, 3.0])
    z[rows // 3, 1] = np.nan  # a leverage-1 row: not counted
    bins = RowBins(rows, 2)
    for start, stop in blocks(rows, block):
        bins.add(start, z[start:stop])
    out = bins.as_dict(rhs_1d=False)
    assert out["starts"][0] == 0 and out["stops"][-1] == rows
    assert len(out["starts"]) == min(summaries.ROW_BINS, rows // summaries.MIN_ROWS_PER_BIN)
    step = out["median_resolution"]
    for i, (start, stop) in enumerate(zip(out["starts"], out["stops"], strict=True)):
        for col in range(2):
            values = z[start:stop, col]
            values = np.sort(values[np.isfinite(values)])
            assert out["count"][i][col] == values.size
            assert out["min"][i][col] == values[0] and out["max"][i][col] == values[-1]
            assert out["mean"][i][col] == pytest.approx(values.mean(), abs=1e-12)
            lower, upper = values[(values.size - 1) // 2], values[values.size // 2]
            assert lower - step <= out["median"][i][col] <= upper + step


def test_row_bins_keep_a_fixed_size_whatever_the_rows() -> None:
    small, large = RowBins(20_000, 1), RowBins(2_000_000_000, 1)
    assert small.hist.shape == large.hist.shape
    assert small.low.shape == large.low.shape == (summaries.ROW_BINS, 1)


def test_reservoir_is_uniform_and_does_not_depend_on_the_block_split() -> None:
    size, population, trials = 50, 2000, 400
    hits = np.zeros(population)
    for seed in range(trials):
        sample = Reservoir(size, seed)
        for start, stop in blocks(population, 333):
            rows = np.arange(start, stop)
            sample.offer(rows, rows[:, None].astype(float), np.zeros(rows.size))
        chosen = sample.as_dict(rhs_1d=True)["rows"]
        assert len(set(chosen)) == size
        hits[chosen] += 1
    deciles = hits.reshape(10, -1).sum(axis=1)
    expected = trials * size / 10
    p = 1 / 10
    spread = np.sqrt(trials * size * p * (1 - p))
    assert np.all(np.abs(deciles - expected) <= 5 * spread), deciles
    # the same seed gives the same sample, however the rows arrive
    splits = []
    for block in (1, 97, population):
        sample = Reservoir(size, 7)
        for start, stop in blocks(population, block):
            rows = np.arange(start, stop)
            sample.offer(rows, rows[:, None].astype(float), rows / population)
        splits.append(sample.as_dict(rhs_1d=True))
    assert splits[0] == splits[1] == splits[2]
    assert splits[0]["standardized"] == [float(r) for r in splits[0]["rows"]]
    assert splits[0]["population"] == population and splits[0]["seed"] == 7


def test_reservoir_keeps_every_row_of_a_short_stream() -> None:
    sample = Reservoir(500, 3)
    rows = np.arange(120)
    sample.offer(rows, np.zeros((120, 1)), np.zeros(120))
    assert sample.as_dict(rhs_1d=True)["rows"] == list(range(120))


def test_extremes_keep_the_highest_leverages_across_blocks() -> None:
    rng = np.random.default_rng(5)
    h = rng.uniform(0, 1, 5000)
    top = Extremes(20)
    for start, stop in blocks(5000, 611):
        rows = np.arange(start, stop)
        top.offer(rows, np.zeros((rows.size, 1)), h[start:stop])
    assert [t["row"] for t in top.as_list(rhs_1d=True)] == list(np.argsort(h)[::-1][:20])


def test_rows_of_zero_weight_are_not_informative() -> None:
    """A row of weight 0 has redundancy NaN (model_tests.redundancy_numbers); an
    uncontrolled row (redundancy 0) and a row of zero residual still count."""
    redundancy = np.array([np.nan, 0.0, 0.8, 1.0])
    assert list(summaries.informative(redundancy)) == [False, True, True, True]
