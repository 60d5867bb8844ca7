"""Provenance: what produced a result (versions, BLAS, host, times), for the store and report."""

from __future__ import annotations

import datetime as _dt
import platform
import socket
from importlib import metadata
from typing import Any

from rowfold import __version__

PACKAGES = ("numpy", "scipy", "dask", "distributed", "h5py", "zarr")


def _version(package: str) -> str:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return "not installed"


def blas_info() -> list[dict[str, Any]]:
    """The BLAS/OpenMP libraries loaded in this process (threadpoolctl)."""
    from threadpoolctl import threadpool_info

    keep = ("internal_api", "version", "num_threads", "threading_layer", "architecture")
    return [{k: lib.get(k) for k in keep if k in lib} for lib in threadpool_info()]


def iso(seconds: float) -> str:
    """UTC ISO-8601 time of a ``time.time()`` value."""
    return _dt.datetime.fromtimestamp(seconds, tz=_dt.UTC).isoformat(timespec="seconds")


def provenance(started: float, finished: float) -> dict[str, Any]:
    """Versions, BLAS, host and times of this run."""
    return {
        "rowfold": __version__,
        "python": platform.python_version(),
        **{name: _version(name) for name in PACKAGES},
        "blas": blas_info(),
        "host": socket.gethostname(),
        "started": iso(started),
        "finished": iso(finished),
    }
