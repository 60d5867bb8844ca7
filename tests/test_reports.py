"""The HTML and JSON reports of `run` and `compare`: present, consistent, and with inline
SVG plots that are well-formed (validated with Python's HTML parser and ElementTree)."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from rowfold.cli import main
from rowfold.report import CAUTION

import bounds
from support import prescribed, write_job

SVG_NS = "http://www.w3.org/2000/svg"  # the SVG namespace (W3C SVG 1.1 and SVG 2)
S = f"{{{SVG_NS}}}"
VOID = {"meta", "br", "img", "hr", "link", "input"}  # HTML elements without an end tag


class Page(HTMLParser):
    """Collects the text, each svg's preceding h2 title, and checks that tags balance.

    HTMLParser lowercases tag names, and self-closing svg children (``<circle .../>``)
    arrive through handle_startendtag, which opens nothing.
    """

    def __init__(self) -> None:
        super().__init__()
        self.text: list[str] = []
        self.open: list[str] = []
        self.headings: list[str] = []
        self.svg_titles: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        assert tag != "img", "plots are inline svg, not images"
        if tag == "svg":
            self.svg_titles.append(self.headings[-1] if self.headings else "")
        if tag == "h2":
            self.headings.append("")
        if tag not in VOID:
            self.open.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        assert tag not in ("svg", "h2"), f"<{tag}/> cannot be self-closing here"

    def handle_endtag(self, tag: str) -> None:
        assert self.open and self.open[-1] == tag, f"unbalanced </{tag}>"
        self.open.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self.open and self.open[-1] == "h2":
            self.headings[-1] += data


def parse(path: Path) -> tuple[Page, list[ET.Element]]:
    """The page and its svg elements, each parsed as XML under its h2 title."""
    text = path.read_text(encoding="utf-8")
    page = Page()
    page.feed(text)
    page.close()
    assert page.open == [], page.open
    svgs = [ET.fromstring(chunk) for chunk in re.findall(r"<svg\b.*?</svg>", text, re.DOTALL)]
    assert len(svgs) == len(page.svg_titles)
    for svg, heading in zip(svgs, page.svg_titles, strict=True):
        assert svg.tag == f"{S}svg"
        width, height = float(svg.attrib["width"]), float(svg.attrib["height"])
        assert width > 0 and height > 0
        assert [float(v) for v in svg.attrib["viewBox"].split()] == [0, 0, width, height]
        title = svg.find(f"{S}title")
        assert title is not None and title.text == heading  # accessible name = the h2 title
    return page, svgs


def marks(element: ET.Element) -> list[ET.Element]:
    """The drawn data marks inside an element."""
    return [e for e in element.iter() if e.get("class") == "mark"]


def series(svg: ET.Element) -> list[ET.Element]:
    return [g for g in svg.iter(f"{S}g") if g.get("class") == "series"]


def frame(svg: ET.Element) -> tuple[float, float, float, float]:
    """left, top, right, bottom of the plot box."""
    box = next(r for r in svg.iter(f"{S}rect") if r.get("class") == "frame")
    x, y = float(box.attrib["x"]), float(box.attrib["y"])
    return x, y, x + float(box.attrib["width"]), y + float(box.attrib["height"])


def check_spectrum(svg: ET.Element, report: dict[str, Any]) -> None:
    """One point per column in each series, inside the plot box, falling as sigma falls."""
    sigma, diag = series(svg)
    n = report["cols"]
    assert [len(marks(sigma)), len(marks(diag))] == [n, n]
    left, top, right, bottom = frame(svg)
    ys = []
    for mark in marks(sigma):
        x, y = float(mark.attrib["cx"]), float(mark.attrib["cy"])
        assert left <= x <= right and top <= y <= bottom
        ys.append(y)
    # singular values come in non-increasing order (scipy.linalg.svdvals), so on a log axis
    # drawn upwards their points move down the page; these five are distinct (condition 1e3).
    assert ys == sorted(ys) and len(set(ys)) == n


def check_orthogonality_bars(svg: ET.Element, count: int) -> None:
    """A bar and a bound tick per method; each measured bar ends below its bound tick."""
    bars = marks(svg)
    ticks = [e for e in svg.iter(f"{S}line") if e.get("class") == "bound"]
    assert len(bars) == len(ticks) == count
    for bar, tick in zip(bars, ticks, strict=True):
        assert float(bar.attrib["y"]) >= float(tick.attrib["y1"])  # loss <= bound (larger y)


def test_run_report_html_renders_with_its_plots(job_folder: Path) -> None:
    rng = np.random.default_rng(51)
    A = prescribed(400, 5, 1e3, seed=51)
    b = A @ np.ones(5) + 0.01 * rng.standard_normal(400)
    job = write_job(job_folder, A, b, solve={"residuals": True}, gates={"gram": 1e-10})
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    page, svgs = parse(job_folder / "out.report.html")
    assert len(svgs) == 3  # spectrum of R, time per stage, residual histogram
    report = json.loads((job_folder / "out.report.json").read_text())
    check_spectrum(svgs[0], report)
    bars = marks(svgs[1])
    assert len(bars) == len(report["seconds"])  # one bar per timed stage
    counts = report["residual_screening"]["histogram"]["counts"]
    assert len(marks(svgs[2])) == sum(1 for c in counts if c > 0)  # one bar per nonzero bin
    assert len([e for e in svgs[2].iter() if e.get("class") == "vline"]) == 2  # +-flag_above
    text = " ".join(page.text)
    assert CAUTION in text
    assert "gram" in text and "held" in text
    assert report["caution"] == CAUTION
    assert sum(report["residual_screening"]["histogram"]["counts"]) == 400


def test_compare_table_json_and_html_agree(
    job_folder: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    A = prescribed(600, 8, 1e10, seed=52)
    job = write_job(job_folder, A, A[:, 0], input={"rows_per_block": 100})
    status = main(
        ["--quiet", "compare", str(job), "--methods", "tsqr,cholqr2,scholqr3,auto", "--inline"]
    )
    assert status == 0
    out = capsys.readouterr().out
    data = json.loads((job_folder / "out.compare.json").read_text())
    methods = [row["method"] for row in data["methods"]]
    assert methods == ["tsqr", "cholqr2", "scholqr3", "auto"]
    for row in data["methods"]:
        assert row["method"] in out
    by_name = {row["method"]: row for row in data["methods"]}
    assert by_name["cholqr2"]["status"] == "refused"  # condition 1e10 > 1e8 (ETNA 44, 2015)
    assert "tsqr" in by_name["cholqr2"]["message"]
    for name in ("tsqr", "scholqr3", "auto"):
        row = by_name[name]
        assert row["status"] == "ok"
        assert row["orthogonality_loss"] <= row["orthogonality_bound"]
        # ||R - R_tsqr||_F / ||R_tsqr||_F, two backward-stable R: the R-factor bound
        # (||R||_F >= ||A||_2 for this A, so the relative figure is at most the bound's).
        assert row["r_difference"] <= bounds.r_factor(8, 1e10)
    assert by_name["auto"]["method_used"] == "scholqr3"
    _, svgs = parse(job_folder / "out.compare.html")
    assert len(svgs) == 3  # time per method, loss of orthogonality, diag(R)
    ran = [name for name in methods if by_name[name]["status"] != "refused"]
    assert len(marks(svgs[0])) == len(ran)  # one time bar per method that ran
    check_orthogonality_bars(svgs[1], len(ran))
    lines = series(svgs[2])
    assert [g.get("data-name") for g in lines] == ran
    assert all(len(marks(g)) == 8 for g in lines)  # one point per column of R
    assert (job_folder / "out.compare" / "tsqr.h5").exists()


def test_compare_refuses_unknown_methods(
    job_folder: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = write_job(job_folder, prescribed(100, 3, 10.0))
    assert main(["compare", str(job), "--methods", "tsqr,qr", "--inline"]) == 2
    assert "unknown method qr" in capsys.readouterr().err
