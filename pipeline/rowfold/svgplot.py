"""Small, dependency-free SVG charts for the HTML reports.

Each chart function returns one ``<svg>`` element as text, ready to be inlined in an
HTML page: :func:`line_chart` (named series over an index, linear or log y),
:func:`bar_chart` (vertical or horizontal bars, with an optional marker tick per bar)
and :func:`histogram` (bins from edges and counts, with dashed vertical lines).

Values that cannot be drawn never raise: ``None``, NaN and infinities are skipped, and
values at or below zero on a log axis are raised to the smallest positive value of the
chart. Every piece of text goes through :func:`html.escape`. Each drawn data mark carries
``class="mark"`` and sits in a ``<g class="series">`` group, so tests can count them.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

SVG_NS = "http://www.w3.org/2000/svg"
WIDTH = 700
HEIGHT = 300
FONT = 11
COLORS = ("#4a7ab0", "#b0704a", "#4a9a5a", "#8a5ab0", "#b04a6a", "#4aa0b0", "#9a9a3a", "#666666")
_CHAR = 0.6 * FONT  # rough width of one character, for layout only
_LEGEND_ROW = 16

Values = Sequence[float | None] | np.ndarray


@dataclass(frozen=True)
class Box:
    """The plot area, in pixels from the top-left corner of the chart."""

    left: float
    top: float
    right: float
    bottom: float

    def contains(self, x: float, y: float) -> bool:
        """Whether the point (x, y) lies inside the box or on its edge."""
        return self.left <= x <= self.right and self.top <= y <= self.bottom


@dataclass(frozen=True)
class Scale:
    """A map from data values on one axis to pixels.

    ``lo`` and ``hi`` are the ends of the domain in axis units (``log10`` of the value on a
    log axis); ``start`` and ``stop`` are the pixels they land on.
    """

    lo: float
    hi: float
    start: float
    stop: float
    log: bool = False
    floor: float = 1.0  # log axes: values at or below zero are raised to this
    step: float = 1.0  # linear axes: distance between ticks

    def unit(self, value: float) -> float:
        """``value`` in axis units: itself, or ``log10`` of it on a log axis."""
        return math.log10(max(value, self.floor)) if self.log else value

    def __call__(self, value: float) -> float:
        """The pixel of ``value``, clamped to the ends of the axis."""
        return self.pixel(self.unit(value))

    def pixel(self, unit: float) -> float:
        """The pixel of a position given in axis units, clamped to the ends of the axis."""
        fraction = (unit - self.lo) / (self.hi - self.lo)
        fraction = fraction if math.isfinite(fraction) else 0.0
        return self.start + min(max(fraction, 0.0), 1.0) * (self.stop - self.start)

    def ticks(self) -> list[tuple[float, str]]:
        """(pixel, label) of each tick: decades on a log axis, round steps on a linear one."""
        if self.log:
            first, last = math.ceil(self.lo), math.floor(self.hi)
            every = int(_nice_step((last - first + 1) / 8, integer=True))
            return [(self.pixel(k), _decade(k)) for k in range(first, last + 1) if k % every == 0]
        first, last = math.ceil(self.lo / self.step - 1e-9), math.floor(self.hi / self.step + 1e-9)
        return [(self.pixel(k * self.step), _number(k * self.step)) for k in range(first, last + 1)]


@dataclass(frozen=True)
class Legend:
    """One legend entry: a label and how its swatch is drawn.

    ``kinds`` holds any of ``line``, ``dash``, ``circle``, ``square``, ``bar`` and ``tick``.
    """

    label: str
    color: str
    kinds: tuple[str, ...]


def _decade(k: int) -> str:
    return f"{10.0**k:g}" if -3 <= k <= 4 else f"1e{k}"


def _number(value: float) -> str:
    return "0" if abs(value) < 1e-300 else f"{value:.6g}"


def floats(values: Iterable[float | None]) -> np.ndarray:
    """The values as a float array, with ``None`` (and anything non-numeric) as NaN."""
    out = []
    for value in values:
        try:
            out.append(float(value) if value is not None else math.nan)
        except (TypeError, ValueError):
            out.append(math.nan)
    return np.asarray(out, dtype=float)


def _nice_step(raw: float, integer: bool) -> float:
    raw = max(raw, 1e-300)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1.0, 2.0, 5.0, 10.0) if m * power >= raw)
    return max(step, 1.0) if integer else step


def make_scale(
    values: Values,
    start: float,
    stop: float,
    *,
    log: bool = False,
    zero: bool = False,
    integer: bool = False,
    margin: float = 0.05,
) -> Scale:
    """A scale whose domain covers the finite ``values`` with a small margin.

    Parameters
    ----------
    values
        Data to cover; ``None``, NaN and infinities are ignored, and so are values at or
        below zero when ``log`` is set.
    start, stop
        Pixels of the low and high ends of the domain (``stop < start`` for a y axis).
    log
        A log10 axis with decade ticks.
    zero
        Linear axes: include zero, and keep it as the domain's edge (for bars).
    integer
        Linear axes: ticks at whole numbers only (for an index).
    margin
        Linear axes: room left beyond the data at each end, as a fraction of its span.

    Returns
    -------
    Scale
        The map from values to pixels.
    """
    data = floats(values)
    data = np.clip(data[np.isfinite(data)], -1e300, 1e300)
    if log:
        return _log_scale(data[data > 0], start, stop)
    data = np.append(data, 0.0) if zero else data
    return _linear_scale(data, start, stop, zero, integer, margin)


def _log_scale(data: np.ndarray, start: float, stop: float) -> Scale:
    if data.size == 0:
        return Scale(0.0, 1.0, start, stop, log=True, floor=1.0)
    floor = float(data.min())
    lo, hi = math.log10(floor), math.log10(float(data.max()))
    margin = max(0.05 * (hi - lo), 0.15)
    lo, hi = lo - margin, hi + margin
    if math.floor(hi) - math.ceil(lo) < 1:  # fewer than two decades inside: widen to them
        lo, hi = math.floor(lo), math.ceil(hi)
    return Scale(lo, hi, start, stop, log=True, floor=floor)


def _linear_scale(
    data: np.ndarray, start: float, stop: float, zero: bool, integer: bool, margin: float
) -> Scale:
    lo, hi = (float(data.min()), float(data.max())) if data.size else (0.0, 1.0)
    if hi == lo:
        lo, hi = (0.0, 1.0) if lo == 0 else (lo - abs(lo) / 2, hi + abs(hi) / 2)
    room = margin * (hi - lo)
    lo = lo if zero and lo == 0 else lo - room
    hi = hi if zero and hi == 0 else hi + room
    return Scale(lo, hi, start, stop, step=_nice_step((hi - lo) / 5, integer))


def _esc(text: object) -> str:
    return html.escape(str(text), quote=True)


def _f(value: float) -> str:
    return f"{value:.1f}"


def _text(x: float, y: float, text: str, anchor: str = "middle", extra: str = "") -> str:
    return f'<text x="{_f(x)}" y="{_f(y)}" text-anchor="{anchor}"{extra}>{_esc(text)}</text>'


def _line(x1: float, y1: float, x2: float, y2: float, style: str) -> str:
    return f'<line x1="{_f(x1)}" y1="{_f(y1)}" x2="{_f(x2)}" y2="{_f(y2)}" {style}/>'


def _rect(x: float, y: float, w: float, h: float, style: str, tip: str = "") -> str:
    head = f'<rect x="{_f(x)}" y="{_f(y)}" width="{_f(max(w, 0.0))}" height="{_f(max(h, 0.0))}"'
    return f"{head} {style}><title>{_esc(tip)}</title></rect>" if tip else f"{head} {style}/>"


def _svg(title: str, width: int, height: int, body: Iterable[str]) -> str:
    head = (
        f'<svg xmlns="{SVG_NS}" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" role="img" font-family="sans-serif" '
        f'font-size="{FONT}" style="max-width:100%;height:auto">'
    )
    background = f'<rect width="{width}" height="{height}" fill="#fff"/>'
    return f"{head}<title>{_esc(title)}</title>{background}{''.join(body)}</svg>"


def _text_width(texts: Iterable[str]) -> float:
    return max((len(t) * _CHAR for t in texts), default=0.0)


def _layout(width: int, height: int, legend: Sequence[Legend], left: float = 64.0) -> Box:
    right = width - 16 - (_text_width(e.label for e in legend) + 36 if legend else 0)
    return Box(left, 12.0, max(right, left + 40), max(height - 42.0, 52.0))


def _value_axis(scale: Scale, box: Box, vertical: bool) -> list[str]:
    """Grid lines, tick marks and labels of an axis; vertical means the y axis."""
    out = []
    grid = 'stroke="#ddd" stroke-width="1"'
    for pixel, label in scale.ticks():
        if vertical:
            out.append(_line(box.left, pixel, box.right, pixel, grid))
            out.append(_line(box.left - 4, pixel, box.left, pixel, 'stroke="#444"'))
            out.append(_text(box.left - 6, pixel + FONT / 3, label, "end"))
        else:
            out.append(_line(pixel, box.top, pixel, box.bottom, grid))
            out.append(_line(pixel, box.bottom, pixel, box.bottom + 4, 'stroke="#444"'))
            out.append(_text(pixel, box.bottom + 6 + FONT, label))
    return out


def _frame(box: Box, x_label: str, y_label: str) -> list[str]:
    out = [
        f'<rect class="frame" x="{_f(box.left)}" y="{_f(box.top)}" '
        f'width="{_f(box.right - box.left)}" height="{_f(box.bottom - box.top)}" '
        'fill="none" stroke="#444"/>'
    ]
    if x_label:
        out.append(_text((box.left + box.right) / 2, box.bottom + 34, x_label))
    if y_label:
        x, y = 14.0, (box.top + box.bottom) / 2
        out.append(_text(x, y, y_label, extra=f' transform="rotate(-90 {_f(x)} {_f(y)})"'))
    return out


def _swatch(kind: str, x: float, y: float, color: str) -> str:
    if kind == "line":
        return _line(x, y, x + 20, y, f'stroke="{color}" stroke-width="1.5"')
    if kind == "dash":
        return _line(x, y, x + 20, y, f'stroke="{color}" stroke-dasharray="5 3"')
    if kind == "tick":
        return _line(x + 2, y, x + 18, y, f'stroke="{color}" stroke-width="2"')
    if kind == "bar":
        return _rect(x + 4, y - 5, 12, 10, f'fill="{color}"')
    return _marker(kind, x + 10, y, color, "")


def _legend(entries: Sequence[Legend], box: Box) -> list[str]:
    out = ['<g class="legend">']
    for row, entry in enumerate(entries):
        x, y = box.right + 12, box.top + 8 + row * _LEGEND_ROW
        out += [_swatch(kind, x, y, entry.color) for kind in entry.kinds]
        out.append(_text(x + 26, y + FONT / 3, entry.label, "start"))
    return [*out, "</g>"] if entries else []


@dataclass(frozen=True)
class Series:
    """One named sequence of y values; x defaults to 1, 2, ..., len(values)."""

    name: str
    values: Values
    line: bool = True
    marker: str = "circle"  # "circle", "square" or "none"
    x: Values | None = None


def _marker(kind: str, x: float, y: float, color: str, css: str = ' class="mark"') -> str:
    if kind == "square":
        return (
            f'<rect{css} x="{_f(x - 2.5)}" y="{_f(y - 2.5)}" width="5" height="5" fill="{color}"/>'
        )
    if kind == "circle":
        return f'<circle{css} cx="{_f(x)}" cy="{_f(y)}" r="2.5" fill="{color}"/>'
    return ""


def _path(points: Sequence[tuple[float, float] | None], color: str) -> str:
    """A polyline through the points, broken where a point is missing."""
    parts, pen_down = [], False
    for point in points:
        if point is not None:
            parts.append(f"{'L' if pen_down else 'M'}{_f(point[0])} {_f(point[1])}")
        pen_down = point is not None
    d = " ".join(parts)
    return f'<path d="{d}" fill="none" stroke="{color}" stroke-width="1.5"/>' if d else ""


def _xy(series: Series) -> tuple[np.ndarray, np.ndarray]:
    y = floats(series.values)
    x = np.arange(1.0, y.size + 1) if series.x is None else floats(series.x)
    n = min(x.size, y.size)
    return x[:n], y[:n]


def _series_group(series: Series, xs: Scale, ys: Scale, color: str) -> str:
    x, y = _xy(series)
    drawable = np.isfinite(x) & np.isfinite(y)
    points = [(xs(a), ys(b)) if ok else None for a, b, ok in zip(x, y, drawable, strict=True)]
    marks = "".join(_marker(series.marker, p[0], p[1], color) for p in points if p)
    line = _path(points, color) if series.line else ""
    return f'<g class="series" data-name="{_esc(series.name)}">{line}{marks}</g>'


def _series_legend(series: Series, color: str) -> Legend:
    kinds = ("line",) if series.line else ()
    return Legend(series.name, color, kinds + ((series.marker,) if series.marker != "none" else ()))


def line_chart(
    series: Sequence[Series],
    *,
    title: str,
    x_label: str = "",
    y_label: str = "",
    log_y: bool = False,
    width: int = WIDTH,
    height: int = HEIGHT,
) -> str:
    """Lines and/or markers of several named series, with a legend.

    Parameters
    ----------
    series
        The series to draw, coloured in turn from :data:`COLORS`.
    title
        The chart's accessible name (its ``<title>`` element); not drawn.
    x_label, y_label
        Axis labels; empty for none.
    log_y
        Log10 y axis with decade ticks.
    width, height
        Size in pixels (the chart scales through its ``viewBox``).

    Returns
    -------
    str
        The ``<svg>`` element.
    """
    colors = [COLORS[i % len(COLORS)] for i in range(len(series))]
    legend = [_series_legend(s, c) for s, c in zip(series, colors, strict=True)]
    box = _layout(width, height, legend)
    pairs = [_xy(s) for s in series]
    all_x = np.concatenate([x for x, _ in pairs]) if pairs else np.empty(0)
    all_y = np.concatenate([y for _, y in pairs]) if pairs else np.empty(0)
    xs = make_scale(all_x, box.left, box.right, integer=True)
    ys = make_scale(all_y, box.bottom, box.top, log=log_y)
    body = [*_value_axis(ys, box, True), *_value_axis(xs, box, False)]
    body += [_series_group(s, xs, ys, c) for s, c in zip(series, colors, strict=True)]
    return _svg(
        title, width, height, [*body, *_frame(box, x_label, y_label), *_legend(legend, box)]
    )


@dataclass(frozen=True)
class _Bars:
    """Where the bars of a bar chart go: categories along one axis, values along the other."""

    box: Box
    values: Scale
    horizontal: bool
    count: int

    def band(self, i: int) -> tuple[float, float]:
        """Start and length, in pixels, of category ``i``'s band."""
        lo, hi = (
            (self.box.top, self.box.bottom) if self.horizontal else (self.box.left, self.box.right)
        )
        size = (hi - lo) / max(self.count, 1)
        return lo + i * size, size

    def base(self) -> float:
        return self.values.start if self.values.log else self.values(0.0)

    def rect(self, i: int, value: float, style: str, tip: str) -> str:
        start, size = self.band(i)
        a, b = sorted((self.base(), self.values(value)))
        if self.horizontal:
            return _rect(a, start + 0.15 * size, b - a, 0.7 * size, style, tip)
        return _rect(start + 0.15 * size, a, 0.7 * size, b - a, style, tip)

    def tick(self, i: int, value: float) -> str:
        start, size = self.band(i)
        v, style = self.values(value), 'class="bound" stroke="#000" stroke-width="2"'
        if self.horizontal:
            return _line(v, start + 0.05 * size, v, start + 0.95 * size, style)
        return _line(start + 0.05 * size, v, start + 0.95 * size, v, style)

    def label(self, i: int, text: str) -> str:
        start, size = self.band(i)
        if self.horizontal:
            return _text(self.box.left - 6, start + size / 2 + FONT / 3, text, "end")
        return _text(start + size / 2, self.box.bottom + 6 + FONT, text)


def _bar_layout(
    labels: Sequence[str], data: np.ndarray, log_y: bool, horizontal: bool, box: Box
) -> _Bars:
    start, stop = (box.left, box.right) if horizontal else (box.bottom, box.top)
    scale = make_scale(data, start, stop, log=log_y, zero=not log_y)
    return _Bars(box, scale, horizontal, len(labels))


def bar_chart(
    labels: Sequence[str],
    values: Values,
    *,
    title: str,
    value_label: str = "",
    log_y: bool = False,
    horizontal: bool = False,
    ticks: Values | None = None,
    bar_label: str = "",
    tick_label: str = "",
    color: str = COLORS[0],
    width: int = WIDTH,
    height: int = HEIGHT,
) -> str:
    """One bar per category, with an optional black marker tick on each bar.

    Parameters
    ----------
    labels
        Category names, one per bar.
    values
        Bar lengths; a missing or NaN value draws no bar.
    title
        The chart's accessible name (its ``<title>`` element); not drawn.
    value_label
        Label of the value axis.
    log_y
        Log10 value axis (bars then start at the axis' low end).
    horizontal
        Bars grow to the right, categories top to bottom.
    ticks
        Optional value per category drawn as a short black line across its bar.
    bar_label, tick_label
        Legend entries for the bars and the ticks; no legend when both are empty.
    color
        Fill of the bars.
    width, height
        Size in pixels (the chart scales through its ``viewBox``).

    Returns
    -------
    str
        The ``<svg>`` element.
    """
    labels = [str(label) for label in labels]
    bars, marks = floats(values)[: len(labels)], floats(ticks if ticks is not None else [])
    legend = [Legend(bar_label, color, ("bar",))] if bar_label else []
    legend += [Legend(tick_label, "#000", ("tick",))] if tick_label else []
    left = _text_width(labels) + 14 if horizontal else 64.0
    box = _layout(width, height, legend, left=max(left, 40.0))
    layout = _bar_layout(labels, np.concatenate([bars, marks]), log_y, horizontal, box)
    body = _value_axis(layout.values, box, not horizontal)
    rects = [
        layout.rect(i, v, f'class="mark" fill="{color}"', f"{labels[i]}: {v:.4g}")
        for i, v in enumerate(bars)
        if np.isfinite(v)
    ]
    lines = [layout.tick(i, v) for i, v in enumerate(marks[: len(labels)]) if np.isfinite(v)]
    body += [f'<g class="series">{"".join(rects)}</g>', *lines]
    body += [layout.label(i, label) for i, label in enumerate(labels)]
    frame = _frame(box, value_label if horizontal else "", "" if horizontal else value_label)
    return _svg(title, width, height, [*body, *frame, *_legend(legend, box)])


def _drawable(edges: np.ndarray, counts: np.ndarray, i: int) -> bool:
    """Whether bin ``i`` has finite edges and a positive count."""
    finite = np.isfinite(edges[i]) and np.isfinite(edges[i + 1]) and np.isfinite(counts[i])
    return bool(finite and counts[i] > 0)


def _bin(left: float, right: float, count: float, xs: Scale, ys: Scale, style: str) -> str:
    base = ys.start if ys.log else ys(0.0)
    return _rect(xs(left), ys(count), xs(right) - xs(left), base - ys(count), style)


def histogram(
    edges: Values,
    counts: Values,
    *,
    title: str,
    x_label: str = "",
    y_label: str = "count",
    log_y: bool = False,
    vlines: Values = (),
    vline_label: str = "",
    color: str = COLORS[1],
    width: int = WIDTH,
    height: int = HEIGHT,
) -> str:
    """Filled bins from their edges and counts, with optional dashed vertical lines.

    Parameters
    ----------
    edges
        Bin edges, one more than the counts (extra entries on either side are ignored).
    counts
        Count per bin; bins with a zero, negative or missing count draw nothing.
    title
        The chart's accessible name (its ``<title>`` element); not drawn.
    x_label, y_label
        Axis labels; empty for none.
    log_y
        Log10 count axis with decade ticks.
    vlines
        x positions of dashed vertical lines (e.g. flag limits).
    vline_label
        Legend entry for the dashed lines; no legend when empty.
    color
        Fill of the bins.
    width, height
        Size in pixels (the chart scales through its ``viewBox``).

    Returns
    -------
    str
        The ``<svg>`` element.
    """
    x, y, at = floats(edges), floats(counts), floats(vlines)
    n = max(min(x.size - 1, y.size), 0)
    legend = [Legend(vline_label, "#000", ("dash",))] if vline_label else []
    box = _layout(width, height, legend)
    xs = make_scale(np.concatenate([x[: n + 1], at]), box.left, box.right, margin=0.0)
    ys = make_scale(y[:n], box.bottom, box.top, log=log_y, zero=not log_y)
    style = f'class="mark" fill="{color}"'
    rects = [_bin(x[i], x[i + 1], y[i], xs, ys, style) for i in range(n) if _drawable(x, y, i)]
    dashed = 'class="vline" stroke="#000" stroke-width="1" stroke-dasharray="5 3"'
    lines = [_line(xs(v), box.top, xs(v), box.bottom, dashed) for v in at if np.isfinite(v)]
    body = [*_value_axis(ys, box, True), *_value_axis(xs, box, False)]
    body += [f'<g class="series" shape-rendering="crispEdges">{"".join(rects)}</g>', *lines]
    return _svg(
        title, width, height, [*body, *_frame(box, x_label, y_label), *_legend(legend, box)]
    )
