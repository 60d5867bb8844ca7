"""The demo scenarios: a dense photometric calibration and a sparse levelling network.

The Tarnholm Ridge Survey Office (invented) calibrates its star catalogue every night.
Each row is one star observation: the measured magnitude minus the catalogue magnitude,
explained by a zero point per detector (32), atmospheric extinction times airmass, a
colour term, and six smooth flat-field terms over the focal plane: 40 unknowns.

The Brackenholt Fen drainage board (invented) monitors the heights of 240 benchmarks on
its drains and pumping stations as the peat shrinks. Each row is one levelled height
difference between two neighbouring benchmarks (+1 and -1 in A, so A is sparse and stored
as CSR), weighted by 1 / distance as levelling error grows with the square root of the
distance. The board's datum benchmark (column 0) is held fixed at height 0
(``input.fixed_columns``), so the other heights are relative to it. The benchmarks' names
are a dataset beside the network (``input.parameter_names``); the calibration's parameter
names are a list in its job files.

The Tarnholm office also keeps a nightly fit over its last two nights
(:data:`JOB_NIGHTLY`): each night's observations are appended to one file and folded in as
a segment (``update``); when a night is re-calibrated in place, only its rows are read
again (``replace``); ``update.window: 2`` retires the oldest night as a new one arrives
(:func:`write_nights`, the steps in :data:`NIGHT_STEPS`).

The numbers of both are synthetic, drawn from fixed seeds, with known true parameters.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import scipy.sparse as sp

from rowfold.storage import write_arrays, write_csr

DETECTORS = 32
DEFAULT_ROWS = 300_000
NOISE_MAG = 0.012

BENCHMARKS = 240
NETWORK_ROWS = 400_000
NEIGHBOURS = 6
FEN_KM = (14.0, 9.0)
NOISE_M_PER_ROOT_KM = 0.0012
DATUM = 0

JOB_TSQR = """\
# Nightly zero-point calibration, Tarnholm Ridge Survey Office (invented demo scenario).
name: tarnholm-zero-points-tsqr
input:
  path: data/tarnholm_photometry.h5
  matrix: calibration/design
  rhs: calibration/offsets
  rows_per_block: auto
  parameter_names: [zp_d00, zp_d01, zp_d02, zp_d03, zp_d04, zp_d05, zp_d06, zp_d07,
    zp_d08, zp_d09, zp_d10, zp_d11, zp_d12, zp_d13, zp_d14, zp_d15, zp_d16, zp_d17,
    zp_d18, zp_d19, zp_d20, zp_d21, zp_d22, zp_d23, zp_d24, zp_d25, zp_d26, zp_d27,
    zp_d28, zp_d29, zp_d30, zp_d31, extinction, colour, flat_x, flat_y, flat_xx,
    flat_xy, flat_yy, flat_xxx]
method:
  name: tsqr
  tree: binary
output:
  path: results/zero_points_tsqr.h5
  q: false
  overwrite: true
solve:
  covariance: true       # full covariance of the zero points
  residuals: true        # standardized residuals: flags observations to look at
  flag_above: 4.0
  refine: true           # iterative refinement with extended-precision residuals
gates:
  orthogonality: 1.0e-12
  residual: 1.0e-12
"""

JOB_CHOLQR2 = """\
# The same calibration by CholeskyQR2, writing Q as well (invented demo scenario).
name: tarnholm-zero-points-cholqr2
input:
  path: data/tarnholm_photometry.h5
  matrix: calibration/design
  rhs: calibration/offsets
  parameter_names: [zp_d00, zp_d01, zp_d02, zp_d03, zp_d04, zp_d05, zp_d06, zp_d07,
    zp_d08, zp_d09, zp_d10, zp_d11, zp_d12, zp_d13, zp_d14, zp_d15, zp_d16, zp_d17,
    zp_d18, zp_d19, zp_d20, zp_d21, zp_d22, zp_d23, zp_d24, zp_d25, zp_d26, zp_d27,
    zp_d28, zp_d29, zp_d30, zp_d31, extinction, colour, flat_x, flat_y, flat_xx,
    flat_xy, flat_yy, flat_xxx]
method:
  name: cholqr2
output:
  path: results/zero_points_cholqr2.zarr
  q: true
  overwrite: true
gates:
  orthogonality: 1.0e-12
  gram: 1.0e-12
"""


JOB_NIGHTLY = """\
# Zero points over the last two nights, Tarnholm Ridge Survey Office (invented demo scenario).
# Each night is one segment: `update --label NIGHT` adds it, `replace JOB NIGHT` reads a
# re-calibrated night again, and the window retires the oldest night as a new one arrives.
name: tarnholm-zero-points-nightly
input:
  path: data/tarnholm_nights.h5
  matrix: calibration/design
  rhs: calibration/offsets
  rows_per_block: 5000
method:
  name: tsqr
output:
  path: results/zero_points_nightly.h5
  overwrite: true
update:
  label: 2026-11-28
  window: 2
gates:
  gram: 1.0e-12
"""

# The nightly demo: (verb, night label, nights in the file, nights re-calibrated).
NIGHT_STEPS = (
    ("run", "2026-11-28", 1, ()),
    ("update", "2026-11-29", 2, ()),
    ("replace", "2026-11-29", 2, ("2026-11-29",)),
    ("update", "2026-11-30", 3, ("2026-11-29",)),
)
NIGHT_LABELS = ("2026-11-28", "2026-11-29", "2026-11-30")
# A re-calibrated night: its offsets corrected by this many magnitudes (a revised
# photometric standard), in place, the same rows.
RECALIBRATION_MAG = -0.004


def night_rows(rows: int | None) -> int:
    """Observations per night: a quarter of the main calibration's (75,000 by default)."""
    return max(2_000, (rows or DEFAULT_ROWS) // 4000 * 1000)


def write_nights(folder: Path, nights: int, rows: int, recalibrated: tuple[str, ...] = ()) -> Path:
    """Write the first ``nights`` nights into ``data/tarnholm_nights.h5`` (each night drawn
    from its own seed; a re-calibrated night has its offsets corrected in place)."""
    matrices, offsets = [], []
    for night in range(nights):
        matrix, offset = design(rows, seed=100 + night)
        if NIGHT_LABELS[night] in recalibrated:
            offset = offset + RECALIBRATION_MAG
        matrices.append(matrix)
        offsets.append(offset)
    path = folder / "data" / "tarnholm_nights.h5"
    arrays = {"calibration/design": np.vstack(matrices), "calibration/offsets": np.hstack(offsets)}
    write_arrays(path, arrays, chunk_rows=5000)
    return path


def true_parameters() -> np.ndarray:
    """The parameters the synthetic data were drawn from (for checking the demo)."""
    rng = np.random.default_rng(20261201)
    zero_points = 25.0 + 0.05 * rng.standard_normal(DETECTORS)
    return np.concatenate([zero_points, [-0.18, 0.031], 0.004 * rng.standard_normal(6)])


def design(rows: int, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """Return the design matrix (rows x 40) and the observed offsets (rows)."""
    rng = np.random.default_rng(seed)
    detector = rng.integers(0, DETECTORS, rows)
    airmass = 1.0 + rng.gamma(2.0, 0.15, rows)
    colour = rng.normal(0.6, 0.35, rows)
    fx, fy = rng.uniform(-1.0, 1.0, (2, rows))
    columns = np.zeros((rows, DETECTORS + 8))
    columns[np.arange(rows), detector] = 1.0
    columns[:, DETECTORS] = airmass
    columns[:, DETECTORS + 1] = colour
    flat = np.stack([fx, fy, fx * fx, fx * fy, fy * fy, fx * fx * fx], axis=1)
    columns[:, DETECTORS + 2 :] = flat
    offsets = columns @ true_parameters() + NOISE_MAG * rng.standard_normal(rows)
    return columns, offsets


JOB_LEVELLING = """\
# Levelling network adjustment, Brackenholt Fen drainage board (invented demo scenario).
# A is sparse (a CSR group): one row per levelled height difference, +1/-1 on two benchmarks.
name: brackenholt-levelling-cholqr2
input:
  path: data/brackenholt_levelling.h5
  matrix: network/A
  rhs: network/dh
  weights: network/w
  fixed_columns: [0]
  parameter_names: network/benchmarks   # a dataset of names, one per benchmark
method:
  name: cholqr2
output:
  path: results/brackenholt_heights.h5
  overwrite: true
gates:
  gram: 1.0e-12
"""


# Drains, sluices and droves of the (invented) fen, for naming its benchmarks.
PLACES = (
    "Ketterby Sluice",
    "Haddle Lode",
    "Scurry Dyke",
    "Sallow Drain",
    "Moorcock Bridge",
    "Fenny Reach",
    "Tollgate Culvert",
    "Wrayholme Cut",
    "Pellow Outfall",
    "Hobble Staunch",
    "Crane Fen Drove",
    "Lattermere Drove",
)


def benchmark_names(benchmarks: int = BENCHMARKS) -> list[str]:
    """Names of the benchmarks; the datum (column 0) is the pumping-station plate."""
    names = [f"BF{i:03d} {PLACES[i % len(PLACES)]}" for i in range(benchmarks)]
    names[DATUM] = f"BF{DATUM:03d} Brackenholt pumping station datum plate"
    return names


def benchmark_positions(benchmarks: int = BENCHMARKS, seed: int = 11) -> np.ndarray:
    """Benchmark positions in km (benchmarks x 2), scattered over the fen."""
    rng = np.random.default_rng(seed)
    return rng.uniform((0.0, 0.0), FEN_KM, (benchmarks, 2))


def true_heights(benchmarks: int = BENCHMARKS, seed: int = 11) -> np.ndarray:
    """Heights (m) the network data were drawn from, relative to the datum benchmark."""
    xy = benchmark_positions(benchmarks, seed)
    rng = np.random.default_rng(seed + 1)
    x, y = xy[:, 0] / FEN_KM[0], xy[:, 1] / FEN_KM[1]
    heights = -1.2 + 0.9 * x - 0.4 * np.sin(3.0 * y) + 0.05 * rng.standard_normal(benchmarks)
    return heights - heights[DATUM]


def network_pairs(benchmarks: int = BENCHMARKS, seed: int = 11) -> np.ndarray:
    """Pairs of benchmarks that are levelled between (edges x 2, first < second).

    Each benchmark is tied to its :data:`NEIGHBOURS` nearest, and a traverse along the fen
    (benchmarks in order of easting) keeps the network connected.
    """
    xy = benchmark_positions(benchmarks, seed)
    dist = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    np.fill_diagonal(dist, np.inf)
    near = np.argsort(dist, axis=1)[:, : min(NEIGHBOURS, benchmarks - 1)]
    order = np.argsort(xy[:, 0])
    pairs = np.concatenate(
        [
            np.stack([np.repeat(np.arange(benchmarks), near.shape[1]), near.ravel()], axis=1),
            np.stack([order[:-1], order[1:]], axis=1),
        ]
    )
    return np.unique(np.sort(pairs, axis=1), axis=0)


def network(
    rows: int, benchmarks: int = BENCHMARKS, seed: int = 11
) -> tuple[sp.csr_matrix, np.ndarray, np.ndarray]:
    """Return the network's design (rows x benchmarks, CSR), height differences and weights.

    Row r levels from benchmark i to benchmark j over d km: ``dh = H_j - H_i + e`` with
    ``e ~ N(0, (NOISE_M_PER_ROOT_KM^2) d)``, weight ``1 / d``; A has -1 at i and +1 at j.
    """
    xy = benchmark_positions(benchmarks, seed)
    pairs = network_pairs(benchmarks, seed)
    rng = np.random.default_rng(seed + 2)
    pick = pairs[rng.integers(0, pairs.shape[0], rows)]
    forward = rng.random(rows) < 0.5
    low, high = pick[:, 0], pick[:, 1]
    km = np.maximum(np.hypot(*(xy[high] - xy[low]).T), 0.05) * rng.uniform(1.0, 1.3, rows)
    heights = true_heights(benchmarks, seed)
    # Columns in each row are ascending (low < high): +1 on the far end of the run.
    signs = np.where(forward, 1.0, -1.0)
    data = np.stack([-signs, signs], axis=1).ravel()
    indices = np.stack([low, high], axis=1).ravel()
    indptr = np.arange(0, 2 * rows + 1, 2)
    A = sp.csr_matrix((data, indices, indptr), shape=(rows, benchmarks))
    dh = signs * (heights[high] - heights[low])
    dh += NOISE_M_PER_ROOT_KM * np.sqrt(km) * rng.standard_normal(rows)
    return A, dh, 1.0 / km


def network_rows(rows: int | None) -> int:
    """Network rows for ``demo --rows N``: N scaled like the photometry (300,000 -> 400,000)."""
    if rows is None:
        return NETWORK_ROWS
    return max(4 * BENCHMARKS, round(rows * NETWORK_ROWS / DEFAULT_ROWS))


def write_scenario(folder: Path, rows: int | None = None) -> list[Path]:
    """Write the demo data and job files into ``folder``; return the job paths.

    ``rows`` sets the photometry observations (default 300,000); the levelling network
    scales with it (default 400,000 height differences).
    """
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "results").mkdir(exist_ok=True)
    matrix, offsets = design(rows or DEFAULT_ROWS)
    write_arrays(
        folder / "data" / "tarnholm_photometry.h5",
        {"calibration/design": matrix, "calibration/offsets": offsets},
    )
    A, dh, w = network(network_rows(rows))
    levelling = folder / "data" / "brackenholt_levelling.h5"
    levelling.unlink(missing_ok=True)
    names = np.array(benchmark_names(A.shape[1]))
    write_csr(
        levelling, "network/A", A, {"network/dh": dh, "network/w": w, "network/benchmarks": names}
    )
    write_nights(folder, 1, night_rows(rows))  # the nightly job's first night
    jobs = []
    for name, text in (
        ("zero_points_tsqr.yaml", JOB_TSQR),
        ("zero_points_cholqr2.yaml", JOB_CHOLQR2),
        ("levelling_cholqr2.yaml", JOB_LEVELLING),
        ("zero_points_nightly.yaml", JOB_NIGHTLY),
    ):
        path = folder / name
        path.write_text(text, encoding="utf-8")
        jobs.append(path)
    return jobs
