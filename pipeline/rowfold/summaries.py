"""Bounded-size summaries of standardized residuals, for the report's plots.

A million-row job cannot put its rows in a report, so the screening pass
(:func:`rowfold.quality.screen_residuals`) feeds each block of standardized residuals and
leverages to the accumulators here. Their size is fixed whatever the number of rows m:

* :class:`RowBins` cuts the rows into at most :data:`ROW_BINS` bins of consecutive rows and
  keeps, per bin and right-hand side, the count, minimum, maximum, mean and a histogram on a
  fine grid, from which the median is read (interpolated in the grid: it lies within
  :data:`MEDIAN_STEP` of the values that split the bin's rows in halves);
* :class:`Reservoir` keeps a uniform random sample of :data:`SAMPLE_ROWS` rows, drawn by
  Li's "Algorithm L" (ACM TOMS 20(4), 1994) from a recorded seed;
* :class:`Extremes` keeps the rows of highest leverage.

Rows that carry no information (zero weight: their redundancy number is NaN) are left out
of every summary, and standardized residuals that are not finite (an uncontrolled row,
redundancy 0) are counted apart.
"""

from __future__ import annotations

import heapq
import math
from typing import Any

import numpy as np

ROW_BINS = 200
MIN_ROWS_PER_BIN = 50
SAMPLE_ROWS = 500
SAMPLE_SEED = 16
HIGH_LEVERAGE_ROWS = 20
# Per-bin histograms cover [-MEDIAN_RANGE, MEDIAN_RANGE] in steps of MEDIAN_STEP, plus one
# bin below and one above; the median is interpolated inside the bin that holds it.
MEDIAN_RANGE = 8.0
MEDIAN_STEP = 1.0 / 16.0


def informative(redundancy: np.ndarray) -> np.ndarray:
    """Rows that carry information: the rows of positive weight, whose redundancy number is
    defined (a row of weight 0 has redundancy NaN: it is no observation of the adjustment,
    and has no standardized residual to show)."""
    return np.asarray(np.isfinite(redundancy))


class RowBins:
    """Per-bin minimum, maximum, mean and median of standardized residuals over row bins.

    Parameters
    ----------
    rows : int
        m, the rows of the job (bins cover ``[0, m)``).
    rhs : int
        k, the right-hand sides.
    """

    def __init__(self, rows: int, rhs: int) -> None:
        bins = max(1, min(ROW_BINS, rows // MIN_ROWS_PER_BIN))
        self.edges = np.unique(np.linspace(0, rows, bins + 1).round().astype(np.int64))
        self.rhs = rhs
        count = self.edges.size - 1
        self.grid = np.arange(-MEDIAN_RANGE, MEDIAN_RANGE + MEDIAN_STEP / 2, MEDIAN_STEP)
        slots = self.grid.size + 1  # one below the grid, the grid's bins, one above
        self.hist = np.zeros((count, rhs, slots), dtype=np.int64)
        self.low = np.full((count, rhs), np.inf)
        self.high = np.full((count, rhs), -np.inf)
        self.total = np.zeros((count, rhs))

    def add(self, start: int, z: np.ndarray) -> None:
        """Add a block of standardized residuals (rows x k, NaN where not to be counted)."""
        if z.shape[0] == 0:
            return
        rows = np.arange(start, start + z.shape[0])
        which = np.searchsorted(self.edges, rows, side="right") - 1
        firsts = np.flatnonzero(np.r_[True, which[1:] != which[:-1]])
        bins = which[firsts]
        finite = np.isfinite(z)
        safe = np.where(finite, z, 0.0)
        with np.errstate(invalid="ignore"):
            self.low[bins] = np.fmin(self.low[bins], np.fmin.reduceat(z, firsts, axis=0))
            self.high[bins] = np.fmax(self.high[bins], np.fmax.reduceat(z, firsts, axis=0))
        self.total[bins] += np.add.reduceat(safe, firsts, axis=0)
        slot = np.searchsorted(self.grid, safe, side="right")
        slots = self.hist.shape[2]
        for col in range(self.rhs):
            keep = finite[:, col]
            flat = (which[keep] * slots + slot[keep, col]).astype(np.int64)
            counts = np.bincount(flat, minlength=self.hist.shape[0] * slots)
            self.hist[:, col, :] += counts.reshape(self.hist.shape[0], slots)

    def medians(self) -> np.ndarray:
        """Median per bin and rhs, interpolated in the fine histogram; NaN when more than
        half of a bin lies beyond the grid, or the bin is empty."""
        counts = self.hist.sum(axis=2)
        cumulative = np.cumsum(self.hist, axis=2)
        half = counts / 2.0
        out = np.full(counts.shape, np.nan)
        for index in np.ndindex(counts.shape):
            if counts[index] == 0:
                continue
            slot = int(np.searchsorted(cumulative[index], half[index], side="left"))
            if slot == 0 or slot >= self.grid.size:
                continue  # the median is beyond the grid
            before = cumulative[index][slot - 1]
            inside = self.hist[index][slot]
            fraction = (half[index] - before) / inside if inside else 0.5
            out[index] = self.grid[slot - 1] + fraction * MEDIAN_STEP
        return out

    def as_dict(self, rhs_1d: bool) -> dict[str, Any]:
        """The JSON form: bin bounds and per-bin statistics (per rhs as elsewhere)."""
        counts = self.hist.sum(axis=2)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(counts > 0, self.total / counts, np.nan)
        empty = counts == 0

        def per_bin(values: np.ndarray) -> list[Any]:
            values = np.where(empty, np.nan, values)
            return [float(v[0]) if rhs_1d else [float(u) for u in v] for v in values]

        return {
            "starts": [int(v) for v in self.edges[:-1]],
            "stops": [int(v) for v in self.edges[1:]],
            "count": [int(v[0]) if rhs_1d else [int(u) for u in v] for v in counts],
            "min": per_bin(self.low),
            "max": per_bin(self.high),
            "mean": per_bin(mean),
            "median": per_bin(self.medians()),
            "median_resolution": MEDIAN_STEP,
        }


class Reservoir:
    """A uniform random sample of a fixed number of rows from a stream (Algorithm L).

    Li, "Reservoir-sampling algorithms of time complexity O(n(1 + log(N/n)))", ACM TOMS
    20(4), 1994: after the reservoir fills, the gap to the next row taken is drawn from a
    geometric distribution, so the random numbers drawn grow with log(m), not with m.

    Parameters
    ----------
    size : int
        Rows to keep.
    seed : int
        Seed of the generator (recorded in the report, so the sample can be drawn again).
    """

    def __init__(self, size: int = SAMPLE_ROWS, seed: int = SAMPLE_SEED) -> None:
        self.size = size
        self.seed = seed
        self.rng = np.random.default_rng(seed)
        self.seen = 0
        self.rows: list[int] = []
        self.z: list[np.ndarray] = []
        self.leverage: list[float] = []
        self.weight = math.exp(math.log(self._uniform()) / size)
        self.next = size - 1 + self._gap()

    def _uniform(self) -> float:
        """A uniform number in (0, 1]."""
        return 1.0 - float(self.rng.random())

    def _gap(self) -> int:
        """Rows to the next one taken, plus one."""
        if self.weight >= 1.0:
            return 1
        step = math.log(self._uniform()) / math.log1p(-self.weight)
        return int(min(step, 2.0**62)) + 1

    def offer(self, rows: np.ndarray, z: np.ndarray, leverage: np.ndarray) -> None:
        """Offer the next rows of the stream (their numbers, z (rows x k), leverages)."""
        first = self.seen
        self.seen += rows.size
        fill = min(max(self.size - first, 0), rows.size)
        for i in range(fill):
            self.rows.append(int(rows[i]))
            self.z.append(z[i].copy())
            self.leverage.append(float(leverage[i]))
        while self.next < self.seen:
            i = self.next - first
            slot = int(self.rng.integers(self.size))
            self.rows[slot], self.z[slot] = int(rows[i]), z[i].copy()
            self.leverage[slot] = float(leverage[i])
            self.weight *= math.exp(math.log(self._uniform()) / self.size)
            self.next += self._gap()

    def as_dict(self, rhs_1d: bool) -> dict[str, Any]:
        """The JSON form, rows in increasing order."""
        order = np.argsort(np.asarray(self.rows, dtype=np.int64), kind="stable")
        return {
            "method": "uniform reservoir sample (Li 1994, Algorithm L)",
            "seed": self.seed,
            "size": len(self.rows),
            "population": self.seen,
            "rows": [self.rows[i] for i in order],
            "standardized": [
                float(self.z[i][0]) if rhs_1d else [float(v) for v in self.z[i]] for i in order
            ],
            "leverage": [self.leverage[i] for i in order],
        }


class Extremes:
    """The rows of highest leverage (row, leverage, standardized residuals)."""

    def __init__(self, size: int = HIGH_LEVERAGE_ROWS) -> None:
        self.size = size
        self.heap: list[tuple[float, int, tuple[float, ...]]] = []

    def offer(self, rows: np.ndarray, z: np.ndarray, leverage: np.ndarray) -> None:
        """Offer a block's rows."""
        if rows.size == 0:
            return
        top = np.argsort(leverage)[::-1][: self.size]
        for i in top:
            item = (float(leverage[i]), int(rows[i]), tuple(float(v) for v in z[i]))
            if len(self.heap) < self.size:
                heapq.heappush(self.heap, item)
            elif item > self.heap[0]:
                heapq.heapreplace(self.heap, item)

    def as_list(self, rhs_1d: bool) -> list[dict[str, Any]]:
        """Highest leverage first."""
        return [
            {"row": row, "leverage": lev, "standardized": z[0] if rhs_1d else list(z)}
            for lev, row, z in sorted(self.heap, reverse=True)
        ]
