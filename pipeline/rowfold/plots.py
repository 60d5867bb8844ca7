"""The report's plots, drawn with matplotlib as inline SVG.

matplotlib is imported only when a plot is drawn (inside :func:`drawing`), never when
rowfold is imported. Drawing leaves the caller's process as it was: no ``pyplot`` (so no
global figure manager and no backend switch: each :class:`~matplotlib.figure.Figure` gets
its own SVG canvas, so Agg never renders anything), and settings only through
:func:`matplotlib.rc_context`, which restores ``rcParams`` on the way out.

Every plot function takes the data it shows (plain lists, as in the report JSON) and
returns a :class:`Plot`: its title, the SVG text and, for tests and captions, what each
axes shows (labels, limits, scales, the ticks inside the limits).
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from io import StringIO
from typing import Any

import numpy as np
from scipy.special import ndtr, ndtri

WIDTH_IN = 7.5
# Major ticks per axis, at most (each tick is five artists, the bulk of the drawing time).
TICKS = 5
COLORS = ("#3b6ea8", "#c0642f", "#3f8f4f", "#8456a8", "#b04a6a", "#4aa0b0")
# Settings applied inside rc_context only; text stays text in the SVG (smaller, searchable).
RC: dict[str, Any] = {
    "svg.fonttype": "none",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "axes.axisbelow": True,
    "legend.fontsize": 8.0,
    "legend.frameon": True,
    "legend.framealpha": 0.85,
    "legend.edgecolor": "none",
    "axes.spines.top": False,
    "axes.spines.right": False,
}
# Axes of standardized residuals show at least +-WINDOW_MIN (and 1.6 x the flag limit);
# values beyond are drawn on the edge (see Window).
WINDOW_MIN = 6.0


@dataclass(frozen=True)
class AxesInfo:
    """What one axes shows.

    Attributes
    ----------
    title, xlabel, ylabel : str
    xscale, yscale : str
        ``linear``, ``log`` or ``symlog``.
    xlim, ylim : tuple of float
    yticks : tuple of float
        Major y ticks inside ``ylim``.
    notes : tuple of str
        Text written on the axes (e.g. values beyond the histogram).
    shares_x : bool
        The x axis is shared with another axes of the figure (which carries its label).
    """

    title: str
    xlabel: str
    ylabel: str
    xscale: str
    yscale: str
    xlim: tuple[float, float]
    ylim: tuple[float, float]
    yticks: tuple[float, ...]
    notes: tuple[str, ...]
    shares_x: bool


@dataclass(frozen=True)
class Plot:
    """One drawn figure: its title, inline SVG text and the axes it holds."""

    title: str
    svg: str
    axes: tuple[AxesInfo, ...]


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def power_of_ten(value: float, _position: Any = None) -> str:
    """A log-axis tick label such as ``10⁻¹⁶`` in plain Unicode text.

    matplotlib's default labels on log axes are mathtext, whose parser took about a third
    of the drawing time of a report; Unicode superscripts need no parsing."""
    if not value > 0 or not math.isfinite(value):
        return ""
    exponent = math.log10(value)
    if abs(exponent - round(exponent)) > 1e-9:
        return ""
    return "10" + str(round(exponent)).translate(_SUPERSCRIPT)


def rows_label(value: float, _position: Any = None) -> str:
    """A row count in few characters: ``950``, ``250k``, ``1.5M``, ``2G``."""
    for size, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(value) >= size:
            return f"{value / size:.3g}{suffix}"
    return f"{value:.0f}"


class Canvas:
    """Makes figures inside :func:`drawing` and turns them into inline SVG."""

    def __init__(self, matplotlib: Any, figure: Any, canvas: Any) -> None:
        from matplotlib import ticker

        self._mpl = matplotlib
        self._figure = figure
        self._canvas = canvas
        self._ticker = ticker
        self._count = 0

    def row_axis(self, ax: Any) -> None:
        """Label an x axis of row numbers compactly (``250k``, ``1.5M``)."""
        ax.xaxis.set_major_formatter(self._ticker.FuncFormatter(rows_label))

    def log_axis(self, ax: Any, axis: str = "y") -> None:
        """Make an axis logarithmic with plain-text decade labels and no minor ticks."""
        target = ax.yaxis if axis == "y" else ax.xaxis
        (ax.set_yscale if axis == "y" else ax.set_xscale)("log")
        target.set_major_locator(self._ticker.LogLocator(base=10.0, numticks=TICKS + 1))
        target.set_major_formatter(self._ticker.FuncFormatter(power_of_ten))
        target.set_minor_locator(self._ticker.NullLocator())

    def figure(
        self, rows: int = 1, cols: int = 1, height: float = 3.0, sharex: bool = False
    ) -> tuple[Any, Any]:
        """A new figure of ``rows x cols`` axes (returned as an array)."""
        fig = self._figure(figsize=(WIDTH_IN, height))
        self._canvas(fig)
        axes = fig.subplots(rows, cols, squeeze=False, sharex=sharex)
        for ax in axes.flat:  # every tick is several artists: fewer ticks draw faster
            ax.locator_params(nbins=TICKS)
        return fig, axes

    def finish(self, fig: Any, title: str, notes: dict[int, list[str]] | None = None) -> Plot:
        """The figure as an inline ``<svg>`` element with ``title`` as its accessible name."""
        self._count += 1
        out = StringIO()
        with self._mpl.rc_context({"svg.hashsalt": f"rowfold-plot-{self._count}"}):
            fig.savefig(out, format="svg", metadata={"Date": None})
        axes = tuple(_info(ax, (notes or {}).get(i, [])) for i, ax in enumerate(fig.axes))
        return Plot(title, _inline(out.getvalue(), title), axes)


@contextmanager
def drawing() -> Iterator[Canvas]:
    """Import matplotlib and give a :class:`Canvas`; rcParams are restored afterwards."""
    import matplotlib
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    with matplotlib.rc_context(RC):  # type: ignore[arg-type]  # keys are checked at run time
        yield Canvas(matplotlib, Figure, FigureCanvasSVG)


def _inline(svg: str, title: str) -> str:
    """Drop the XML prologue, size the svg to its container, give it a title element."""
    start = svg.index("<svg")
    body = svg[start:]
    head_end = body.index(">") + 1
    head = re.sub(r'\s(width|height)="[^"]*"', "", body[:head_end])
    head = head.replace("<svg", '<svg role="img" class="plot"', 1)
    return f"{head}<title>{_escape(title)}</title>{body[head_end:]}"


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def _info(ax: Any, notes: list[str]) -> AxesInfo:
    low, high = sorted(float(v) for v in ax.get_ylim())
    slack = 1e-9 * (high - low)  # the decade limits and the locator's ticks may differ in
    inside = tuple(  # their last bit
        float(t) for t in ax.get_yticks() if low - slack - 1e-9 * abs(low) <= t <= high + slack
    )
    return AxesInfo(
        title=ax.get_title(),
        xlabel=ax.get_xlabel(),
        ylabel=ax.get_ylabel(),
        xscale=ax.get_xscale(),
        yscale=ax.get_yscale(),
        xlim=tuple(float(v) for v in ax.get_xlim()),  # type: ignore[arg-type]
        ylim=(low, high),
        yticks=inside,
        notes=tuple(notes),
        shares_x=len(ax.get_shared_x_axes().get_siblings(ax)) > 1,
    )


def floats(values: Sequence[Any] | None) -> np.ndarray:
    """Values as floats; None (JSON null) becomes NaN."""
    return np.array([np.nan if v is None else float(v) for v in values or []], dtype=float)


def decade_limits(values: np.ndarray) -> tuple[float, float]:
    """Log-axis limits on whole decades around the positive finite values, so a labelled
    decade tick lies at or below the smallest and at or above the largest."""
    shown = values[np.isfinite(values) & (values > 0)]
    if shown.size == 0:
        return 0.1, 10.0
    low = math.floor(math.log10(float(shown.min())))
    high = math.ceil(math.log10(float(shown.max())))
    if high == low:
        high += 1
    return 10.0**low, 10.0**high


@dataclass(frozen=True)
class Window:
    """The visible range of an axis of standardized residuals.

    When a value lies far out (beyond :data:`WINDOW_MIN` and 1.6 times the flag limit), the
    axis stops at the window and such values are drawn on its edge as triangles pointing
    out, so one gross error does not flatten every other point; a note gives their count.
    """

    limit: float
    clipped: bool

    @staticmethod
    def around(largest: float, flag: float) -> Window:
        """The window for values up to ``largest`` in size, with flag limit ``flag``."""
        wide = max(WINDOW_MIN, 1.6 * flag)
        if largest <= wide:
            return Window(max(1.1 * largest, 1.25 * flag, 1.0), False)
        return Window(wide, True)

    def draw(self, ax: Any, xs: Any, zs: Any, fmt: str, **style: Any) -> int:
        """Plot points, those beyond the window on its edge; return how many were beyond."""
        x, z = floats(list(xs)), floats(list(zs))
        inside = np.abs(z) <= self.limit
        ax.plot(x[inside], z[inside], fmt, **style)
        beyond = np.isfinite(z) & ~inside
        edge = 0.97 * self.limit
        marks = {k: v for k, v in style.items() if k not in ("label", "ms")}
        for sign, marker in ((1, "^"), (-1, "v")):
            side = beyond & (np.sign(z) == sign)
            if side.any():
                ax.plot(x[side], np.full(side.sum(), sign * edge), marker, ms=5, ls="none", **marks)
        return int(beyond.sum())

    def apply(self, ax: Any) -> None:
        """Set the axis to the window."""
        ax.set_ylim(-self.limit, self.limit)

    def note(self, beyond: int, largest: float) -> list[str]:
        """What the edge triangles stand for."""
        if not beyond:
            return []
        return [
            f"{beyond} beyond ±{self.limit:g} drawn on the edge as triangles "
            f"(largest |value| {largest:.3g})"
        ]


# ------------------------------------------------------------------------------ the answer


def parameters(canvas: Canvas, table: list[dict[str, Any]], rhs_cols: int) -> Plot | None:
    """x with ±1 standard error per parameter (top) and the standard errors (bottom)."""
    if not table or any(isinstance(p["x"], dict) for p in table):
        return None  # complex x: the table shows it
    x, se = _per_rhs(table, "x"), _per_rhs(table, "stderr")
    fixed = np.array([p["fixed"] for p in table])
    cols = np.arange(len(table))
    fig, axes = canvas.figure(2, 1, height=4.8, sharex=True)
    top, bottom = axes[0, 0], axes[1, 0]
    for k in range(min(rhs_cols, len(COLORS))):
        label = f"rhs {k}" if rhs_cols > 1 else "x"
        style = {"ms": 3, "color": COLORS[k], "ls": "none"}
        top.errorbar(
            cols[~fixed],
            x[~fixed, k],
            yerr=se[~fixed, k],
            marker="o",
            elinewidth=1,
            capsize=2,
            label=f"{label} ± 1 s.e.",
            **style,
        )
        bottom.plot(cols[~fixed], se[~fixed, k], marker="o", label=label, **style)
    if fixed.any():
        top.plot(cols[fixed], x[fixed, 0], "D", ms=5, color="black", label="held fixed (datum)")
    top.set_title("x, the least-squares solution, with ±1 standard error", loc="left")
    top.set_ylabel("x_j (units: b / column j)")
    bottom.set_title("standard error of each parameter", loc="left")
    bottom.set_ylabel("s.e.(x_j) (units of x_j)")
    bottom.set_xlabel("parameter (column j of A)")
    few = _name_ticks(bottom, [p["name"] for p in table])
    top.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=7, borderaxespad=0)
    fig.subplots_adjust(left=0.12, right=0.98, top=0.94, bottom=0.2 if few else 0.1, hspace=0.45)
    return canvas.finish(fig, "Parameters with their standard errors")


def _per_rhs(table: list[dict[str, Any]], key: str) -> np.ndarray:
    """A (columns x k) float array of one per-rhs field of the parameter table."""
    rows = [p[key] if isinstance(p[key], list) else [p[key]] for p in table]
    return np.array([[np.nan if v is None else float(v) for v in row] for row in rows])


def _name_ticks(ax: Any, names: list[str]) -> bool:
    """Parameter names under the axis when they fit (True), else column numbers."""
    if len(names) > 30:
        return False
    ax.set_xticks(range(len(names)), [n[:18] for n in names], rotation=60, ha="right")
    return True


# ------------------------------------------------------------------------------ refinement


def refinement(canvas: Canvas, corrections: Sequence[float], unit_roundoff: float) -> Plot:
    """Size of each refinement correction, against the unit roundoff."""
    values = floats(corrections)
    fig, axes = canvas.figure(height=2.6)
    ax = axes[0, 0]
    steps = np.arange(1, values.size + 1)
    shown = np.where(values > 0, values, np.nan)
    ax.plot(steps, shown, "o-", color=COLORS[0], label="correction ||dx|| / ||x||")
    ax.axhline(unit_roundoff, color="black", ls="--", lw=1, label=f"u = {unit_roundoff:.2g}")
    canvas.log_axis(ax)
    ax.set_ylim(*decade_limits(np.append(values, unit_roundoff)))
    ax.set_xticks(steps)
    ax.set_xlim(0.5, values.size + 0.5)
    ax.set_title("relative size of each correction")
    ax.set_xlabel("iteration")
    ax.set_ylabel("||dx|| / ||x|| (relative)")
    ax.legend(loc="upper right")
    fig.subplots_adjust(left=0.12, right=0.98, top=0.88, bottom=0.2)
    return canvas.finish(fig, "Iterative refinement")


# ------------------------------------------------------------------------------ conditioning


def spectrum(canvas: Canvas, sigma: Sequence[float], diagonal: Sequence[float]) -> Plot:
    """Singular values of R and |diag(R)| on a log axis with decade limits."""
    s, d = floats(sigma), np.abs(floats(diagonal))
    fig, axes = canvas.figure(height=2.8)
    ax = axes[0, 0]
    ax.plot(np.arange(s.size), s, "o-", ms=3, color=COLORS[0], label="singular values of R")
    ax.plot(np.arange(d.size), d, "s", ms=3, color=COLORS[1], label="|r_jj| (by column)")
    canvas.log_axis(ax)
    ax.set_ylim(*decade_limits(np.concatenate([s, d])))
    ax.set_title("singular values (largest first) and |diag(R)|")
    ax.set_xlabel("index j")
    ax.set_ylabel("value (units of A)")
    ax.legend(loc="upper right")
    fig.subplots_adjust(left=0.12, right=0.98, top=0.88, bottom=0.17)
    return canvas.finish(fig, "Spectrum of R")


# ------------------------------------------------------------------------------ residuals


@dataclass(frozen=True)
class Residuals:
    """What the residual plots need from the report (``residual_screening`` and
    ``plots_data``, see README's Outputs)."""

    flag_above: float
    histogram: dict[str, Any]
    worst: list[dict[str, Any]]
    row_bins: dict[str, Any]
    sample: dict[str, Any]
    high_leverage: list[dict[str, Any]]
    rows: int
    cols: int

    @property
    def largest(self) -> float:
        """The largest |standardized residual| summarised."""
        return float(self.histogram.get("largest", 0.0))

    @property
    def window(self) -> Window:
        """The visible range of the standardized-residual axes."""
        return Window.around(self.largest, self.flag_above)


def residuals(canvas: Canvas, data: Residuals) -> Plot:
    """Histogram, residuals against row, normal QQ plot and leverage, in one figure."""
    fig, axes = canvas.figure(2, 2, height=6.6)
    notes = {
        0: _histogram(canvas, axes[0, 0], data),
        1: _against_row(canvas, axes[0, 1], data),
        2: _normal_qq(axes[1, 0], data),
        3: _leverage(canvas, axes[1, 1], data),
    }
    fig.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.08, hspace=0.4, wspace=0.28)
    return canvas.finish(fig, "Standardized residuals", notes)


Z_LABEL = "standardized residual (σ)"


def _flag_lines(ax: Any, flag: float, vertical: bool = False) -> None:
    line = ax.axvline if vertical else ax.axhline
    for sign in (-1, 1):
        line(sign * flag, color=COLORS[1], ls="--", lw=1)


def _histogram(canvas: Canvas, ax: Any, data: Residuals) -> list[str]:
    hist = data.histogram
    edges, counts = floats(hist["edges"]), floats(hist["counts"])
    ax.bar(
        edges[:-1],
        np.where(counts > 0, counts, np.nan),
        width=np.diff(edges),
        align="edge",
        color=COLORS[0],
        label="rows per bin",
    )
    total = counts.sum() + hist.get("below", 0) + hist.get("above", 0)
    expected = total * np.diff(ndtr(edges))
    centres = (edges[:-1] + edges[1:]) / 2
    ax.plot(
        centres,
        np.where(expected >= 0.5, expected, np.nan),
        color="black",
        lw=1,
        label="expected if N(0, 1)",
    )
    canvas.log_axis(ax)
    _flag_lines(ax, data.flag_above, vertical=True)
    ax.set_xlim(float(edges[0]), float(edges[-1]))
    ax.set_title(f"histogram (flag limit ±{data.flag_above:g} dashed)")
    ax.set_xlabel(Z_LABEL)
    ax.set_ylabel("rows per bin (count)")
    ax.legend(loc="upper right", fontsize=7)
    notes = []
    below, above = int(hist.get("below", 0)), int(hist.get("above", 0))
    if below or above:
        limit = float(edges[-1])
        notes.append(
            f"histogram: not in the bars, {below} below -{limit:g} and {above} above "
            f"+{limit:g} (largest |value| {data.largest:.3g})"
        )
        ax.text(
            0.02,
            0.97,
            f"{below} below, {above} above\nthe range: not shown",
            transform=ax.transAxes,
            va="top",
            fontsize=7,
            color="#a02020",
        )
    if hist.get("not_finite"):
        notes.append(f"histogram: {int(hist['not_finite'])} values not finite (leverage 1)")
    return notes


def _first_rhs(values: Sequence[Any]) -> np.ndarray:
    """The first rhs of a per-rhs list (numbers, or lists for a 2-D rhs)."""
    return floats([v[0] if isinstance(v, list) else v for v in values])


def _signed(worst: dict[str, Any]) -> float:
    """The signed standardized residual of a worst row (the report lists its size)."""
    size = abs(float(worst["standardized"]))
    return -size if float(worst["residual"]) < 0 else size


def _worst_first_rhs(data: Residuals) -> list[dict[str, Any]]:
    return [w for w in data.worst if w["rhs"] == 0]


def _against_row(canvas: Canvas, ax: Any, data: Residuals) -> list[str]:
    bins, window = data.row_bins, data.window
    middle = (floats(bins["starts"]) + floats(bins["stops"]) - 1) / 2
    low = np.clip(_first_rhs(bins["min"]), -window.limit, window.limit)
    high = np.clip(_first_rhs(bins["max"]), -window.limit, window.limit)
    ax.fill_between(
        middle, low, high, color=COLORS[0], alpha=0.25, lw=0, step="mid", label="min to max per bin"
    )
    ax.plot(middle, _first_rhs(bins["median"]), color=COLORS[0], lw=1.2, label="median per bin")
    worst = _worst_first_rhs(data)
    beyond = window.draw(
        ax,
        [w["row"] for w in worst],
        [_signed(w) for w in worst],
        "o",
        ms=3,
        color=COLORS[1],
        label="largest |values|",
    )
    _flag_lines(ax, data.flag_above)
    window.apply(ax)
    ax.set_xlim(0, max(data.rows, 1))
    canvas.row_axis(ax)
    ax.set_title(
        f"against row ({len(middle)} bins of ~{data.rows / max(len(middle), 1):,.0f} rows)"
    )
    ax.set_xlabel("row of the input")
    ax.set_ylabel(Z_LABEL)
    ax.legend(loc="lower right", fontsize=7)
    return [f"against row: {n}" for n in window.note(beyond, data.largest)]


def _sample_z(data: Residuals) -> np.ndarray:
    """Every sampled standardized residual (all rhs), finite only."""
    values = data.sample.get("standardized", [])
    z = floats([u for v in values for u in (v if isinstance(v, list) else [v])])
    return z[np.isfinite(z)]


def _normal_qq(ax: Any, data: Residuals) -> list[str]:
    window = data.window
    z = np.sort(_sample_z(data))
    p = (np.arange(1, z.size + 1) - 0.5) / max(z.size, 1)
    size, seed = data.sample.get("size", 0), data.sample.get("seed")
    beyond = window.draw(
        ax, ndtri(p), z, ".", ms=2.5, color=COLORS[0], label=f"sample of {size} rows (seed {seed})"
    )
    tail_q, tail_z = _tail_positions(data)
    beyond += window.draw(
        ax, tail_q, tail_z, "o", ms=3, color=COLORS[1], label="largest |values| (exact ranks)"
    )
    reach = max(4.0, float(np.max(np.abs(tail_q), initial=0.0))) + 0.3
    ax.plot([-reach, reach], [-reach, reach], color="black", lw=1, label="y = x (normal)")
    window.apply(ax)
    ax.set_xlim(-reach, reach)
    ax.set_title("normal quantile plot")
    ax.set_xlabel("quantile of N(0, 1)")
    ax.set_ylabel(Z_LABEL)
    ax.legend(loc="upper left", fontsize=7)
    return [f"normal quantile plot: {n}" for n in window.note(beyond, data.largest)]


def _tail_positions(data: Residuals) -> tuple[np.ndarray, np.ndarray]:
    """Normal quantiles of the largest |standardized residuals| at their exact ranks.

    The worst values are the largest by |z| among all N values summarised, so the positive
    ones are the largest of all (rank j from the top: p = 1 - (j - 1/2) / N) and the
    negative ones the smallest (p = (j - 1/2) / N)."""
    hist = data.histogram
    total = float(sum(hist["counts"]) + hist.get("below", 0) + hist.get("above", 0))
    z = np.array([_signed(w) for w in data.worst], dtype=float)
    if total <= 0 or z.size == 0:
        return np.zeros(0), np.zeros(0)
    high, low = np.sort(z[z > 0])[::-1], np.sort(z[z <= 0])
    q_high = ndtri(1 - (np.arange(1, high.size + 1) - 0.5) / total)
    q_low = ndtri((np.arange(1, low.size + 1) - 0.5) / total)
    return np.concatenate([q_high, q_low]), np.concatenate([high, low])


def _leverage(canvas: Canvas, ax: Any, data: Residuals) -> list[str]:
    window = data.window
    h = floats(data.sample.get("leverage", []))
    beyond = window.draw(
        ax,
        h,
        _first_rhs(data.sample.get("standardized", [])),
        ".",
        ms=2.5,
        color=COLORS[0],
        label="sample",
    )
    worst = _worst_first_rhs(data)
    beyond += window.draw(
        ax,
        [w["leverage"] for w in worst],
        [_signed(w) for w in worst],
        "o",
        ms=3,
        color=COLORS[1],
        label="largest |values|",
    )
    top = data.high_leverage
    window.draw(
        ax,
        [t["leverage"] for t in top],
        _first_rhs([t["standardized"] for t in top]),
        "s",
        ms=3,
        color=COLORS[2],
        label="highest leverage",
    )
    mean = data.cols / max(data.rows, 1)
    ax.axvline(mean, color="black", lw=1, label=f"mean n/m = {mean:.2g}")
    ax.axvline(2 * mean, color="black", lw=1, ls=":", label="2n/m (common practice)")
    _flag_lines(ax, data.flag_above)
    canvas.log_axis(ax, "x")
    window.apply(ax)
    ax.set_title("leverage against standardized residual")
    ax.set_xlabel("leverage h_i (hat-matrix diagonal, 0 to 1)")
    ax.set_ylabel(Z_LABEL)
    ax.legend(loc="lower left", fontsize=7)
    return [f"leverage plot: {n}" for n in window.note(beyond, data.largest)]


# ------------------------------------------------------------------------------ compare


def method_times(canvas: Canvas, names: list[str], seconds: list[float]) -> Plot:
    """Seconds per method (bars from zero)."""
    fig, axes = canvas.figure(height=2.6)
    ax = axes[0, 0]
    ax.bar(names, seconds, color=COLORS[0])
    ax.set_title("wall time of each method (without the cluster's start)")
    ax.set_xlabel("method")
    ax.set_ylabel("seconds")
    fig.subplots_adjust(left=0.1, right=0.98, top=0.88, bottom=0.2)
    return canvas.finish(fig, "Time per method")


def orthogonality(
    canvas: Canvas, names: list[str], measured: list[float | None], bounds: list[float | None]
) -> Plot:
    """Measured loss of orthogonality and its published bound per method, as points (a
    log axis has no zero for bars to stand on)."""
    got, bound = floats(measured), floats(bounds)
    fig, axes = canvas.figure(height=2.8)
    ax = axes[0, 0]
    where = np.arange(len(names))
    ax.plot(
        where,
        np.where(got > 0, got, np.nan),
        "o",
        ms=6,
        color=COLORS[1],
        label="measured ||I - Q^H Q||_F",
    )
    ax.plot(where, bound, "_", ms=22, mew=2, color="black", label="published bound")
    canvas.log_axis(ax)
    ax.set_ylim(*decade_limits(np.concatenate([got, bound])))
    ax.set_xticks(where, names)
    ax.set_xlim(-0.6, len(names) - 0.4)
    ax.set_title("each method's loss of orthogonality and its bound")
    ax.set_xlabel("method")
    ax.set_ylabel("||I - Q^H Q||_F (dimensionless)")
    ax.legend(loc="upper right")
    fig.subplots_adjust(left=0.12, right=0.98, top=0.88, bottom=0.18)
    return canvas.finish(fig, "Loss of orthogonality against the published bound")


def diagonals(canvas: Canvas, series: dict[str, list[float]]) -> Plot:
    """|diag(R)| of each method on a log axis."""
    fig, axes = canvas.figure(height=2.8)
    ax = axes[0, 0]
    every = [np.abs(floats(values)) for values in series.values()]
    for k, (name, values) in enumerate(zip(series, every, strict=True)):
        ax.plot(
            np.arange(values.size),
            np.where(values > 0, values, np.nan),
            "o-",
            ms=3,
            color=COLORS[k % len(COLORS)],
            label=name,
        )
    canvas.log_axis(ax)
    if every:
        ax.set_ylim(*decade_limits(np.concatenate(every)))
    ax.set_title("|r_jj| of each method")
    ax.set_xlabel("column j")
    ax.set_ylabel("|r_jj| (units of A)")
    ax.legend(loc="upper right")
    fig.subplots_adjust(left=0.12, right=0.98, top=0.88, bottom=0.17)
    return canvas.finish(fig, "Diagonal of R")
