"""The one protocol every factorization method follows.

A method composes kernels over the row blocks of a :class:`~rowfold.blocks.BlockPlan`
as a Dask graph (``dask.delayed`` with deterministic keys) and runs it through an
:class:`Engine`. It returns a :class:`Factorization`: R with a real non-negative diagonal,
``Q^H B`` when there are right-hand sides, and a recipe to form any block of Q from the
same block of A. Everything downstream (solve, quality, storage) is method-agnostic.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from rowfold.blocks import BlockPlan
from rowfold.kernels.metrics import FirstPassSums
from rowfold.spec import MethodSpec


class Engine(Protocol):
    """Runs Dask graphs; the cluster module provides the implementations."""

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute delayed objects and return their values, showing progress."""
        ...

    def persist(self, tasks: Sequence[Any]) -> list[Any]:
        """Compute delayed objects but keep the values where they are (workers)."""
        ...

    def stream(self, tasks: Sequence[Any], label: str) -> Iterator[Any]:
        """Yield the values of delayed objects in order, holding only a few at a time."""
        ...

    def peak_memory_bytes(self) -> int:
        """Peak resident memory of every process that took part, in bytes."""
        ...


# A function of (block of A, recipe) -> block of Q; module-level so it pickles.
QKernel = Callable[[np.ndarray, Any], np.ndarray]


@dataclass(frozen=True)
class Factorization:
    """What every method returns.

    Attributes
    ----------
    R : ndarray (n, n)
        Upper triangular, diagonal real and >= 0.
    qhb : ndarray (n, k) or None
        ``Q^H B`` for the right-hand sides.
    q_kernel : QKernel
        Forms the block of Q from the block of A and that block's recipe.
    q_recipes : list
        One recipe per row block (plain values or delayed objects).
    passes : int
        Passes over A that the factorization made.
    sums : FirstPassSums
        First-pass totals ``a_fro2`` and ``gram``, accumulated while the blocks were read
        anyway.
    details : dict
        Method-specific figures for the report (e.g. a condition estimate).
    """

    R: np.ndarray
    qhb: np.ndarray | None
    q_kernel: QKernel
    q_recipes: list[Any]
    passes: int
    sums: FirstPassSums
    details: dict[str, Any] = field(default_factory=dict)


class RowArray(Protocol):
    """A row array kept between passes; tasks carry it (a small picklable value) and each
    call opens, reads or writes, and closes (storage implements it)."""

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)``."""
        ...

    def write(self, start: int, block: np.ndarray, col_start: int = 0) -> None:
        """Write ``block`` at rows ``start..`` and columns ``col_start..``."""
        ...


class Scratch(Protocol):
    """Where a method creates its row arrays (storage implements it; methods import no
    storage)."""

    def create(self, name: str, rows: int, cols: int, dtype: Any, chunk_rows: int) -> RowArray:
        """A new zero-filled ``rows x cols`` array, chunked by ``chunk_rows`` rows."""
        ...


class LeafCheckpoint(Protocol):
    """One row block's first-pass checkpoint, carried by its leaf task (storage implements
    it: each call opens, writes or reads, and closes)."""

    @property
    def saved(self) -> bool:
        """Whether a checkpoint that still held was there when the run started."""
        ...

    def save(self, arrays: dict[str, Any]) -> None:
        """Save the leaf's arrays (None values are left out)."""
        ...

    def load(self) -> dict[str, np.ndarray]:
        """The saved arrays; raises :class:`~rowfold.errors.RunError` naming the checkpoint
        when it changed since the run started."""
        ...


class Checkpoints(Protocol):
    """The run's checkpoints (storage implements it; methods import no storage)."""

    def leaves(self, blocks: int) -> tuple[Sequence[LeafCheckpoint], list[str]]:
        """Every block's checkpoint, and notes on those discarded when the run started."""
        ...


@dataclass(frozen=True)
class Context:
    """What a method gets besides the blocks and its options.

    Attributes
    ----------
    engine : Engine
        Runs the Dask graphs.
    want_q : bool
        Whether Q blocks will be formed later (methods may keep what that needs).
    scratch : Scratch
        Where the method may keep row arrays between passes (e.g. intermediate Q panels),
        in a folder beside the output that the runner removes when the job ends. Workers
        write there too, so on a remote cluster it must be on a shared file system.
    checkpoints : Checkpoints or None
        Per-block checkpoints of the first pass (tsqr), kept until the result is
        committed; finished blocks found there are not read again (``run --resume``).
    """

    engine: Engine
    want_q: bool
    scratch: Scratch
    checkpoints: Checkpoints | None = None


class Method(Protocol):
    """A factorization strategy."""

    def __call__(self, plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
        """Factor the plan's matrix."""
        ...
