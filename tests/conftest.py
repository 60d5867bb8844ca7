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


@pytest.fixture(scope="session")
def s3_signed_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[S3Server]:
    """An S3-compatible server on 127.0.0.1 that checks signatures: moto's server in its
    own process, started with ``INITIAL_NO_AUTH_ACTION_COUNT`` (moto's documented switch:
    after that many unsigned actions every request must be signed by the keys of an IAM
    user created in moto). The first actions create that user, its access key and a policy
    allowing S3; the server's key and secret are the user's."""
    pytest.importorskip("s3fs")
    pytest.importorskip("moto.server")
    import json
    import socket
    import subprocess
    import sys
    import time

    import boto3

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    env = {**os.environ, "INITIAL_NO_AUTH_ACTION_COUNT": "3"}
    log = (tmp_path_factory.mktemp("moto") / "server.log").open("w")
    command = [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)]
    server = subprocess.Popen(command, env=env, stdout=log, stderr=subprocess.STDOUT)
    endpoint = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), 0.2).close()
                break
            except OSError:
                if time.monotonic() > deadline or server.poll() is not None:
                    pytest.fail("the signed moto server did not start")
                time.sleep(0.1)
        iam = boto3.client(
            "iam",
            endpoint_url=endpoint,
            region_name="us-east-1",
            aws_access_key_id="bootstrap",
            aws_secret_access_key="bootstrap",
        )
        iam.create_user(UserName="levelling-office")
        policy = {
            "Version": "2012-10-17",
            "Statement": [{"Effect": "Allow", "Action": "s3:*", "Resource": "*"}],
        }
        iam.put_user_policy(
            UserName="levelling-office", PolicyName="survey-data", PolicyDocument=json.dumps(policy)
        )
        key = iam.create_access_key(UserName="levelling-office")["AccessKey"]
        from support import S3Server

        yield S3Server(endpoint, key["AccessKeyId"], key["SecretAccessKey"])
    finally:
        server.terminate()
        server.wait(timeout=30)
        log.close()
