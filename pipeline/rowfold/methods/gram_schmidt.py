"""Block Gram-Schmidt over column panels: BCGS2 and block MGS.

The columns of A are cut into panels of ``spec.panel`` columns (the last one ragged). Q is
built panel by panel in a scratch Zarr array under the job's scratch folder; every pass
over the row blocks is one ``engine.compute`` call. Panel ``k`` holds columns ``J = j0:j1``.

Projection. The coefficients that project panel ``k`` on the earlier panels are formed
right-looking: the pass that writes ``Q_l`` also adds ``Q_l^H X`` for every later column,
so no extra pass is spent on them.

- classical (bcgs2): ``X = A[:, j1:]``, so ``S1 = Q[:, :j0]^H A_J``.
- modified (bmgs): ``X = A[:, j1:] - Q[:, :j0_l] P`` with the coefficients ``P`` found so
  far, so block ``l`` projects what the blocks before it left (block MGS).

The panel then is ``W = A_J - Q[:, :j0] S1``, a derived block source.

- bcgs2 (Barlow & Smoktunowicz, Numer. Math. 123, 2013): inner QR ``W = Y T1`` (Y goes to
  a second scratch array, and the same pass adds ``S2 = Q[:, :j0]^H Y``), then
  ``Z = Y - Q[:, :j0] S2``, inner QR ``Z = Q_J T2``; ``R[:j0, J] = S1 + S2 T1`` and
  ``R[J, J] = T2 T1``. Loss of orthogonality O(u) for numerically full-rank A with a
  stable inner QR (survey: Carson, Lund, Rozložník, Thomas, Linear Algebra Appl. 638, 2022).
- bmgs: inner QR ``W = Q_J T``; ``R[:j0, J] = S1``, ``R[J, J] = T``. Its loss of
  orthogonality grows like u * kappa (Jalby & Philippe, SIAM J. Sci. Stat. Comput. 12(5),
  1991): it is not O(u) on ill-conditioned A. With ``reorthogonalize: true`` each panel
  is projected a second time exactly as in bcgs2 (inner QR, classical re-projection,
  second inner QR), which restores O(u).

The first panel has nothing to project against and gets one inner QR; with
reorthogonalization and ``inner: mgs`` it gets two (Y, then the QR of Y), because MGS's
own Q is orthogonal only to about u * cond(panel) (Björck, BIT 7, 1967).

Inner QR of a panel (``spec.inner``): ``householder`` runs TSQR over the derived source
(one pass), ``cholqr2`` two Gram passes (refused with BreakdownError when Cholesky breaks
down or the panel is too ill-conditioned for it), ``mgs`` one pass per column (column
``c``'s pass replays the earlier columns' MGS steps inside each task). A further pass
writes the panel's Q into the scratch array; the pass that writes the final ``Q_J`` also
adds ``Q_J^H B`` and, for the first panel, the first-pass sums of A (it is the first pass
that reads every column of A).

Passes per panel with ``p`` inner passes: ``p + 1`` without reorthogonalization, and
``2 (p + 1)`` with it (the first panel ``p + 1``, or ``2 (p + 1)`` for mgs); ``p`` is 1
(householder), 2 (cholqr2) or the panel width (mgs).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from rowfold.blocks import BlockPlan
from rowfold.errors import BreakdownError
from rowfold.kernels import cross_product, metrics
from rowfold.methods import tsqr
from rowfold.methods._graph import sum_tree, task
from rowfold.methods.base import Context, Engine, Factorization, QKernel, RowArray
from rowfold.methods.cholesky import (
    SECOND_FACTOR_LIMIT,
    check_gram_range,
    cholesky_or_refuse,
    cholqr2_limit,
    condition_estimate,
    gram_pass,
    more_passes,
)
from rowfold.methods.cholesky import q_block as cholesky_q_block
from rowfold.spec import MethodSpec

CHOLQR2_ADVICE = "use method.inner: householder"


# -- derived block sources -------------------------------------------------------------


def read_q(ref: RowArray, start: int, stop: int, cols: int, dtype: str) -> np.ndarray:
    """Read the first ``cols`` columns of rows ``[start, stop)`` of a scratch Q."""
    return np.asarray(ref.read(start, stop)[:, :cols], dtype=dtype)


@dataclass(frozen=True, slots=True)
class PanelSource:
    """Row blocks of a column panel minus its projection on the first columns of Q.

    Block ``i`` is ``X_i[:, c0:c1] - Q_i[:, :j0] @ coeffs`` with ``j0 = coeffs.shape[0]``.

    Attributes
    ----------
    plan : BlockPlan
        The input (row bounds, dtype, and A itself when ``base`` is None).
    cols : tuple of int
        Column range ``(c0, c1)`` of the panel in ``X``.
    work : RowArray
        The scratch array holding Q.
    coeffs : ndarray (j0, c1 - c0)
        Projection coefficients; ``j0 = 0`` means no projection.
    base : RowArray or None
        ``X``: None for A, else a scratch array (e.g. the intermediate Y of bcgs2).
    """

    plan: BlockPlan
    cols: tuple[int, int]
    work: RowArray
    coeffs: np.ndarray
    base: RowArray | None = None

    @property
    def blocks(self) -> int:
        """Number of row blocks."""
        return self.plan.blocks

    @property
    def width(self) -> int:
        """Columns in the panel."""
        return self.cols[1] - self.cols[0]

    def load(self, index: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Return (projected panel block, None)."""
        return self.project(index), None

    def project(
        self, index: int, a_block: np.ndarray | None = None, q_prev: np.ndarray | None = None
    ) -> np.ndarray:
        """Form block ``index``, reusing A's block or Q's first columns when already read."""
        start, stop = self.plan.bound(index)
        c0, c1 = self.cols
        if self.base is not None:
            full = self.base.read(start, stop)
        else:
            full = self.plan.load(index)[0] if a_block is None else a_block
        panel = np.asarray(full[:, c0:c1], dtype=self.plan.dtype)
        j0 = self.coeffs.shape[0]
        if j0:
            if q_prev is None:
                q_prev = read_q(self.work, start, stop, j0, self.plan.dtype)
            panel = panel - q_prev @ self.coeffs
        return np.asfortranarray(panel)


def work_q_block(block: np.ndarray, recipe: tuple[RowArray, int, int]) -> np.ndarray:
    """Return rows ``[start, stop)`` of the scratch Q; the block of A is not needed."""
    ref, start, stop = recipe
    return np.asarray(ref.read(start, stop))


# -- modified Gram-Schmidt inside a panel ----------------------------------------------


def mgs_replay(block: np.ndarray, T: np.ndarray) -> np.ndarray:
    """Apply the first ``T.shape[0]`` column steps of MGS with known coefficients ``T``.

    Step ``l`` normalises column ``l`` by ``T[l, l]`` and removes it from the later
    columns with ``T[l, l+1:]``, in order, as MGS does. Columns of zero norm stay zero.
    """
    X = np.array(block, dtype=np.result_type(block, T), order="F", copy=True)
    for step in range(T.shape[0]):
        norm = float(np.real(T[step, step]))
        X[:, step] = X[:, step] / norm if norm > 0 else 0
        X[:, step + 1 :] -= np.outer(X[:, step], T[step, step + 1 :])
    return X


def mgs_leaf(source: PanelSource, index: int, T: np.ndarray) -> np.ndarray:
    """Return ``x_c^H X[:, c:]`` of one block after the ``c = T.shape[0]`` known steps."""
    column = T.shape[0]
    X = mgs_replay(source.load(index)[0], T)
    return np.asarray(X[:, column].conj() @ X[:, column:])


def mgs_q_block(block: np.ndarray, T: np.ndarray) -> np.ndarray:
    """Form the panel's Q block by replaying every MGS step."""
    return mgs_replay(block, T)


def add_arrays(*parts: np.ndarray) -> np.ndarray:
    """Add partial sums."""
    total = parts[0]
    for part in parts[1:]:
        total = total + part
    return total


def mgs_row(sums: np.ndarray) -> np.ndarray:
    """Turn ``x_c^H X[:, c:]`` into row ``c`` of T: ``[||x_c||, q_c^H X[:, c+1:]]``."""
    row = np.zeros_like(sums)
    norm = float(np.sqrt(max(float(np.real(sums[0])), 0.0)))
    row[0] = norm
    if norm > 0:
        row[1:] = sums[1:] / norm
    return row


# -- the pass that writes a panel ------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PanelWrite:
    """What one writing pass does in each row block.

    Attributes
    ----------
    source : PanelSource
        The panel whose Q block the kernel forms.
    kernel : QKernel
        The inner QR's kernel (block of the source, recipe) -> Q block.
    target : RowArray
        Scratch array written (Q, or Y for the intermediate basis).
    col_start : int
        First column written in ``target``.
    panel : tuple of int
        The panel's columns ``(j0, j1)`` in A.
    final : bool
        True when writing Q (adds ``Q_J^H B`` and trailing projections), False for Y
        (adds ``S2 = Q[:, :j0]^H Y``).
    trailing : ndarray or None
        Modified projection: coefficients ``P[:j0, j1:]`` removed from the trailing
        columns before projecting them on ``Q_J``; None for classical projection.
    first : bool
        Also add the first-pass sums of A.
    """

    source: PanelSource
    kernel: QKernel
    target: RowArray
    col_start: int
    panel: tuple[int, int]
    final: bool
    trailing: np.ndarray | None
    first: bool


def write_panel(step: PanelWrite, index: int, recipe: Any) -> metrics.Sums:
    """Form and write one block of the panel's Q (or Y); return its sums."""
    plan = step.source.plan
    start, stop = plan.bound(index)
    j0, j1 = step.panel
    reads_a = step.final and (step.first or j1 < plan.cols or plan.rhs is not None)
    a, b = plan.load(index) if reads_a else (None, None)
    q_prev = read_q(step.source.work, start, stop, j0, plan.dtype) if j0 else None
    q = step.kernel(step.source.project(index, a, q_prev), recipe)
    step.target.write(start, q, step.col_start)
    if not step.final:
        return {} if q_prev is None else {"s2": cross_product(q_prev, q)}
    return final_sums(step, q, a, b, q_prev)


def final_sums(
    step: PanelWrite,
    q: np.ndarray,
    a: np.ndarray | None,
    b: np.ndarray | None,
    q_prev: np.ndarray | None,
) -> metrics.Sums:
    """Sums of a block of the final Q_J: ``Q_J^H B``, trailing projections, first-pass sums."""
    j1 = step.panel[1]
    sums: metrics.Sums = {}
    if b is not None:
        sums["qhb"] = cross_product(q, b)
    if a is not None and j1 < a.shape[1]:
        trailing = a[:, j1:]
        if step.trailing is not None and q_prev is not None:
            trailing = trailing - q_prev @ step.trailing
        sums["proj"] = cross_product(q, trailing)
    if a is not None and step.first:
        sums.update(metrics.gram_sums(a))
    return sums


# -- inner QR of a panel -----------------------------------------------------------------


@dataclass(frozen=True)
class PanelQR:
    """A panel's inner QR: ``X = Q T`` with Q formed per block by ``kernel``.

    Attributes
    ----------
    T : ndarray (w, w)
        Upper triangular, diagonal real and >= 0.
    kernel : QKernel
        (block of the panel source, recipe) -> block of Q.
    recipes : list
        One recipe per row block.
    """

    T: np.ndarray
    kernel: QKernel
    recipes: list[Any]


def householder_panel(source: PanelSource, tree: str | int, engine: Engine, label: str) -> PanelQR:
    """Inner QR by TSQR over the derived source (one pass)."""
    fact = tsqr.factor_source(source, tree, engine, True, label)
    return PanelQR(fact.R, fact.q_kernel, fact.q_recipes)


def cholqr2_panel(source: PanelSource, engine: Engine, label: str) -> PanelQR:
    """Inner QR by CholeskyQR2 over the derived source (two passes).

    Raises
    ------
    BreakdownError
        When a Cholesky factor breaks down, or the panel is too ill-conditioned for
        CholeskyQR2 to give an orthogonal Q (the limits of :mod:`.cholesky`).
    """
    first = gram_pass(source, engine, (), f"{label}: Gram pass 1")
    check_gram_range(first["gram"], source.plan.rows, label)
    factors = [cholesky_or_refuse(first["gram"], label, "first", CHOLQR2_ADVICE)]
    estimate = condition_estimate(factors[0])
    limit = cholqr2_limit(factors[0].dtype)
    if not estimate < limit:
        raise BreakdownError(
            f"{label}: panel condition estimate {estimate:.3g} exceeds {limit:.3g}, "
            f"so CholeskyQR2 cannot give an orthogonal panel; {CHOLQR2_ADVICE}"
        )
    more_passes(source, engine, factors, 1, label, CHOLQR2_ADVICE)
    second = condition_estimate(factors[1])
    if second > SECOND_FACTOR_LIMIT:
        raise BreakdownError(
            f"{label}: the second CholeskyQR pass still has condition {second:.3g}; "
            f"{CHOLQR2_ADVICE}"
        )
    T = np.triu(factors[1] @ factors[0])
    np.fill_diagonal(T, np.abs(np.diagonal(T)))
    recipe = tuple(factors)
    return PanelQR(T, cholesky_q_block, [recipe] * source.blocks)


def mgs_panel(source: PanelSource, engine: Engine, label: str) -> PanelQR:
    """Inner QR by column-oriented MGS (one pass per column)."""
    width = source.width
    T = np.zeros((width, width), dtype=source.plan.dtype)
    for column in range(width):
        known = T[:column].copy()
        leaves = [task(mgs_leaf, source, i, known) for i in range(source.blocks)]
        (sums,) = engine.compute(
            [sum_tree(leaves, add_arrays)], f"{label}: MGS column {column + 1} of {width}"
        )
        T[column, column:] = mgs_row(np.asarray(sums))
    return PanelQR(T, mgs_q_block, [T] * source.blocks)


def inner_qr(source: PanelSource, spec: MethodSpec, engine: Engine, label: str) -> PanelQR:
    """Run the inner QR that ``spec.inner`` names on a panel source."""
    if spec.inner == "householder":
        return householder_panel(source, spec.tree, engine, label)
    if spec.inner == "cholqr2":
        return cholqr2_panel(source, engine, label)
    if spec.inner == "mgs":
        return mgs_panel(source, engine, label)
    raise ValueError(f"method.inner={spec.inner!r}; expected householder, cholqr2 or mgs")


# -- the method --------------------------------------------------------------------------


class CountingEngine:
    """An engine that counts its passes: every ``compute`` or ``stream`` call is one."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.passes = 0

    def compute(self, tasks: Sequence[Any], label: str) -> list[Any]:
        """Compute (one pass)."""
        self.passes += 1
        return self.engine.compute(tasks, label)

    def persist(self, tasks: Sequence[Any]) -> list[Any]:
        """Persist (not a pass of its own; the compute that follows counts)."""
        return self.engine.persist(tasks)

    def stream(self, tasks: Sequence[Any], label: str) -> Iterator[Any]:
        """Stream (one pass)."""
        self.passes += 1
        return self.engine.stream(tasks, label)

    def peak_memory_bytes(self) -> int:
        """Peak memory of the wrapped engine."""
        return self.engine.peak_memory_bytes()


def panel_bounds(cols: int, width: int) -> list[tuple[int, int]]:
    """Cut ``[0, cols)`` into panels of ``width`` columns (the last one ragged)."""
    width = max(1, width)
    return [(j0, min(j0 + width, cols)) for j0 in range(0, cols, width)]


class BlockGramSchmidt:
    """State of one block Gram-Schmidt run (see the module docstring).

    Parameters
    ----------
    plan, spec, ctx : the method's arguments.
    name : str
        Method name for labels and messages.
    modified : bool
        Modified (block MGS) instead of classical first projection.
    reorthogonalize : bool
        Project every panel after the first twice, with an inner QR in between.
    """

    def __init__(
        self,
        plan: BlockPlan,
        spec: MethodSpec,
        ctx: Context,
        name: str,
        modified: bool,
        reorthogonalize: bool,
    ) -> None:
        self.plan, self.spec, self.name = plan, spec, name
        self.modified, self.reorthogonalize = modified, reorthogonalize
        self.engine = CountingEngine(ctx.engine)
        self.panels = panel_bounds(plan.cols, spec.panel)
        n, dtype = plan.cols, np.dtype(plan.dtype)
        chunk = plan.per_block
        self.q_ref = ctx.scratch.create("Q", plan.rows, n, dtype, chunk)
        # MGS's own Q is orthogonal only to about u * cond(panel) (Björck, BIT 7, 1967), so
        # with reorthogonalization the first panel is factored twice too when inner is mgs.
        self.twice_first = reorthogonalize and spec.inner == "mgs"
        self.y_ref: RowArray | None = None
        if reorthogonalize and (len(self.panels) > 1 or self.twice_first):
            width = self.panels[0][1]
            self.y_ref = ctx.scratch.create("Y", plan.rows, width, dtype, chunk)
        self.R = np.zeros((n, n), dtype=dtype)
        self.proj = np.zeros((n, n), dtype=dtype)
        self.qhb = None if plan.rhs is None else np.zeros((n, plan.rhs_cols), dtype=dtype)
        self.sums: metrics.FirstPassSums | None = None

    def run(self) -> Factorization:
        """Factor panel by panel and return the factorization."""
        for index, cols in enumerate(self.panels):
            try:
                self.factor_panel(index, cols)
            except BreakdownError as exc:
                raise BreakdownError(str(exc), passes=self.engine.passes) from None
        return self.result()

    def label(self, index: int, what: str) -> str:
        """Progress label and message prefix for one step of one panel."""
        j0, j1 = self.panels[index]
        return (
            f"{self.name}: panel {index + 1} of {len(self.panels)} (columns {j0}..{j1 - 1}), {what}"
        )

    def factor_panel(self, index: int, cols: tuple[int, int]) -> None:
        """Project, factor and write one panel; update R, Q^H B and the projections."""
        j0, j1 = cols
        source = PanelSource(self.plan, cols, self.q_ref, self.proj[:j0, j0:j1].copy())
        qr = inner_qr(source, self.spec, self.engine, self.label(index, f"inner {self.spec.inner}"))
        self.R[:j0, j0:j1] = source.coeffs
        self.R[j0:j1, j0:j1] = qr.T
        if self.reorthogonalize and (j0 > 0 or self.twice_first):
            source, qr = self.reproject(index, source, qr)
        trailing = self.proj[:j0, j1:].copy() if self.modified else None
        step = PanelWrite(source, qr.kernel, self.q_ref, j0, cols, True, trailing, index == 0)
        sums = self.write(step, qr.recipes, self.label(index, "write Q"))
        if self.qhb is not None:
            self.qhb[j0:j1] = sums["qhb"]
        if j1 < self.plan.cols:
            self.proj[j0:j1, j1:] = sums["proj"]
        if index == 0:
            self.sums = metrics.FirstPassSums.of(sums)

    def reproject(
        self, index: int, source: PanelSource, first: PanelQR
    ) -> tuple[PanelSource, PanelQR]:
        """Write Y (``W = Y T1``), project it again and factor ``Z = Y - Q S2 = Q_J T2``."""
        assert self.y_ref is not None
        j0, j1 = source.cols
        step = PanelWrite(source, first.kernel, self.y_ref, 0, (j0, j1), False, None, False)
        sums = self.write(step, first.recipes, self.label(index, "write Y"))
        s2 = sums.get("s2", np.zeros((0, j1 - j0), dtype=self.R.dtype))
        again = PanelSource(self.plan, (0, j1 - j0), self.q_ref, s2, base=self.y_ref)
        second = inner_qr(again, self.spec, self.engine, self.label(index, "second inner QR"))
        self.R[:j0, j0:j1] += s2 @ first.T
        self.R[j0:j1, j0:j1] = second.T @ first.T
        return again, second

    def write(self, step: PanelWrite, recipes: list[Any], label: str) -> metrics.Sums:
        """One pass: write the panel's blocks and add their sums."""
        leaves = [task(write_panel, step, i, recipes[i]) for i in range(self.plan.blocks)]
        (total,) = self.engine.compute([sum_tree(leaves, add_sums)], label)
        result: metrics.Sums = total
        return result

    def result(self) -> Factorization:
        """Assemble the Factorization; Q is read back from the scratch array."""
        assert self.sums is not None, "the first panel adds the first-pass sums"
        R = np.triu(self.R)
        np.fill_diagonal(R, np.abs(np.real(np.diagonal(R))))
        return Factorization(
            R=R,
            qhb=self.qhb,
            q_kernel=work_q_block,
            q_recipes=[(self.q_ref, start, stop) for start, stop in self.plan.bounds],
            passes=self.engine.passes,
            sums=self.sums,
            details={
                "panels": len(self.panels),
                "panel": self.panels[0][1],
                "inner": self.spec.inner,
                "reorthogonalize": self.reorthogonalize,
                "projection": "modified" if self.modified else "classical",
            },
        )


def add_sums(*parts: metrics.Sums) -> metrics.Sums:
    """Add pass sums key by key (a value of None stays None)."""
    total: metrics.Sums = dict(parts[0])
    for part in parts[1:]:
        for key, value in part.items():
            total[key] = None if value is None else total[key] + value
    return total


def bcgs2(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Block classical Gram-Schmidt with reorthogonalization (BCGS2)."""
    return BlockGramSchmidt(plan, spec, ctx, "bcgs2", modified=False, reorthogonalize=True).run()


def bmgs(plan: BlockPlan, spec: MethodSpec, ctx: Context) -> Factorization:
    """Block modified Gram-Schmidt; ``spec.reorthogonalize`` projects each panel twice."""
    return BlockGramSchmidt(
        plan, spec, ctx, "bmgs", modified=True, reorthogonalize=spec.reorthogonalize
    ).run()
