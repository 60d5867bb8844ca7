"""Test helpers: matrices with prescribed singular values, and small jobs on disk."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h5py
import numpy as np
import yaml

from rowfold import runner, storage
from rowfold.storage import write_arrays

import bounds

U = bounds.unit_roundoff()  # float64's u = 2^-53 (CHECKS.md); bounds.py holds the bounds


def prescribed(
    m: int, n: int, condition: float, seed: int = 0, dtype: Any = np.float64
) -> np.ndarray:
    """Return A = U diag(s) V^H with random orthonormal U (m x n), V (n x n).

    The singular values are spaced geometrically from 1 down to 1/condition
    (the usual test construction, e.g. CHECKS.md "Matrices with prescribed singular values").
    """
    rng = np.random.default_rng(seed)
    complex_ = np.dtype(dtype).kind == "c"

    def orthonormal(rows: int, cols: int) -> np.ndarray:
        raw = rng.standard_normal((rows, cols))
        if complex_:
            raw = raw + 1j * rng.standard_normal((rows, cols))
        q, _ = np.linalg.qr(raw)
        return q

    s = np.geomspace(1.0, 1.0 / condition, n)
    return ((orthonormal(m, n) * s) @ orthonormal(n, n).conj().T).astype(dtype)


def write_job(
    folder: Path,
    matrix: np.ndarray,
    rhs: np.ndarray | None = None,
    suffix: str = ".h5",
    out_suffix: str = ".h5",
    **sections: dict[str, Any],
) -> Path:
    """Write ``matrix`` (and ``rhs``) to an input file and a job file; return the job path.

    Keyword arguments are job sections merged over the defaults, e.g.
    ``method={"name": "cholqr2"}`` or ``input={"rows_per_block": 7}``.
    """
    arrays = {"model/A": matrix}
    if rhs is not None:
        arrays["model/b"] = rhs
    write_arrays(folder / f"input{suffix}", arrays, chunk_rows=64)
    job: dict[str, Any] = {
        "name": "test-job",
        "input": {"path": f"input{suffix}", "matrix": "model/A"},
        "method": {"name": "tsqr"},
        "output": {"path": f"out{out_suffix}", "overwrite": True},
    }
    if rhs is not None:
        job["input"]["rhs"] = "model/b"
    for key, values in sections.items():
        job.setdefault(key, {}).update(values)
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def factor_in_memory(
    A: Any,
    b: Any = None,
    method: str = "tsqr",
    rows_per_block: int | None = None,
    q: bool = False,
    **options: Any,
) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Factor A (and solve for b) through the Python API, in memory, on Dask's threaded
    scheduler: the staged input is a memory:// store (rowfold.api), nothing goes through
    a job file. Returns the arrays by store name (``R``, ``Q`` when ``q``, ``x`` with b)
    and the report, as :func:`read_store` and ``RunOutcome.report`` give them."""
    import rowfold

    keys: dict[str, Any] = {"method": method, "q": q, "scheduler": "threads", **options}
    if rows_per_block is not None:
        keys["rows_per_block"] = rows_per_block
    result: Any = rowfold.qr(A, **keys) if b is None else rowfold.lstsq(A, b, **keys)
    got = {"R": np.asarray(result.R)}
    if result.Q is not None:
        got["Q"] = np.asarray(result.Q.compute())
    if b is not None:
        got["x"] = np.asarray(result.x)
    return got, dict(result.report)


def lapack_r(A: np.ndarray) -> np.ndarray:
    """numpy/LAPACK R with its signs normalised to a non-negative real diagonal."""
    R = np.linalg.qr(A, mode="r")
    d = np.diagonal(R)
    s = np.where(np.abs(d) > 0, d / np.where(np.abs(d) > 0, np.abs(d), 1), 1)
    return np.conj(s)[:, None] * R


def run_inline(job_path: Path, *overrides: str) -> runner.RunOutcome:
    return runner.run_job(runner.load_job(job_path, overrides), inline=True)


def read_store(path: Path) -> dict[str, np.ndarray]:
    out = storage.read_result(path)
    if path.suffix == ".h5":
        with h5py.File(path, "r") as handle:
            if "Q" in handle:
                out["Q"] = handle["Q"][...]
    else:
        import zarr

        group = zarr.open_group(str(path), mode="r")
        if "Q" in group:
            out["Q"] = group["Q"][...]
    return out


def assert_thin_qr(A: np.ndarray, Q: np.ndarray, R: np.ndarray, limit: float) -> None:
    """A = QR, Q^H Q = I, R upper triangular with a real non-negative diagonal.

    ``limit`` bounds the factorization's own errors; the check's own rounding (forming
    Q^H Q and QR here, in the same dtype) is added to it (bounds.gram_rounding,
    bounds.inner_products), so correct code cannot fail the check on any BLAS kernel.
    """
    m, n = A.shape
    assert np.array_equal(R, np.triu(R)), "R is not upper triangular"
    diag = np.diagonal(R)
    assert np.all(np.imag(diag) == 0) and np.all(np.real(diag) >= 0), "diag(R) not real >= 0"
    loo = np.linalg.norm(np.eye(n) - Q.conj().T @ Q)
    residual = np.linalg.norm(A - Q @ R) / np.linalg.norm(A)
    own_gram = bounds.gram_rounding(m, n, Q.dtype)
    own_product = bounds.inner_products(n, Q.dtype) * np.linalg.norm(Q) * np.linalg.norm(R)
    own_product /= float(np.linalg.norm(A))
    assert loo <= limit + own_gram, f"loss of orthogonality {loo:.2e} > {limit:.2e}"
    assert residual <= limit + own_product, f"factorization residual {residual:.2e} > {limit:.2e}"


# ---------------------------------------------------------------- a local S3 server

S3_KEY = "survey-office-key"  # invented
S3_SECRET = "fake-secret-7f3a9c"  # an invented credential: must appear in no output


class S3Server:
    """An S3-compatible server on 127.0.0.1 (moto's server mode) as the tests reach it."""

    def __init__(self, endpoint: str, key: str = S3_KEY, secret: str = S3_SECRET) -> None:
        self.endpoint = endpoint
        self.key = key
        self.secret = secret

    def options(self, secret: str | None = None) -> dict[str, Any]:
        """s3fs storage options for this server (``secret`` to give another one)."""
        return {
            "key": self.key,
            "secret": self.secret if secret is None else secret,
            "client_kwargs": {"endpoint_url": self.endpoint, "region_name": "us-east-1"},
        }

    def client(self) -> Any:
        """A boto3 S3 client signed with this server's key."""
        import boto3

        return boto3.client(
            "s3",
            endpoint_url=self.endpoint,
            aws_access_key_id=self.key,
            aws_secret_access_key=self.secret,
            region_name="us-east-1",
        )

    def bucket(self, name: str | None = None) -> str:
        """Create a bucket (a fresh invented name unless ``name``) and return its name."""
        import uuid

        name = name or f"survey-{uuid.uuid4().hex[:10]}"
        self.client().create_bucket(Bucket=name)
        return name
