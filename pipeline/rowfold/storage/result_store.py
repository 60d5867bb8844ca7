"""What a result store holds and under which names: the answer, the update state and the
segments (the layout every verb writes through, and the only place those names are spelled).

The values come in computed; this module decides where each goes. How each array is
described for the ecosystem's readers (dimension names, units) is :mod:`.layout`.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from rowfold.storage.digests import digest_arrays
from rowfold.storage.results import ResultWriter

SEGMENT_FACTORS = "segments/factor"
"""Item i: the triangular factor of segment i's weighted ``[A | b]``."""
SEGMENT_GRAMS = "segments/gram"
"""Item i: the Gram ``A^H A`` of segment i's rows."""


@dataclass(frozen=True)
class AnswerArrays:
    """The answer in the input's own columns (scaling undone, fixed columns as zeros).

    Attributes
    ----------
    R : ndarray (n, n)
        The triangular factor.
    x, x_stderr, qhb : ndarray or None
        Solution, its standard errors and ``Q^H b``, shaped like the rhs (n or n x k).
    x_covariance : ndarray or None
        n x n, or k x n x n for a 2-D rhs (None unless ``solve.covariance``).
    """

    R: np.ndarray
    x: np.ndarray | None = None
    x_stderr: np.ndarray | None = None
    qhb: np.ndarray | None = None
    x_covariance: np.ndarray | None = None


@dataclass(frozen=True)
class StateArrays:
    """What ``update``, ``replace`` and ``retire`` read back instead of the rows.

    Attributes
    ----------
    R, qhb : ndarray
        R and ``Q^H b`` in working coordinates (after any column scaling).
    gram : ndarray
        ``A^H A`` of the rows the answer covers.
    residual_factor : ndarray or None
        F with ``F^H F = r^H r`` (None without right-hand sides).
    column_scale : ndarray
        The column multipliers (ones without scaling).
    input_digests : dict
        The row-block digest records of every input (:mod:`.digests`).
    rows_done, rows_used : int
        Input rows consumed so far; rows of nonzero weight.
    a_fro2 : float
        ``||A||_F^2`` of the covered rows.
    """

    R: np.ndarray
    qhb: np.ndarray | None
    gram: np.ndarray
    residual_factor: np.ndarray | None
    column_scale: np.ndarray
    input_digests: dict[str, Any]
    rows_done: int
    rows_used: int
    a_fro2: float


def write_answer(
    writer: ResultWriter, answer: AnswerArrays, names: Sequence[str], attrs: dict[str, Any]
) -> None:
    """Write R, x, x_stderr, qhb, x_covariance (those present), the column labels and the
    store's attributes."""
    writer.put("R", answer.R)
    optional = {
        "x": answer.x,
        "x_stderr": answer.x_stderr,
        "qhb": answer.qhb,
        "x_covariance": answer.x_covariance,
    }
    for name, array in optional.items():
        if array is not None:
            writer.put(name, array)
    writer.set_attrs(attrs)
    writer.put_labels("columns", tuple(names))
    writer.put_labels("columns_i", tuple(names))


def write_state(writer: ResultWriter, state: StateArrays) -> None:
    """Write the ``state/`` group (``state/digest_bounds`` and ``state/digest_<input>``
    from :func:`rowfold.storage.digest_arrays`) and its attributes."""
    writer.put("state/R", state.R)
    writer.put("state/gram", state.gram)
    if state.qhb is not None and state.residual_factor is not None:
        writer.put("state/qhb", state.qhb)
        writer.put("state/residual_factor", state.residual_factor)
    writer.put("state/column_scale", state.column_scale)
    for name, array in digest_arrays(state.input_digests).items():
        writer.put(f"state/{name}", array)
    writer.set_attrs(
        {"rows_done": state.rows_done, "a_fro2": state.a_fro2, "rows_used": state.rows_used}
    )


def write_segments(
    writer: ResultWriter,
    items: Iterable[tuple[np.ndarray, np.ndarray]],
    count: int,
    records: list[dict[str, Any]],
    retired: list[dict[str, Any]],
) -> None:
    """Write ``count`` segments' (factor, Gram) pairs one item at a time (``items`` may load
    each on demand) and the live and retired segment records."""
    for i, (factor, gram) in enumerate(items):
        if i == 0:
            writer.create(SEGMENT_FACTORS, (count, *factor.shape), factor.dtype, 1)
            writer.create(SEGMENT_GRAMS, (count, *gram.shape), gram.dtype, 1)
        writer.write_rows(SEGMENT_FACTORS, i, factor[None])
        writer.write_rows(SEGMENT_GRAMS, i, gram[None])
    writer.set_attrs({"segments": records, "retired_segments": retired})
