"""Factorization methods: one module per strategy, one shared protocol, one registry.

Each method composes the pure kernels of :mod:`rowfold.kernels` over row blocks as a Dask
graph and returns a :class:`~rowfold.methods.base.Factorization`.
"""

from rowfold.methods import auto, cholesky, gram_schmidt, rcholqr, tsqr
from rowfold.methods.base import Engine, Factorization, Method

REGISTRY: dict[str, Method] = {
    "tsqr": tsqr.factor,
    "cholqr2": cholesky.cholqr2,
    "scholqr3": cholesky.scholqr3,
    "bcgs2": gram_schmidt.bcgs2,
    "bmgs": gram_schmidt.bmgs,
    "rcholqr": rcholqr.factor,
    "auto": auto.factor,
}


def get_method(name: str) -> Method:
    """Return the method registered under ``name`` (names are validated by the spec)."""
    return REGISTRY[name]


__all__ = ["REGISTRY", "Engine", "Factorization", "Method", "get_method"]
