"""The Cholesky-based strategies and the auto ladder, held to their published bounds.

Bounds (u = 2^-53; sources in ../shared/CHECKS.md):
- shifted CholeskyQR3: O(u) up to condition about 1/(c (mn + n(n+1)) u) (Fukaya, Kannan,
  Nakatsukasa, Yamamoto, Yanagisawa, SIAM J. Sci. Comput. 42(1), 2020); we hold it to
  the CholeskyQR2 form ``bounds.cholqr2`` (constant from memory, per CHECKS.md).
- randomized CholeskyQR: O(u) for any numerically full-rank A (Higgins, Szyld, Boman,
  Yamazaki 2023, arXiv 2309.05868); held to ``bounds.stable_qr``.
- auto: whichever method it used must meet that method's bound.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from rowfold import runner
from rowfold.errors import BreakdownError

import bounds
from support import assert_thin_qr, lapack_r, prescribed, read_store, run_inline, write_job

M, N = 1200, 16
cholqr_bound = bounds.cholqr2


@pytest.mark.parametrize("condition", [1e2, 1e6, 1e10, 1e12])
def test_scholqr3_holds_within_its_range(job_folder: Path, condition: float) -> None:
    A = prescribed(M, N, condition, seed=21)
    job = write_job(
        job_folder,
        A,
        input={"rows_per_block": 250},
        method={"name": "scholqr3"},
        output={"q": True},
    )
    outcome = run_inline(job)
    got = read_store(outcome.output)
    assert_thin_qr(A, got["Q"], got["R"], cholqr_bound(M, N))
    assert outcome.report["passes_over_input"] == 4  # three Gram passes + verification
    assert outcome.report["method_details"]["shift"] > 0


@pytest.mark.parametrize("seed", [22, 23, 24])
def test_scholqr3_beyond_its_range_refuses_or_holds(job_folder: Path, seed: int) -> None:
    """Past ~1/(c mn u) (here kappa = 1e17, beyond 1/u) the published guarantee is gone.

    Whether the shifted Cholesky breaks down there depends on the rounding of the BLAS
    kernel, so the invariant is: either it refuses (naming tsqr), or what it returns still
    meets the CholeskyQR2-form bound (it never returns a Q that is not orthogonal).
    """
    A = prescribed(M, N, 1e17, seed=seed)
    job = write_job(job_folder, A, method={"name": "scholqr3"}, output={"q": True})
    try:
        outcome = run_inline(job)
    except BreakdownError as exc:
        assert "tsqr" in str(exc)
        return
    got = read_store(outcome.output)
    assert_thin_qr(A, got["Q"], got["R"], cholqr_bound(M, N))
    assert outcome.report["method_details"]["last_pass_condition"] <= 1e2


@pytest.mark.parametrize("sketch", ["sparse_sign", "gaussian"])
@pytest.mark.parametrize("condition", [1e2, 1e6, 1e10, 1e12])
def test_rcholqr_is_orthogonal_at_any_condition(
    job_folder: Path, sketch: str, condition: float
) -> None:
    A = prescribed(M, N, condition, seed=23)
    job = write_job(
        job_folder,
        A,
        input={"rows_per_block": 300},
        method={"name": "rcholqr", "sketch": sketch, "seed": 7},
        output={"q": True},
    )
    outcome = run_inline(job)
    got = read_store(outcome.output)
    assert_thin_qr(A, got["Q"], got["R"], bounds.stable_qr(N))
    details = outcome.report["method_details"]
    assert details["seed"] == 7 and details["sketch"] == sketch
    assert outcome.report["passes_over_input"] <= 4  # sketch + 1 or 2 CholeskyQR + verify


def test_rcholqr_is_reproducible_from_its_seed(job_folder: Path) -> None:
    """Bit-for-bit is legitimate here: the same job twice in one process is the very same
    computation, and the method promises that its sketch is rebuilt from the recorded seed
    (README, rcholqr), which is what this checks."""
    A = prescribed(600, 8, 1e8, seed=24)
    job = write_job(job_folder, A, input={"rows_per_block": 100}, method={"name": "rcholqr"})
    first = read_store(run_inline(job).output)["R"]
    second = read_store(run_inline(job).output)["R"]
    assert np.array_equal(first, second)


@pytest.mark.parametrize(
    ("condition", "expected"),
    [(1e2, "cholqr2"), (1e4, "cholqr2"), (1e10, "scholqr3"), (1e12, "scholqr3"), (1e17, "tsqr")],
)
def test_auto_ladder_picks_by_condition(job_folder: Path, condition: float, expected: str) -> None:
    A = prescribed(M, N, condition, seed=25)
    job = write_job(
        job_folder, A, input={"rows_per_block": 250}, method={"name": "auto"}, output={"q": True}
    )
    outcome = run_inline(job)
    report = outcome.report
    assert report["method_used"] == expected
    assert report["method_details"]["method_reason"]
    got = read_store(outcome.output)
    limit = bounds.stable_qr(N) if expected == "tsqr" else cholqr_bound(M, N)
    assert_thin_qr(A, got["Q"], got["R"], limit)
    assert report["orthogonality_bound"]["within"] is True


@pytest.mark.parametrize("method", ["scholqr3", "rcholqr", "auto"])
def test_methods_agree_on_r_and_x(job_folder: Path, method: str) -> None:
    """Well-conditioned input: every method gives LAPACK's unique R and x, to the R-factor
    and least-squares perturbation bounds (Sun 1991; Wedin 1973)."""
    rng = np.random.default_rng(26)
    A = prescribed(800, 10, 1e3, seed=26)
    b = rng.standard_normal((800, 2))
    job = write_job(job_folder, A, b, input={"rows_per_block": 170}, method={"name": method})
    got = read_store(run_inline(job).output)
    r_error = np.linalg.norm(got["R"] - lapack_r(A)) / np.linalg.norm(A, 2)
    assert r_error <= bounds.r_factor(10, 1e3)
    expected = np.linalg.lstsq(A, b, rcond=None)[0]
    ratio = np.linalg.norm(b - A @ expected) / (np.linalg.norm(A, 2) * np.linalg.norm(expected))
    assert bounds.relative_error(got["x"], expected) <= bounds.lstsq_solution(10, 1e3, ratio)


@pytest.mark.parametrize("method", ["scholqr3", "rcholqr", "auto"])
def test_complex_input(job_folder: Path, method: str) -> None:
    A = prescribed(500, 6, 1e4, seed=27, dtype=np.complex128)
    job = write_job(
        job_folder, A, input={"rows_per_block": 90}, method={"name": method}, output={"q": True}
    )
    got = read_store(run_inline(job).output)
    assert_thin_qr(A, got["Q"], got["R"], cholqr_bound(500, 6))


def test_native_single_precision(job_folder: Path) -> None:
    """precision: native keeps float32; orthogonality then holds to float32's u = 2^-24."""
    A = prescribed(500, 6, 1e2, seed=28).astype(np.float32)
    job = write_job(
        job_folder, A, method={"name": "tsqr", "precision": "native"}, output={"q": True}
    )
    outcome = run_inline(job)
    got = read_store(outcome.output)
    assert got["R"].dtype == np.float32 and got["Q"].dtype == np.float32
    limit = bounds.stable_qr(6, np.float32)
    assert_thin_qr(A, got["Q"].astype(np.float64), got["R"].astype(np.float64), limit)
    # really computed in float32: beyond what float64 arithmetic would leave
    assert outcome.report["orthogonality_loss"] > bounds.stable_qr(6, np.float64)


def test_report_states_the_published_bound(job_folder: Path) -> None:
    A = prescribed(400, 5, 1e3, seed=29)
    job = write_job(job_folder, A, method={"name": "cholqr2"}, output={"q": True})
    bound = runner.run_job(runner.load_job(job), inline=True).report["orthogonality_bound"]
    assert bound["method"] == "cholqr2"
    assert "ETNA" in bound["source"]
    # the report states the published formula itself (no margin); same formula, so rel=1e-12
    assert bound["value"] == pytest.approx(bounds.cholqr2_published(400, 5), rel=1e-12)
    assert bound["measured"] <= bound["value"]
