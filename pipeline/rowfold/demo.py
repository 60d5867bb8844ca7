"""The demo scenario: photometric calibration for an invented sky survey.

The Tarnholm Ridge Survey Office (invented) calibrates its star catalogue every night.
Each row is one star observation: the measured magnitude minus the catalogue magnitude,
explained by a zero point per detector (32), atmospheric extinction times airmass, a
colour term, and six smooth flat-field terms over the focal plane: 40 unknowns. The
numbers are synthetic, drawn from a fixed seed, with known true parameters.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rowfold.storage import write_arrays

DETECTORS = 32
DEFAULT_ROWS = 300_000
NOISE_MAG = 0.012

JOB_TSQR = """\
# Nightly zero-point calibration, Tarnholm Ridge Survey Office (invented demo scenario).
name: tarnholm-zero-points-tsqr
input:
  path: data/tarnholm_photometry.h5
  matrix: calibration/design
  rhs: calibration/offsets
  rows_per_block: auto
method:
  name: tsqr
  tree: binary
output:
  path: results/zero_points_tsqr.h5
  q: false
  overwrite: true
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


def write_scenario(folder: Path, rows: int | None = None) -> list[Path]:
    """Write the demo data and job files into ``folder``; return the job paths."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "results").mkdir(exist_ok=True)
    matrix, offsets = design(rows or DEFAULT_ROWS)
    write_arrays(
        folder / "data" / "tarnholm_photometry.h5",
        {"calibration/design": matrix, "calibration/offsets": offsets},
    )
    jobs = []
    for name, text in (
        ("zero_points_tsqr.yaml", JOB_TSQR),
        ("zero_points_cholqr2.yaml", JOB_CHOLQR2),
    ):
        path = folder / name
        path.write_text(text, encoding="utf-8")
        jobs.append(path)
    return jobs
