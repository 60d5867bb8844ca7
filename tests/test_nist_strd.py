"""NIST StRD linear-regression reference tests for ``rowfold run``.

Source: NIST/ITL Statistical Reference Datasets (StRD), linear least-squares regression, the 11
files in ``tests/data/nist-strd/`` (see ``SOURCE.md`` there). Their certified estimates, standard
deviations of the estimates and residual standard deviations were computed by NIST in 500-digit
arithmetic and are printed to 15 significant digits. Accuracy is scored as the log relative error
(LRE, McCullough, The American Statistician 52(4), 1998), one score per certified value.

Floors are not observed figures: :func:`nist_strd.floors` derives each one from the first-order
perturbation bound of least squares with a columnwise backward error, from the design matrix's
own singular values (numpy SVD) and u, as ``-log10(bound)`` capped at 15. Every run must exit 0
and meet every floor, except where a test names the set as one the method must refuse, with the
reason, and checks that reason against the design matrix's condition number.

Each case writes the design matrix and response to an HDF5 file, writes a job file as in the
product contract (SPEC.md, "Job file"), runs it in-process through the command line entry point
and reads back the result store (``x``, ``x_stderr``) and the JSON report (``residual_std``).
"""

from __future__ import annotations

import contextlib
import io
import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import yaml

import bounds
from nist_strd import (
    DATASET_NAMES,
    Floors,
    NistCase,
    condition,
    equilibrated_condition,
    floors,
    load_dataset,
    lre,
)

RowsPerBlock = int | str

# Wampler1 and Wampler2 are exact fits (NIST StRD: certified residual SD 0).
EXACT_FITS = ("Wampler1", "Wampler2")

# CholeskyQR2 refuses when its first-pass condition estimate reaches u^-1/2, about 9.5e7
# (Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44, 2015; ../shared/CHECKS.md). The
# reason each set must be refused is checked against the raw design's condition number
# (numpy SVD) in the test; every other set must be accepted and meet its floors.
CHOLQR2_LIMIT = 1 / np.sqrt(bounds.unit_roundoff())
CHOLQR2_MUST_REFUSE: dict[str, str] = {
    "Pontius": "raw condition about 1.4e13, above u^-1/2",
    "Filip": "raw condition about 1.8e15, above u^-1/2 (the Gram matrix is not positive definite)",
    "Longley": "raw condition about 4.9e9, above u^-1/2",
}
# Sets CholeskyQR2 must accept are this far below the limit, so that an estimate of the
# condition number (within a small factor of the SVD's) cannot flip the decision
# (common-practice margin).
CHOLQR2_ACCEPT_MARGIN = 10.0

EXIT_OK = 0  # SPEC.md, "Exit status"
EXIT_RUN_FAILED = 4  # SPEC.md, "Exit status"

ROWS_PER_BLOCK: list[RowsPerBlock] = ["auto", 7]


@dataclass(frozen=True)
class Outcome:
    """What one ``rowfold run`` produced."""

    status: int
    x: np.ndarray | None
    x_stderr: np.ndarray | None
    residual_std: float | None
    stderr_text: str


def _write_inputs(case: NistCase, folder: Path) -> Path:
    """Write X as ``design/X`` and y as ``design/y`` into an HDF5 file."""
    path = folder / f"{case.name}.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("design/X", data=case.X)
        f.create_dataset("design/y", data=case.y)
    return path


def _write_job(data: Path, method: str, rows_per_block: RowsPerBlock, folder: Path) -> Path:
    """Write a job file per SPEC.md, one local thread, output ``result.h5`` beside it."""
    job = {
        "name": f"nist-strd-{data.stem}-{method}",
        "input": {
            "path": data.name,
            "matrix": "design/X",
            "rhs": "design/y",
            "rows_per_block": rows_per_block,
        },
        "method": {"name": method},
        "output": {"path": "result.h5"},
        "cluster": {"processes": False, "workers": 1, "threads_per_worker": 1},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job, sort_keys=False), encoding="utf-8")
    return path


def _call_main(job: Path) -> int:
    """Run ``rowfold run JOB`` in-process and return its exit status."""
    from rowfold.cli import main

    status: object
    try:
        status = main(["run", str(job)])
    except SystemExit as exc:  # a CLI may also leave through sys.exit
        status = 0 if exc.code is None else exc.code
    assert isinstance(status, int), f"rowfold.cli.main returned {status!r}, not an exit status"
    return status


def _scalar(value: Any) -> float:
    """``residual_std`` is a number for 1-D rhs or a one-entry list per rhs column."""
    if isinstance(value, list):
        assert len(value) == 1, f"one rhs column, got residual_std={value!r}"
        value = value[0]
    return float(value)


def _read_outcome(folder: Path, status: int, stderr_text: str) -> Outcome:
    """Read ``x``, ``x_stderr`` and the report's ``residual_std`` if the store exists."""
    store, report = folder / "result.h5", folder / "result.report.json"
    if not store.exists():
        return Outcome(status, None, None, None, stderr_text)
    with h5py.File(store, "r") as f:
        x = np.asarray(f["x"][()], dtype=np.float64).ravel()
        x_stderr = np.asarray(f["x_stderr"][()], dtype=np.float64).ravel()
    residual_std = _scalar(json.loads(report.read_text(encoding="utf-8"))["residual_std"])
    return Outcome(status, x, x_stderr, residual_std, stderr_text)


def run_rowfold(
    case: NistCase, method: str, rows_per_block: RowsPerBlock, folder: Path, *, capture: bool
) -> Outcome:
    """Write inputs and job for ``case`` into ``folder``, run it, and read what it wrote.

    With ``capture`` the run's stderr is kept in the outcome (for assertion messages); without
    it stderr goes wherever pytest's ``capsys`` sends it.
    """
    job = _write_job(_write_inputs(case, folder), method, rows_per_block, folder)
    if not capture:
        return _read_outcome(folder, _call_main(job), "")
    buffer = io.StringIO()
    with contextlib.redirect_stderr(buffer):
        status = _call_main(job)
    return _read_outcome(folder, status, buffer.getvalue())


@pytest.fixture(scope="module")
def tsqr_outcome(
    tmp_path_factory: pytest.TempPathFactory,
) -> Callable[[str, RowsPerBlock], Outcome]:
    """Run each (dataset, rows_per_block) with method tsqr once and share it between tests."""
    cache: dict[tuple[str, RowsPerBlock], Outcome] = {}

    def get(name: str, rows_per_block: RowsPerBlock) -> Outcome:
        key = (name, rows_per_block)
        if key not in cache:
            folder = tmp_path_factory.mktemp(f"{name}-tsqr-rpb{rows_per_block}")
            cache[key] = run_rowfold(
                load_dataset(name), "tsqr", rows_per_block, folder, capture=True
            )
        return cache[key]

    return get


def _succeeded(outcome: Outcome) -> Outcome:
    """Assert the run exited 0 and wrote a store; return it for chaining."""
    assert outcome.status == EXIT_OK, f"exit {outcome.status}; stderr: {outcome.stderr_text}"
    assert outcome.x is not None and outcome.x_stderr is not None
    assert outcome.residual_std is not None
    return outcome


def _meets(what: str, computed: np.ndarray, certified: np.ndarray, floor: np.ndarray) -> list[str]:
    """Return one line per certified value whose LRE is below its floor."""
    scores = [lre(x, c) for x, c in zip(np.ravel(computed), np.ravel(certified), strict=True)]
    floor = np.broadcast_to(floor, np.shape(scores))
    return [
        f"{what}[{i}]: LRE {score:.2f} < floor {f:.2f} (computed {x!r}, certified {c!r})"
        for i, (score, f, x, c) in enumerate(
            zip(scores, floor, np.ravel(computed), np.ravel(certified), strict=True)
        )
        if not score >= f
    ]


def _informative(floor: Floors) -> None:
    """A floor at or below 0 would accept an answer wrong by more than its own size."""
    least = min(floor.coefficients.min(), floor.stderr.min(), floor.residual_sd)
    assert least > 0, f"bound too loose to test anything (least floor {least:.2f})"


def _tsqr_floors(case: NistCase) -> Floors:
    """Floors for TSQR: Householder QR's columnwise backward error (bounds.py default)."""
    floor = floors(case)
    _informative(floor)
    return floor


TSQR_CASES = [
    pytest.param(name, rpb, id=f"{name}-rows_per_block={rpb}")
    for name in DATASET_NAMES
    for rpb in ROWS_PER_BLOCK
]


@pytest.mark.parametrize(("name", "rows_per_block"), TSQR_CASES)
def test_tsqr_coefficients(
    name: str, rows_per_block: RowsPerBlock, tsqr_outcome: Callable[..., Outcome]
) -> None:
    """NIST StRD certified estimates: each coefficient's LRE meets its perturbation floor.

    With rows_per_block=7 the rows fall into several blocks (some shorter than the number of
    parameters, for Filip and Longley) and are combined through the reduction tree.
    """
    case = load_dataset(name)
    out = _succeeded(tsqr_outcome(name, rows_per_block))
    assert out.x is not None and out.x.shape == (case.n_params,)
    floor = _tsqr_floors(case).coefficients
    assert not (failures := _meets("x", out.x, case.certified_estimates, floor)), failures


@pytest.mark.parametrize(("name", "rows_per_block"), TSQR_CASES)
def test_tsqr_standard_deviations(
    name: str, rows_per_block: RowsPerBlock, tsqr_outcome: Callable[..., Outcome]
) -> None:
    """NIST StRD certified standard deviations of the estimates meet their floors.

    Where the certified value is 0 (the exact fits Wampler1/2) McCullough's LRE uses the
    absolute error, -log10|x|, and the floor is the absolute bound (nist_strd.floors).
    """
    case = load_dataset(name)
    out = _succeeded(tsqr_outcome(name, rows_per_block))
    assert out.x_stderr is not None and out.x_stderr.shape == (case.n_params,)
    floor = _tsqr_floors(case).stderr
    failures = _meets("x_stderr", out.x_stderr, case.certified_stderr, floor)
    assert not failures, failures


@pytest.mark.parametrize(("name", "rows_per_block"), TSQR_CASES)
def test_tsqr_residual_sd(
    name: str, rows_per_block: RowsPerBlock, tsqr_outcome: Callable[..., Outcome]
) -> None:
    """NIST StRD certified residual standard deviation meets its floor.

    For the exact fits (Wampler1/2, certified 0) the computed value is rounding noise, and
    its LRE -log10|s| must meet the absolute bound.
    """
    case = load_dataset(name)
    out = _succeeded(tsqr_outcome(name, rows_per_block))
    assert out.residual_std is not None and out.residual_std >= 0.0
    assert (case.certified_residual_sd == 0.0) == (name in EXACT_FITS)  # NIST StRD headers
    floor = np.array(_tsqr_floors(case).residual_sd)
    certified = np.array(case.certified_residual_sd)
    failures = _meets("residual_std", np.array(out.residual_std), certified, floor)
    assert not failures, failures


def test_cholqr2_refusals_are_the_ill_conditioned_sets() -> None:
    """The sets CholeskyQR2 must refuse are exactly those whose raw condition number
    (numpy SVD) is above u^-1/2; the others are well below it."""
    for name in DATASET_NAMES:
        kappa = condition(load_dataset(name))
        if name in CHOLQR2_MUST_REFUSE:
            assert kappa > CHOLQR2_LIMIT, (name, kappa, CHOLQR2_MUST_REFUSE[name])
        else:
            assert kappa * CHOLQR2_ACCEPT_MARGIN < CHOLQR2_LIMIT, (name, kappa)


@pytest.mark.parametrize("name", DATASET_NAMES)
def test_cholqr2_meets_its_floors_or_refuses_with_reason(
    name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """CholeskyQR2 on NIST StRD: refuse (exit 4, pointing to tsqr) exactly the sets in
    CHOLQR2_MUST_REFUSE; on every other set exit 0 and meet every floor.

    The floors use CholeskyQR2's columnwise backward error (bounds.cholqr2_columnwise), valid
    because the column-equilibrated design is far inside CholeskyQR2's range.
    """
    case = load_dataset(name)
    out = run_rowfold(case, "cholqr2", "auto", tmp_path, capture=False)
    stderr_text = capsys.readouterr().err
    if name in CHOLQR2_MUST_REFUSE:
        reason = CHOLQR2_MUST_REFUSE[name]
        assert out.status == EXIT_RUN_FAILED, f"accepted ({reason}); stderr: {stderr_text}"
        assert out.x is None, "a refused run wrote a result store"
        assert "tsqr" in stderr_text, f"refusal does not suggest tsqr: {stderr_text!r}"
        return
    assert equilibrated_condition(case) * CHOLQR2_ACCEPT_MARGIN < CHOLQR2_LIMIT
    assert out.status == EXIT_OK, f"exit {out.status}; stderr: {stderr_text}"
    assert out.x is not None and out.x_stderr is not None and out.residual_std is not None
    floor = floors(case, bounds.cholqr2_columnwise(case.n_obs, case.n_params))
    _informative(floor)
    failures = [
        *_meets("x", out.x, case.certified_estimates, floor.coefficients),
        *_meets("x_stderr", out.x_stderr, case.certified_stderr, floor.stderr),
        *_meets(
            "residual_std",
            np.array(out.residual_std),
            np.array(case.certified_residual_sd),
            np.array(floor.residual_sd),
        ),
    ]
    assert not failures, failures
