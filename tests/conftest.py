"""Shared fixtures, the ``numerical`` marker and the BLAS kernel check.

The tests in :data:`NUMERICAL_MODULES` are marked ``numerical``; CI runs them a second
time under another OpenBLAS kernel (``OPENBLAS_CORETYPE``) with one BLAS thread, because
a different kernel sums in a different order and so rounds differently. When
``ROWFOLD_EXPECT_BLAS_ARCH`` is set, the session refuses to start unless every OpenBLAS
library loaded reports that architecture (threadpoolctl), so the second run provably ran
on the kernel it names.

Hypothesis runs under the ``ci`` profile unless ``ROWFOLD_HYPOTHESIS_PROFILE`` names another:
``ci`` is derandomized (the same examples on every run and machine, no example database)
with no deadline (CI machines are slow and shared) and prints the reproduction blob of a
failure; ``explore`` draws fresh random examples each run (and prints the blob of a failure, to
replay it with ``@reproduce_failure``) for looking for new failures locally, e.g.
``ROWFOLD_HYPOTHESIS_PROFILE=explore python -m pytest tests/test_kernels.py``.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest
from hypothesis import settings

if TYPE_CHECKING:
    from support import S3Server

settings.register_profile("ci", derandomize=True, database=None, deadline=None, print_blob=True)
settings.register_profile("explore", derandomize=False, deadline=None, print_blob=True)
settings.load_profile(os.environ.get("ROWFOLD_HYPOTHESIS_PROFILE", "ci"))

NUMERICAL_MODULES = {
    "test_api.py",
    "test_factorization.py",
    "test_fold.py",
    "test_gram_schmidt.py",
    "test_kernels.py",
    "test_least_squares.py",
    "test_model_tests.py",
    "test_nist_strd.py",
    "test_numerics.py",
    "test_operations.py",
    "test_segments.py",
    "test_sparse.py",
    "test_strategies.py",
    "test_update_guards.py",
    "test_urls.py",
    "test_csr_encoding.py",
}


def blas_libraries() -> list[dict[str, object]]:
    """The BLAS libraries numpy and scipy loaded, as threadpoolctl reports them."""
    import numpy  # noqa: F401  (loads numpy's BLAS)
    import scipy.linalg  # noqa: F401  (loads scipy's BLAS)
    from threadpoolctl import threadpool_info

    return [info for info in threadpool_info() if info.get("user_api") == "blas"]


def pytest_report_header(config: pytest.Config) -> list[str]:
    return [
        f"BLAS: {info.get('internal_api')} {info.get('version')} "
        f"kernel={info.get('architecture')} threads={info.get('num_threads')}"
        for info in blas_libraries()
    ]


def pytest_sessionstart(session: pytest.Session) -> None:
    expected = os.environ.get("ROWFOLD_EXPECT_BLAS_ARCH")
    if not expected:
        return
    found = {str(info.get("architecture")) for info in blas_libraries()}
    if found != {expected}:
        pytest.exit(f"expected every OpenBLAS to run kernel {expected}, found {found}", 2)


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for item in items:
        if Path(str(item.fspath)).name in NUMERICAL_MODULES:
            item.add_marker(pytest.mark.numerical)


@pytest.fixture
def job_folder(tmp_path: Path) -> Path:
    """A fresh folder for one job's files."""
    return tmp_path


@pytest.fixture(scope="session")
def s3_server() -> Iterator[S3Server]:
    """An S3-compatible server on 127.0.0.1 (moto's server mode, in this process) for the
    session; it accepts any key (moto checks no signatures by default)."""
    pytest.importorskip("s3fs")
    server_module = pytest.importorskip("moto.server")
    import logging

    logging.getLogger("werkzeug").setLevel(logging.ERROR)  # one line per request otherwise
    server = server_module.ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    from support import S3Server

    yield S3Server(f"http://{host}:{port}")
    server.stop()
