"""``cluster.scheduler: threads``: Dask's threaded scheduler inside the rowfold process.

References: numpy/LAPACK (``numpy.linalg.qr``) for R and Q; the bounds of tests/bounds.py:
O(u) orthogonality and residual (TSQR: Demmel, Grigori, Hoemmen and Langou, SIAM J. Sci.
Comput. 34, 2012; CholeskyQR2: ETNA 44, 2015) and the R-factor perturbation bound.
"""

from __future__ import annotations

import io
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from rowfold import runner
from rowfold.cluster import Progress
from rowfold.errors import JobError

import bounds
from support import assert_thin_qr, lapack_r, prescribed, read_store, write_job


@pytest.mark.parametrize("method", ["tsqr", "cholqr2"])
def test_threads_scheduler_forms_q_and_r_like_lapack(job_folder: Path, method: str) -> None:
    A = prescribed(900, 6, 1e4, seed=71)
    job_path = write_job(
        job_folder,
        A,
        method={"name": method},
        input={"rows_per_block": 100},
        output={"q": True},
        cluster={"scheduler": "threads"},
    )
    log = io.StringIO()
    runner.run_job(runner.load_job(job_path), Progress(stream=log))
    store = read_store(job_folder / "out.h5")
    limit = bounds.stable_qr(6) if method == "tsqr" else bounds.cholqr2(900, 6)
    assert_thin_qr(A, store["Q"], store["R"], limit)
    r_error = np.linalg.norm(store["R"] - lapack_r(A)) / np.linalg.norm(A, 2)
    assert r_error <= bounds.r_factor(6, 1e4)
    line = r"^\S+ test-job: (.+): \d+% \((\d+)/(\d+) tasks\)"
    finished = re.findall(line, log.getvalue(), flags=re.M)
    assert any(done == total for _, done, total in finished), log.getvalue()
    stages = {label for label, done, total in finished if done == total}
    assert {"fingerprint inputs", "verify and write rows"} < stages, stages  # and a factor stage


@pytest.mark.parametrize(
    "extra", [{"address": "tcp://127.0.0.1:1"}, {"processes": True}], ids=["address", "processes"]
)
def test_threads_scheduler_refuses_a_cluster_it_cannot_use(
    job_folder: Path, extra: dict[str, object]
) -> None:
    job_path = write_job(
        job_folder, prescribed(50, 3, 10.0), cluster={"scheduler": "threads", **extra}
    )
    with pytest.raises(JobError, match=r"cluster\.scheduler"):
        runner.load_job(job_path)


def test_unknown_scheduler_is_a_job_error(job_folder: Path) -> None:
    job_path = write_job(job_folder, prescribed(50, 3, 10.0), cluster={"scheduler": "mpi"})
    with pytest.raises(JobError, match="distributed, threads"):
        runner.load_job(job_path)


def test_threads_scheduler_does_not_start_distributed(job_folder: Path) -> None:
    """The point of the option is to skip distributed's import and start-up entirely."""
    job_path = write_job(job_folder, prescribed(400, 4, 10.0), cluster={"scheduler": "threads"})
    code = (
        "import sys\n"
        "from rowfold.cli import main\n"
        f"status = main(['--quiet', 'run', {str(job_path)!r}])\n"
        "print(status, 'distributed' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert done.stdout.split()[-2:] == ["0", "False"], done.stderr


@pytest.mark.parametrize("scheduler", ["threads", "distributed"])
def test_a_run_leaves_the_callers_process_as_it_was(job_folder: Path, scheduler: str) -> None:
    """BLAS thread limits and the ``distributed`` logger's level are the caller's again
    after a run (rowfold limits BLAS and quiets distributed only while it runs)."""
    import logging

    from threadpoolctl import threadpool_info

    def blas_threads() -> list[int]:
        return [pool["num_threads"] for pool in threadpool_info()]

    job_path = write_job(
        job_folder, prescribed(400, 4, 10.0, seed=3), cluster={"scheduler": scheduler}
    )
    logging.getLogger("distributed").setLevel(logging.INFO)
    before = blas_threads()
    runner.run_job(runner.load_job(job_path), Progress())
    assert blas_threads() == before
    assert logging.getLogger("distributed").level == logging.INFO


def test_auto_runs_a_small_local_job_on_threads_and_says_why() -> None:
    """``cluster.scheduler: auto`` (the default): threads for a small job that would start
    the embedded cluster; the embedded cluster for anything else, or when the job says so."""
    from dataclasses import replace as changed

    from rowfold.cluster import SMALL_JOB_BYTES, choose_scheduler
    from rowfold.spec import ClusterSpec

    auto = ClusterSpec()
    assert auto.scheduler == "auto"
    scheduler, why = choose_scheduler(auto, 1000 * 5 * 8)
    assert scheduler == "threads" and "at most 64 MiB" in why
    scheduler, why = choose_scheduler(auto, SMALL_JOB_BYTES + 1)
    assert scheduler == "distributed" and "above 64 MiB" in why
    asked = {
        "distributed": changed(auto, scheduler="distributed"),
        "threads": changed(auto, scheduler="threads"),
    }
    for name, spec in asked.items():
        assert choose_scheduler(spec, 8) == (name, f"cluster.scheduler: {name}")
    for spec in (
        changed(auto, processes=True),
        changed(auto, dashboard="127.0.0.1:0"),
        changed(auto, address="tcp://127.0.0.1:8786"),
    ):
        assert choose_scheduler(spec, 8)[0] == "distributed"


@pytest.mark.parametrize("scheduler", [None, "distributed"])
def test_the_report_names_the_engine_auto_chose(job_folder: Path, scheduler: str | None) -> None:
    a = prescribed(400, 4, 10.0, seed=8)
    cluster = {} if scheduler is None else {"scheduler": scheduler}
    job = write_job(job_folder, a, cluster={"processes": False, **cluster})
    outcome = runner.run_job(runner.load_job(job))
    origin = outcome.report["provenance"]["scheduler"]
    if scheduler is None:
        assert origin["how"] == "threads"
        assert origin["why"].startswith("cluster.scheduler: auto, input ")
    else:
        assert origin["how"] == "embedded cluster"
        assert origin["why"] == "cluster.scheduler: distributed"
