"""The demo's HTML reports in a real headless browser (Debian's chromium): they load from
file:// without a console error, an uncaught exception or a failed load, every plot is laid
out at a readable size, nothing overflows the page sideways, and a full-page screenshot is
taken (kept in the test's tmp path, for a person to look at).

Skipped when chromium is not installed; ``.ci/run`` installs it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from rowfold import demo, runner
from rowfold.spec import load_job

import headless

CHROMIUM = headless.chromium()
pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed (apt-get install chromium; .ci/run installs it)",
)

FACTS = """(() => {
  const plots = [...document.querySelectorAll('svg.plot')].map((svg) => {
    const box = svg.getBoundingClientRect();
    return [svg.querySelector('title').textContent, box.width, box.height];
  });
  return {
    title: document.title,
    headings: [...document.querySelectorAll('h2')].map((h) => h.textContent),
    plots: plots,
    parameterRows: document.querySelectorAll('table.parameters tr').length,
    sideways: document.documentElement.scrollWidth > window.innerWidth,
  };
})()"""
WIDTH = 1200  # CSS pixels of the window


@pytest.fixture
def browser(tmp_path: Path) -> Any:
    assert CHROMIUM is not None
    client = headless.Browser(CHROMIUM, tmp_path / "profile")
    yield client
    client.close()


def demo_reports(folder: Path) -> dict[str, Path]:
    """The demo's jobs run in-line on a smaller scenario; their HTML reports by job name."""
    pages = {}
    for job_path in demo.write_scenario(folder, rows=6000):
        outcome = runner.run_job(load_job(job_path), inline=True)
        assert outcome.status == 0
        pages[job_path.stem] = outcome.output.with_name(
            outcome.output.with_suffix("").name + ".report.html"
        )
    return pages


def test_demo_reports_render_without_errors_in_chromium(tmp_path: Path, browser: Any) -> None:
    pages = demo_reports(tmp_path / "demo")
    expected_plots = {
        "zero_points_tsqr": 4,  # parameters, refinement, residuals, spectrum
        "zero_points_cholqr2": 2,  # parameters, spectrum
        "levelling_cholqr2": 2,
        "zero_points_nightly": 2,  # parameters, spectrum
    }
    columns = {
        "zero_points_tsqr": 40,
        "zero_points_cholqr2": 40,
        "levelling_cholqr2": 240,
        "zero_points_nightly": 40,
    }
    for name, page in pages.items():
        shot = tmp_path / f"{name}.png"
        result = browser.load(page.as_uri(), shot, FACTS, width=WIDTH)
        assert result.errors == [], (name, result.errors)
        facts = result.facts
        assert facts["title"].startswith("rowfold report: ")
        assert facts["headings"][0] == "Answer"
        assert len(facts["plots"]) == expected_plots[name], facts["plots"]
        for title, width, height in facts["plots"]:
            assert title and width >= 600 and height >= 150, (name, title, width, height)
        assert facts["parameterRows"] == columns[name] + 1  # a header and a row per column
        assert facts["sideways"] is False
        png = shot.read_bytes()
        assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec, section 5.2)
        height = int.from_bytes(png[20:24], "big")  # IHDR height
        assert height > 1500  # the whole page, not one window


def test_the_checker_sees_errors_on_a_broken_page(tmp_path: Path, browser: Any) -> None:
    """A page with a console error, an uncaught exception and a missing image: all three
    are reported, so a clean result above means a clean page."""
    page = tmp_path / "broken.html"
    page.write_text(
        "<!DOCTYPE html><html><head><title>t</title></head><body>"
        "<img src='missing.png'><script>console.error('boom'); undefinedCall();</script>"
        "</body></html>",
        encoding="utf-8",
    )
    result = browser.load(page.as_uri(), tmp_path / "broken.png", "document.title")
    assert result.facts == "t"
    assert any("boom" in e for e in result.errors)
    assert any(e.startswith("exception") for e in result.errors)
    assert any(e.startswith("log") for e in result.errors), result.errors


def test_a_windowed_nightly_report_renders_its_segments(tmp_path: Path, browser: Any) -> None:
    """After the nightly demo's last step (an update whose window retired the first night),
    the page loads cleanly and shows what the answer covers in its Segments section."""
    from rowfold import demo, runner

    folder = tmp_path / "demo"
    demo.write_scenario(folder, rows=6000)
    *_, last = runner.run_nights(folder / "zero_points_nightly.yaml", demo.night_rows(6000))
    assert last.status == 0
    page = last.output.with_name(last.output.with_suffix("").name + ".report.html")
    result = browser.load(page.as_uri(), tmp_path / "nightly.png", FACTS, width=WIDTH)
    assert result.errors == [], result.errors
    assert "Segments" in result.facts["headings"]
    assert result.facts["sideways"] is False
    assert "2026-11-28" in page.read_text(encoding="utf-8")  # the retired night is named
