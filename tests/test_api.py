"""The Python API (rowfold.lstsq, qr, run, open_result) and the Dask conventions.

Numerical checks compare with LAPACK through scipy (``scipy.linalg.lstsq``, gelsd) against
the bounds of tests/bounds.py in units of u: the least-squares perturbation bound (Wedin
1973; Higham 2002, Thm 20.1) for x, the residual SD and the standard errors, and the QR
invariants (Higham 2002, Thm 19.4) for R and Q. Most runs use Dask's threaded scheduler in
this process (``scheduler="threads"``) to stay fast; the tests of the Dask conventions use
an in-process ``distributed`` cluster.
"""

from __future__ import annotations

import gc
import os
import re
import subprocess
import sys
from pathlib import Path

import dask
import dask.array as da
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
import xarray as xr
from distributed import Client, LocalCluster

import rowfold
from rowfold import storage
from rowfold.cli import main as cli_main
from rowfold.cluster import on_this_machine
from rowfold.errors import InputMissingError, JobError, OutputError, RowfoldError

import bounds
from support import prescribed, write_job

ROOT = Path(__file__).resolve().parents[1]
IN_PROCESS = {"cluster": {"scheduler": "threads"}}
M, N = 1200, 6


def problem(seed: int = 41, kappa: float = 1e3) -> tuple[np.ndarray, np.ndarray]:
    """A with prescribed singular values (1 .. 1/kappa) and b = A x + noise."""
    rng = np.random.default_rng(seed)
    A = prescribed(M, N, kappa, seed=seed)
    b = A @ rng.standard_normal(N) + 1e-3 * rng.standard_normal(M)
    return A, b


def lapack_reference(A: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """x, residual SD and standard errors from LAPACK (scipy gelsd) and numpy's SVD."""
    x, res, _, _ = scipy.linalg.lstsq(A, b)
    dof = A.shape[0] - A.shape[1]
    sigma = float(np.sqrt(res / dof))
    _, s, vh = np.linalg.svd(A, full_matrices=False)
    stderr = sigma * np.sqrt(np.sum((vh / s[:, None]) ** 2, axis=0))
    return x, sigma, stderr


def assert_matches_lapack(fit: rowfold.LstsqResult, A: np.ndarray, b: np.ndarray) -> None:
    """x, residual SD and standard errors within the least-squares perturbation bounds
    (tests/bounds.py: Wedin 1973; Higham 2002, Thm 20.1) of LAPACK's answer."""
    x, sigma, stderr = lapack_reference(A, b)
    kappa = float(np.linalg.cond(A))
    r = b - A @ x
    ratio = float(np.linalg.norm(r) / (np.linalg.norm(A, 2) * np.linalg.norm(x)))
    amplification = float(np.linalg.norm(b) / np.linalg.norm(r))
    assert bounds.relative_error(fit.x, x) <= bounds.lstsq_solution(N, kappa, ratio)
    assert abs(fit.residual_sd - sigma) / sigma <= bounds.residual_std(N, kappa, amplification)
    worst = float(np.max(np.abs(fit.stderr - stderr) / stderr))
    assert worst <= bounds.standard_errors(N, kappa, amplification)
    assert fit.rank == N and fit.degrees_of_freedom == M - N


def as_kind(kind: str, A: np.ndarray, b: np.ndarray, folder: Path) -> tuple[object, object]:
    """A and b as the API takes them, in one of its input kinds."""
    if kind == "numpy":
        return A, b
    if kind == "dask":
        return da.from_array(A, chunks=(250, N)), da.from_array(b, chunks=250)
    if kind == "csr":
        return sp.csr_array(A), b
    if kind == "xarray":
        names = [f"p{j}" for j in range(N)]
        return xr.DataArray(A, dims=("row", "param"), coords={"param": names}), xr.DataArray(
            b, dims=("row",)
        )
    storage.write_arrays(folder / "obs.h5", {"net/A": A, "net/b": b}, chunk_rows=256)
    return {"path": str(folder / "obs.h5"), "matrix": "net/A"}, "net/b"


@pytest.mark.parametrize("kind", ["numpy", "dask", "csr", "xarray", "on_disk"])
def test_lstsq_on_every_input_kind_matches_lapack(tmp_path: Path, kind: str) -> None:
    A, b = problem()
    given_A, given_b = as_kind(kind, A, b, tmp_path)
    fit = rowfold.lstsq(given_A, given_b, scratch=tmp_path, **IN_PROCESS)
    assert isinstance(fit, rowfold.LstsqResult)
    assert_matches_lapack(fit, A, b)
    # covariance = s^2 (A^T A)^-1: its diagonal gives the standard errors (same rounding
    # of one formula: elementwise bound of a square root, bounds.elementwise)
    assert fit.covariance is not None
    root = np.sqrt(np.diag(fit.covariance))
    assert np.max(np.abs(root - fit.stderr) / fit.stderr) <= bounds.elementwise(2)
    assert fit.method == "auto" and fit.method_used in ("cholqr2", "scholqr3", "tsqr")
    assert fit.method_reason
    assert fit.path is None
    assert not list(tmp_path.glob("rowfold-*")), "the temporary store is removed"


def test_xarray_column_coordinate_names_the_parameters(tmp_path: Path) -> None:
    A, b = problem(seed=43)
    names = ["datum_north", "datum_east", "scale", "tilt_x", "tilt_y", "drift"]
    A_x = xr.DataArray(A, dims=("obs", "param"), coords={"param": names})
    fit = rowfold.lstsq(A_x, b, method="tsqr", scratch=tmp_path, **IN_PROCESS)
    assert fit.parameter_names == tuple(names)
    assert [p["name"] for p in fit.report["parameters"]] == names
    table = fit.summary()
    assert all(name in table for name in names)
    assert "stderr" in table and "degrees of freedom" in table


def test_summary_table_keeps_its_columns_for_complex_x(tmp_path: Path) -> None:
    """Complex x is printed as a+bj in the same aligned columns as real x: every line of
    the parameter table is as long as its header, and each printed x reads back to the
    solution within the 9 significant digits printed."""
    rng = np.random.default_rng(46)
    A = rng.standard_normal((M, N)) + 1j * rng.standard_normal((M, N))
    b = A @ (np.arange(1, N + 1) * (1 - 0.5j)) + 0.01 * rng.standard_normal(M)
    fit = rowfold.lstsq(A, b, method="tsqr", scratch=tmp_path, **IN_PROCESS)
    lines = fit.summary().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("parameter"))
    table = lines[start : start + 2 + N]
    assert len({len(line) for line in table}) == 1, table
    printed = np.array([complex(line.split()[1]) for line in table[2:]])
    assert np.max(np.abs(printed - fit.x) / np.abs(fit.x)) <= 1e-8  # 9 digits printed


def test_weights_are_row_weights(tmp_path: Path) -> None:
    """Weighted least squares = plain least squares of sqrt(w) A, sqrt(w) b (LAPACK)."""
    A, b = problem(seed=44)
    w = np.random.default_rng(44).uniform(0.5, 4.0, M)
    fit = rowfold.lstsq(A, b, weights=w, scratch=tmp_path, **IN_PROCESS)
    root = np.sqrt(w)
    assert_matches_lapack(fit, A * root[:, None], b * root)


def test_qr_meets_the_invariants_and_gives_q_lazily(tmp_path: Path) -> None:
    A = prescribed(M, N, 1e4, seed=45)
    result = rowfold.qr(da.from_array(A, chunks=(300, N)), method="tsqr", q=True, scratch=tmp_path)
    assert type(result) is rowfold.QRResult
    R = result.R
    assert np.array_equal(R, np.triu(R)) and np.all(np.diag(R) >= 0)
    assert not R.flags.writeable
    # R^T R = A^T A within the Gram bound (tests/bounds.py, Higham 2002 Thm 19.4 + eq. 3.13)
    gram = np.linalg.norm(R.T @ R - A.T @ A) / np.linalg.norm(A) ** 2
    assert gram <= bounds.gram_residual(M, N)
    assert isinstance(result.Q, da.Array) and result.Q.shape == (M, N)
    assert len(list(tmp_path.glob("rowfold-*"))) == 1, "the store stays while Q can be read"
    Q = result.Q.compute()
    limit = bounds.stable_qr(N)  # Householder TSQR, Higham 2002 Thm 19.4
    assert np.linalg.norm(Q.T @ Q - np.eye(N)) <= limit
    assert np.linalg.norm(A - Q @ R) / np.linalg.norm(A) <= limit
    del result
    gc.collect()
    assert not list(tmp_path.glob("rowfold-*")), "the store goes with the last reader of Q"


def test_qr_of_a_sparse_matrix_with_names_from_a_list(tmp_path: Path) -> None:
    A = sp.random(800, 5, density=0.4, format="csr", random_state=np.random.default_rng(46))
    names = ["bm_a", "bm_b", "bm_c", "bm_d", "bm_e"]
    result = rowfold.qr(A, parameter_names=names, scratch=tmp_path, **IN_PROCESS)
    assert result.parameter_names == tuple(names) and result.Q is None
    dense = A.toarray()
    gram = np.linalg.norm(result.R.T @ result.R - dense.T @ dense) / np.linalg.norm(dense) ** 2
    assert gram <= bounds.gram_residual(800, 5)
    assert "QR: 800 x 5" in result.summary()


def test_output_path_keeps_the_store_and_open_result_reads_it(tmp_path: Path) -> None:
    A, b = problem(seed=47)
    out = tmp_path / "kept.h5"
    keep = {"output.path": out}
    fit = rowfold.lstsq(A, b, residuals=True, scratch=tmp_path, **IN_PROCESS, **keep)
    assert fit.path == out and out.exists()
    again = rowfold.open_result(out)
    assert isinstance(again, rowfold.LstsqResult)
    assert np.array_equal(again.x, fit.x) and np.array_equal(again.R, fit.R)
    assert isinstance(again.residuals, da.Array) and again.residuals.shape[0] == M
    x, _, _ = lapack_reference(A, b)
    r_lapack = b - A @ x
    kappa = float(np.linalg.cond(A))
    measured = np.ravel(again.residuals.compute())
    # residual vector bound (tests/bounds.py: Higham 2002 Thm 20.1)
    error = np.linalg.norm(measured - r_lapack) / np.linalg.norm(b)
    assert error <= bounds.residual_vector(N, kappa)
    with pytest.raises(ValueError, match="output exists") as refused:  # as a job without
        rowfold.lstsq(A, b, scratch=tmp_path, **IN_PROCESS, **keep)  # output.overwrite
    assert isinstance(refused.value, OutputError)


def cli(*args: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    """Run the CLI in this process; return its status and stderr."""
    status = cli_main(list(args))
    return status, capsys.readouterr().err


def test_run_and_open_result_equal_what_the_cli_writes(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem(seed=48)
    job = write_job(tmp_path, A, b, solve={"covariance": True})
    status, _ = cli("run", str(job), "--inline", "--quiet", capsys=capsys)
    assert status == 0
    stored = storage.read_result(tmp_path / "out.h5")
    opened = rowfold.open_result(tmp_path / "out.h5")
    assert isinstance(opened, rowfold.LstsqResult)
    assert np.array_equal(opened.x, stored["x"]) and np.array_equal(opened.R, stored["R"])
    assert np.array_equal(opened.covariance, stored["x_covariance"])
    assert opened.method_used == "tsqr" and opened.path == tmp_path / "out.h5"
    ran = rowfold.run(job, **{"output.path": str(tmp_path / "api.h5")}, **IN_PROCESS)
    assert isinstance(ran, rowfold.LstsqResult) and ran.path == tmp_path / "api.h5"
    assert np.array_equal(ran.x, rowfold.open_result(tmp_path / "api.h5").x)
    assert ran.report["rows"] == M and opened.scheduler == {
        "how": "inline",
        "address": "this thread",
    }
    assert_matches_lapack(ran, A, b)
    assert ran.scheduler is not None and ran.scheduler["how"] == "threads"


def test_validation_errors_are_the_cli_messages_and_value_errors(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A, b = problem(seed=49)
    job = write_job(tmp_path, A, b)
    status, err = cli("run", str(job), "--inline", "--set", "method.name=bogus", capsys=capsys)
    assert status == 2
    with pytest.raises(JobError) as caught:
        rowfold.run(job, **{"method.name": "bogus"})
    assert isinstance(caught.value, ValueError) and isinstance(caught.value, RowfoldError)
    assert err.strip() == f"rowfold: error: {caught.value}"
    with pytest.raises(ValueError) as direct:
        rowfold.lstsq(A, b, method="bogus")
    assert isinstance(direct.value, JobError)
    after_place = str(caught.value).split(": ", 1)[1]
    assert str(direct.value) == f"rowfold.lstsq: {after_place}"
    with pytest.raises(JobError, match=r"key 'solve.alpha'"):
        rowfold.lstsq(A, b, alpha=2.0)
    with pytest.raises(JobError, match="did you mean 'refine'"):
        rowfold.lstsq(A, b, refin=True)
    with pytest.raises(FileNotFoundError) as missing:
        rowfold.lstsq({"path": str(tmp_path / "absent.h5"), "matrix": "A", "rhs": "b"}, None)
    assert isinstance(missing.value, InputMissingError)


def test_in_memory_input_is_refused_for_a_remote_scheduler_without_scratch() -> None:
    A, b = problem(seed=50)
    with pytest.raises(JobError, match="scratch="):
        # 192.0.2.0/24 is TEST-NET-1 (RFC 5737): never this machine; nothing connects
        rowfold.lstsq(A, b, address="tcp://192.0.2.1:8786")
    assert on_this_machine("inproc://192.0.2.1/123/1")
    assert on_this_machine("tcp://127.0.0.1:8786") and on_this_machine("tcp://[::1]:8786")
    assert not on_this_machine("tcp://192.0.2.1:8786")


def scheduler_transitions(client: Client) -> int:
    """The scheduler's count of task transitions (grows with every task it runs)."""
    return int(client.run_on_scheduler(lambda dask_scheduler: dask_scheduler.transition_counter))


def test_an_open_client_runs_the_tasks_and_stays_open(tmp_path: Path) -> None:
    A, b = problem(seed=51)
    with Client(processes=False, n_workers=1, threads_per_worker=2, dashboard_address=None) as c:
        before = scheduler_transitions(c)
        # no scratch: an in-process client is on this machine, so the temporary copy will do
        fit = rowfold.lstsq(da.from_array(A, chunks=(300, N)), b)
        assert scheduler_transitions(c) > before + 20, "the job's tasks ran on this client"
        assert fit.scheduler == {
            "how": "active client",
            "address": c.scheduler.address,
            "why": "cluster.scheduler: auto, and a Dask scheduler is given",
        }
        assert c.status == "running" and c.submit(sum, [1, 2]).result() == 3
        from distributed import default_client

        assert default_client() is c
    assert_matches_lapack(fit, A, b)


def test_dask_config_scheduler_address_is_honoured(tmp_path: Path) -> None:
    A, b = problem(seed=52)
    with LocalCluster(n_workers=1, processes=False, dashboard_address=None) as cluster:
        with Client(cluster) as watcher:
            before = scheduler_transitions(watcher)
        with dask.config.set({"scheduler-address": cluster.scheduler_address}):
            fit = rowfold.lstsq(A, b, scratch=tmp_path)
        how = {"how": "dask config scheduler-address", "address": cluster.scheduler_address}
        why = "cluster.scheduler: auto, and a Dask scheduler is given"
        assert fit.scheduler == {**how, "why": why}
        with Client(cluster) as watcher:
            assert scheduler_transitions(watcher) > before + 20
    assert_matches_lapack(fit, A, b)


def test_scheduler_file_is_honoured(tmp_path: Path) -> None:
    A, b = problem(seed=53)
    file = tmp_path / "scheduler.json"
    kwargs = {"scheduler_file": str(file)}
    with LocalCluster(
        n_workers=1, processes=False, dashboard_address=None, scheduler_kwargs=kwargs
    ) as cluster:
        fit = rowfold.lstsq(A, b, scratch=tmp_path, scheduler_file=str(file))
        assert fit.scheduler == {
            "how": "cluster.scheduler_file",
            "address": cluster.scheduler_address,
            "why": "cluster.scheduler: auto, and a Dask scheduler is given",
        }
    assert_matches_lapack(fit, A, b)
    with pytest.raises(JobError, match="give one of the two"):
        rowfold.lstsq(A, b, scheduler_file=str(file), address="tcp://127.0.0.1:8786")


def test_cli_reports_a_scheduler_address_from_the_environment(tmp_path: Path) -> None:
    """DASK_SCHEDULER_ADDRESS: the CLI runs there and says so on its progress stream."""
    A, b = problem(seed=54)
    job = write_job(tmp_path, A, b)
    with LocalCluster(
        n_workers=1, processes=False, protocol="tcp", host="127.0.0.1", dashboard_address=None
    ) as cluster:
        env = {**os.environ, "DASK_SCHEDULER_ADDRESS": cluster.scheduler_address}
        done = subprocess.run(
            [sys.executable, "-m", "rowfold", "run", str(job)],
            capture_output=True,
            text=True,
            env=env,
            timeout=120,
        )
    assert done.returncode == 0, done.stderr
    line = f"rowfold: running on the Dask scheduler at {cluster.scheduler_address}"
    assert f"{line} (from DASK_SCHEDULER_ADDRESS)" in done.stderr
    report = rowfold.open_result(tmp_path / "out.h5").report
    assert report["provenance"]["scheduler"]["how"] == "DASK_SCHEDULER_ADDRESS"


def readme_python_blocks() -> list[str]:
    """The fenced python blocks of the README's "Python API" section."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("\n## Python API\n", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


def test_readme_python_example_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    blocks = readme_python_blocks()
    assert blocks, "the README's Python API section shows an example"
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {}
    for block in blocks:
        exec(compile(block, "README.md", "exec"), namespace)
    fit = namespace["fit"]
    assert isinstance(fit, rowfold.LstsqResult) and "parameter" in fit.summary()


def test_the_issue_one_liner_in_a_fresh_process() -> None:
    """``import rowfold`` alone gives ``rowfold.lstsq`` (loaded on first use); smaller than
    the 200,000-row original to keep the suite fast."""
    code = (
        "import rowfold, dask.array as da; A = da.random.random((20000, 20), "
        "chunks=(5000, 20)); b = A[:, 0] * 2; r = rowfold.lstsq(A, b); print(r.summary())"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=180, check=True
    )
    assert "rowfold least squares: 20000 x 20" in done.stdout
    assert re.search(r"^x0 +2 ", done.stdout, flags=re.M), done.stdout


def test_import_rowfold_is_light_and_lists_the_api() -> None:
    heavy = ("numpy", "scipy", "dask", "h5py", "distributed", "zarr", "xarray")
    code = (
        "import sys, rowfold\n"
        f"print(sorted(m for m in {heavy!r} if m in sys.modules), 'lstsq' in dir(rowfold))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=True
    )
    assert done.stdout.strip() == "[] True"
    with pytest.raises(AttributeError):
        _ = rowfold.run_job  # type: ignore[attr-defined]


def test_a_temporary_store_gets_its_json_report_but_no_html_page(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Nobody opens the page of the API's temporary store, so it is not drawn."""
    from rowfold import runner

    seen: list[tuple[bool, bool]] = []
    run_job = runner.run_job

    def watched(*args: object, **kwargs: object) -> runner.RunOutcome:
        outcome = run_job(*args, **kwargs)  # type: ignore[arg-type]
        json_path, html_path = storage.report_paths(Path(outcome.output))
        seen.append((json_path.is_file(), html_path.is_file()))
        return outcome

    monkeypatch.setattr(runner, "run_job", watched)
    A, b = problem()
    fit = rowfold.lstsq(A, b, scratch=tmp_path, **IN_PROCESS)
    assert fit.residual_sd is not None
    assert seen == [(True, False)]


def staged_stores(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Where each call's in-memory inputs are staged (recorded, then written as usual)."""
    from rowfold.storage import arrays

    seen: list[str] = []
    original = arrays.stage_dense

    def recording(store: object, given: dict[str, object]) -> None:
        seen.append(str(store))
        original(store, given)  # type: ignore[arg-type]

    monkeypatch.setattr(arrays, "stage_dense", recording)
    return seen


@pytest.mark.parametrize("kind", ["numpy", "csr"])
def test_in_process_workers_read_a_memory_store_that_is_removed_after(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str
) -> None:
    """Threads of this process (the threaded scheduler, or the default embedded cluster of
    threads) read the staged input from a memory:// store, gone after the call; nothing
    is staged in the scratch folder."""
    import fsspec

    seen = staged_stores(monkeypatch)
    A, b = problem()
    given_A, given_b = as_kind(kind, A, b, tmp_path)
    fits = [
        rowfold.lstsq(given_A, given_b, scratch=tmp_path, **IN_PROCESS),
        rowfold.lstsq(given_A, given_b, scratch=tmp_path, cluster={"workers": 1}),
    ]
    assert len(seen) == 2 and all(s.startswith("memory://") for s in seen)
    assert len(set(seen)) == 2, "each call stages into a store of its own"
    memory = fsspec.filesystem("memory")
    assert not [s for s in seen if memory.exists(s.removeprefix("memory://"))]
    assert not list(tmp_path.rglob("input.zarr")) and not list(tmp_path.glob("rowfold-*"))
    for fit in fits:
        assert_matches_lapack(fit, A, b)


def test_worker_processes_read_the_staged_copy_on_disk(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Worker processes cannot see this process's memory: the input is staged on disk in
    the scratch folder (and removed after), and the answer meets the same LAPACK bounds
    as an in-memory staging does (tests/bounds.py: Wedin 1973; Higham 2002, Thm 20.1)."""
    seen = staged_stores(monkeypatch)
    A, b = problem()
    cluster = {"processes": True, "workers": 1, "threads_per_worker": 1}
    on_disk = rowfold.lstsq(A, b, scratch=tmp_path, cluster=cluster)
    in_memory = rowfold.lstsq(A, b, scratch=tmp_path, **IN_PROCESS)
    assert seen[0].startswith(str(tmp_path)) and seen[0].endswith("input.zarr")
    assert seen[1].startswith("memory://")
    assert not list(tmp_path.glob("rowfold-*")), "the temporary folder is removed"
    for fit in (on_disk, in_memory):
        assert_matches_lapack(fit, A, b)


def test_a_large_input_is_staged_on_disk_even_for_threads(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Above api.MEMORY_STAGING_BYTES the copy goes to disk (it would double the caller's
    memory); the limit lowered here so the test stays small."""
    from rowfold import api

    monkeypatch.setattr(api, "MEMORY_STAGING_BYTES", 1024)
    seen = staged_stores(monkeypatch)
    A, b = problem()
    assert_matches_lapack(rowfold.lstsq(A, b, scratch=tmp_path, **IN_PROCESS), A, b)
    assert seen and seen[0].startswith(str(tmp_path))
