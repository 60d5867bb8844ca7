"""The SVG chart writer: scales, ticks, marks inside the plot box, and awkward input.

References: the SVG namespace and the viewBox attribute are those of W3C SVG 1.1 / SVG 2;
on a log10 axis the decades 10^k are equally spaced (log10(10^(k+1)) - log10(10^k) = 1).
"""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from itertools import pairwise

import numpy as np
import pytest

from rowfold import svgplot
from rowfold.svgplot import Series, bar_chart, histogram, line_chart, make_scale

S = "{http://www.w3.org/2000/svg}"
NAN = float("nan")


def parse(svg: str) -> ET.Element:
    """The chart as XML, checked for the SVG namespace, a size, a viewBox and finite numbers."""
    root = ET.fromstring(svg)
    assert root.tag == f"{S}svg"
    width, height = float(root.attrib["width"]), float(root.attrib["height"])
    assert width > 0 and height > 0
    assert [float(v) for v in root.attrib["viewBox"].split()] == [0, 0, width, height]
    assert not re.search(r'="[^"]*\b(nan|inf)\b', svg, re.IGNORECASE), "non-finite coordinate"
    return root


def marks(root: ET.Element) -> list[ET.Element]:
    return [e for e in root.iter() if e.get("class") == "mark"]


def plot_box(root: ET.Element) -> svgplot.Box:
    rect = next(r for r in root.iter(f"{S}rect") if r.get("class") == "frame")
    x, y = float(rect.attrib["x"]), float(rect.attrib["y"])
    return svgplot.Box(x, y, x + float(rect.attrib["width"]), y + float(rect.attrib["height"]))


def centre(mark: ET.Element) -> tuple[float, float]:
    if mark.tag == f"{S}circle":
        return float(mark.attrib["cx"]), float(mark.attrib["cy"])
    x, y = float(mark.attrib["x"]), float(mark.attrib["y"])
    return x + float(mark.attrib["width"]) / 2, y + float(mark.attrib["height"]) / 2


@pytest.mark.parametrize(
    "data",
    [
        [3e-7, 0.2, 40.0],  # several decades
        [2.0, 5.0, 8.0],  # inside one decade: widened to the decades around it
        [5.0, 5.0, 5.0],  # all equal
        [1e-300, 1.0],  # 300 decades: ticks thinned to every n-th decade
        [7e-12],  # a single value
    ],
)
def test_log_ticks_are_decades_equally_spaced_and_monotone(data: list[float]) -> None:
    scale = make_scale(data, 280.0, 20.0, log=True)  # a y axis: larger values higher up
    ticks = scale.ticks()
    assert len(ticks) >= 2
    exponents = [math.log10(float(label)) for _, label in ticks]
    assert all(abs(k - round(k)) < 1e-9 for k in exponents)  # every tick a power of ten
    pixels = [pixel for pixel, _ in ticks]
    assert all(a > b for a, b in pairwise(pixels))  # monotone upwards
    gaps = np.diff(pixels) / np.diff(exponents)
    assert np.allclose(gaps, gaps[0], rtol=1e-9)  # decades equally spaced
    for value in data:  # each value sits between the ticks of the decades around it
        k = math.floor(math.log10(value))
        around = [p for p, e in zip(pixels, exponents, strict=True) if round(e) in (k, k + 1)]
        if len(around) == 2:
            assert around[0] >= scale(value) >= around[1]
        assert 20.0 < scale(value) < 280.0  # inside the axis, not clamped to an end


@pytest.mark.parametrize(
    ("data", "zero"),
    [([0.3, 0.7, 2.9], False), ([1.0, 1.0], False), ([-5.0, 12.5], True), ([], False)],
)
def test_linear_scale_is_affine_with_round_ticks(data: list[float], zero: bool) -> None:
    scale = make_scale(data, 40.0, 640.0, zero=zero)
    ticks = scale.ticks()
    values = [float(label) for _, label in ticks]
    assert len(ticks) >= 2
    steps = np.diff(values)
    assert np.allclose(steps, steps[0])
    mantissa = steps[0] / 10 ** math.floor(math.log10(steps[0]))
    assert min(abs(mantissa - m) for m in (1, 2, 5, 10)) < 1e-9  # 1, 2 or 5 times 10^k
    for (pixel, _), value in zip(ticks, values, strict=True):
        assert scale(value) == pytest.approx(pixel)
    if len(data) == 2 and data[0] != data[1]:  # pixels are affine in the value
        mid = scale((data[0] + data[1]) / 2)
        assert mid == pytest.approx((scale(data[0]) + scale(data[1])) / 2)
    if zero:
        assert scale.lo <= 0 <= scale.hi


def test_line_chart_puts_one_mark_per_point_inside_the_plot_box() -> None:
    sigma = np.geomspace(1.0, 1e-9, 12)
    series = [Series("sigma", sigma), Series("diag", sigma * 1.5, line=False, marker="square")]
    root = parse(line_chart(series, title="Spectrum", x_label="index", log_y=True))
    groups = [g for g in root.iter(f"{S}g") if g.get("class") == "series"]
    assert [len(marks(g)) for g in groups] == [12, 12]
    box = plot_box(root)
    centres = [centre(m) for m in marks(groups[0])]
    assert all(box.contains(x, y) for x, y in centres)
    xs, ys = zip(*centres, strict=True)
    assert list(xs) == sorted(xs) and list(ys) == sorted(ys)  # right along, down the page
    gaps = np.diff(ys)  # a geometric sequence is a straight line on a log axis
    assert np.allclose(gaps, gaps[0], atol=0.15)


def test_zeros_and_negatives_on_a_log_axis_are_clipped_not_fatal() -> None:
    root = parse(line_chart([Series("s", [1.0, 0.0, 1e-3, -2.0])], title="t", log_y=True))
    points = [centre(m) for m in marks(root)]
    assert len(points) == 4
    assert points[1][1] == points[2][1] == points[3][1]  # raised to the smallest positive
    assert all(plot_box(root).contains(x, y) for x, y in points)
    only_zeros = parse(line_chart([Series("s", [0.0, 0.0])], title="t", log_y=True))
    assert len(marks(only_zeros)) == 2
    bars = parse(bar_chart(["a", "b"], [0.0, 1e-15], title="t", log_y=True, ticks=[1e-13, 0]))
    assert len(marks(bars)) == 2
    assert marks(parse(histogram([0, 1, 2], [0, 0], title="t", log_y=True))) == []


def test_missing_values_are_skipped_and_break_the_line() -> None:
    root = parse(line_chart([Series("s", [1.0, None, NAN, 4.0, float("inf"), 5.0])], title="t"))
    assert len(marks(root)) == 3
    path = next(root.iter(f"{S}path")).attrib["d"]
    assert path.count("M") == 3 and path.count("L") == 0  # no point joins a missing one


@pytest.mark.parametrize(
    "chart",
    [
        lambda: line_chart([], title="t"),
        lambda: line_chart([Series("s", [])], title="t", log_y=True),
        lambda: line_chart([Series("s", [2.5])], title="t"),
        lambda: line_chart([Series("s", [3.0, 3.0, 3.0])], title="t", log_y=True),
        lambda: line_chart([Series("s", [5e-324, 1e308])], title="t", log_y=True),
        lambda: bar_chart([], [], title="t"),
        lambda: bar_chart(["a"], [None], title="t", log_y=True, ticks=[None]),
        lambda: bar_chart(["a", "b"], [0.0, 0.0], title="t", horizontal=True),
        lambda: histogram([], [], title="t", log_y=True, vlines=[NAN]),
        lambda: histogram([0.0, 1.0, 2.0, 3.0], [4, 4], title="t", vlines=[9.0]),
    ],
)
def test_awkward_input_still_gives_well_formed_svg(chart: object) -> None:
    assert callable(chart)
    parse(chart())


def test_bars_are_proportional_and_carry_their_ticks() -> None:
    root = parse(bar_chart(["a", "b", "c"], [1.0, 2.0, 4.0], title="t", ticks=[1.5, None, 5]))
    heights = [float(m.attrib["height"]) for m in marks(root)]
    bottom = plot_box(root).bottom  # positive bars stand on the axis at zero
    assert all(
        float(m.attrib["y"]) + h == pytest.approx(bottom)
        for m, h in zip(marks(root), heights, strict=True)
    )
    assert heights[1] == pytest.approx(2 * heights[0], abs=0.2)  # linear axis from zero
    assert heights[2] == pytest.approx(4 * heights[0], abs=0.2)
    ticks = [e for e in root.iter(f"{S}line") if e.get("class") == "bound"]
    assert len(ticks) == 2
    flat = parse(bar_chart(["x", "y"], [3.0, 6.0], title="t", horizontal=True))
    widths = [float(m.attrib["width"]) for m in marks(flat)]
    assert widths[1] == pytest.approx(2 * widths[0], abs=0.2)


def test_histogram_draws_one_adjacent_bar_per_nonzero_bin_and_its_dashed_lines() -> None:
    edges, counts = [-2.0, -1.0, 0.0, 1.0, 2.0], [0, 3, 30, 300]
    root = parse(histogram(edges, counts, title="t", log_y=True, vlines=[-1.5, 1.5]))
    bars = marks(root)
    assert len(bars) == 3
    for left, right in pairwise(bars):
        end = float(left.attrib["x"]) + float(left.attrib["width"])
        assert end == pytest.approx(float(right.attrib["x"]), abs=0.11)
    heights = [float(b.attrib["height"]) for b in bars]  # 3, 30, 300: one decade apart
    bottom = plot_box(root).bottom  # on a log axis bars rise from the bottom of the box
    assert all(
        float(b.attrib["y"]) + h == pytest.approx(bottom)
        for b, h in zip(bars, heights, strict=True)
    )
    assert heights[2] - heights[1] == pytest.approx(heights[1] - heights[0], abs=0.2)
    dashed = [e for e in root.iter(f"{S}line") if e.get("class") == "vline"]
    assert len(dashed) == 2 and all(e.get("stroke-dasharray") for e in dashed)


def test_text_is_escaped() -> None:
    nasty = '<&>"'
    charts = [
        line_chart([Series(nasty, [1.0, 2.0])], title=nasty, x_label=nasty, y_label=nasty),
        bar_chart([nasty], [1.0], title=nasty, value_label=nasty, bar_label=nasty),
        histogram([0, 1], [1], title=nasty, x_label=nasty, vline_label=nasty, vlines=[0.5]),
    ]
    for svg in charts:
        root = parse(svg)
        title = root.find(f"{S}title")
        assert title is not None and title.text == nasty
        texts = [t.text for t in root.iter(f"{S}text")]
        assert nasty in texts
