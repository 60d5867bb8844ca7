"""Factorization methods: one module per strategy, one shared protocol, one catalog.

Each method composes the pure kernels of :mod:`rowfold.kernels` over row blocks as a Dask
graph and returns a :class:`~rowfold.methods.base.Factorization`. Methods are registered in
:mod:`rowfold.methods.catalog` (name, options, factor function, published bound); this package
imports a method's module only when it is asked for, so reading the catalog costs nothing.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

from rowfold.methods.catalog import METHODS

if TYPE_CHECKING:
    from rowfold.methods.base import Method


def get_method(name: str) -> Method:
    """Return the factor function of the method registered under ``name`` (names are
    validated by the spec against the catalog)."""
    module, function = METHODS[name].factor.split(":")
    found: Method = getattr(importlib.import_module(f"rowfold.methods.{module}"), function)
    return found


__all__ = ["get_method"]
