"""The HTML and JSON reports of `run` and `compare`: the answer first, labelled plots that
show every value, and matplotlib kept out of the caller's process state.

Structure is checked with Python's HTML parser and each inline svg with ElementTree; what
each plot's axes show comes from :func:`rowfold.report.plots`. The page in a real browser
is checked in ``test_browser.py``.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest

from rowfold import report as reporting
from rowfold.cli import main
from rowfold.report import CAUTION, with_error

import bounds
from support import prescribed, write_job

SVG_NS = "http://www.w3.org/2000/svg"  # the SVG namespace (W3C SVG 1.1 and SVG 2)
S = f"{{{SVG_NS}}}"
VOID = {"meta", "br", "img", "hr", "link", "input"}  # HTML elements without an end tag
NAMES = ["offset", "slope", "drift", "tilt", "scale"]


class Page(HTMLParser):
    """Collects text, h2 headings in order, table rows by class, figure captions, and
    checks that tags balance (svg children such as ``<path .../>`` open nothing)."""

    def __init__(self) -> None:
        super().__init__()
        self.text: list[str] = []
        self.open: list[str] = []
        self.headings: list[str] = []
        self.captions: list[str] = []
        self.parameter_rows: list[list[str]] = []
        self._table = ""
        self._cells: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        assert tag != "img", "plots are inline svg, not images"
        if tag == "h2":
            self.headings.append("")
        if tag == "figcaption":
            self.captions.append("")
        if tag == "table":
            self._table = dict(attrs).get("class") or ""
        if tag == "tr" and self._table == "parameters":
            self._cells = []
        if tag == "td" and self._cells is not None:
            self._cells.append("")
        if tag not in VOID:
            self.open.append(tag)

    def handle_endtag(self, tag: str) -> None:
        assert self.open and self.open[-1] == tag, f"unbalanced </{tag}>"
        self.open.pop()
        if tag == "tr" and self._cells:
            self.parameter_rows.append(self._cells)
        if tag in ("tr", "table"):
            self._cells = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if "h2" in self.open:
            self.headings[-1] += data
        if "figcaption" in self.open:
            self.captions[-1] += data
        if self._cells is not None and self.open and self.open[-1] in ("td", "b"):
            self._cells[-1] += data


def parse(path: Path) -> tuple[Page, list[ET.Element]]:
    """The page and its svg elements, each parsed as XML with its figcaption as title."""
    text = path.read_text(encoding="utf-8")
    page = Page()
    page.feed(text)
    page.close()
    assert page.open == [], page.open
    svgs = [ET.fromstring(chunk) for chunk in re.findall(r"<svg\b.*?</svg>", text, re.DOTALL)]
    assert len(svgs) == len(page.captions)
    for svg, caption in zip(svgs, page.captions, strict=True):
        assert svg.tag == f"{S}svg"
        box = [float(v) for v in svg.attrib["viewBox"].split()]
        assert box[:2] == [0, 0] and box[2] > 0 and box[3] > 0
        title = svg.find(f"{S}title")
        assert title is not None and title.text == caption  # accessible name = the caption
    return page, svgs


def texts(svg: ET.Element) -> str:
    """All text drawn in an svg (matplotlib writes text as text: svg.fonttype none)."""
    return " ".join("".join(t.itertext()) for t in svg.iter(f"{S}text"))


def levelling_job(folder: Path, outlier: float = 0.0) -> tuple[Path, np.ndarray, np.ndarray]:
    """A small weighted problem with named columns, column 0 held fixed, residuals screened
    and refined; ``outlier`` (in units of the noise) is added to row 700."""
    rng = np.random.default_rng(51)
    A = prescribed(1500, 5, 1e3, seed=51)
    noise = 0.01
    b = A @ np.arange(1.0, 6.0) + noise * rng.standard_normal(1500)
    b[700] += outlier * noise
    job = write_job(
        folder,
        A,
        b,
        input={"parameter_names": NAMES, "fixed_columns": [0], "rows_per_block": 400},
        solve={"residuals": True, "refine": True},
        gates={"gram": 1e-10},
    )
    return job, A, b


def test_report_shows_the_answer_first_with_names_datum_refinement_and_inputs(
    job_folder: Path,
) -> None:
    job, _, _ = levelling_job(job_folder)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    page, svgs = parse(job_folder / "out.report.html")
    assert page.headings == [
        "Answer",
        "Refinement",
        "Inputs",
        "Quality",
        "Model test",
        "Residual screening",
        "Conditioning",
        "Run",
    ]
    with h5py.File(job_folder / "out.h5", "r") as store:
        x, stderr = store["x"][...], store["x_stderr"][...]
    # JSON: one entry per input column, named, with the stored x and standard error
    assert [p["name"] for p in report["parameters"]] == NAMES
    assert [p["x"] for p in report["parameters"]] == [float(v) for v in x]
    assert [p["stderr"] for p in report["parameters"]] == [float(v) for v in stderr]
    assert [p["fixed"] for p in report["parameters"]] == [True, False, False, False, False]
    assert report["datum"]["fixed_columns"] == [0] and report["datum"]["names"] == ["offset"]
    assert list(report)[:9] == [
        "rowfold_version",
        "name",
        "job_file",
        "exit_status",
        "gates_status",
        "parameters",
        "datum",
        "refinement",
        "inputs",
    ]
    # HTML: the same table, x rounded to two digits of its standard error
    assert [row[1] for row in page.parameter_rows] == NAMES
    for row, value, error in zip(page.parameter_rows[1:], x[1:], stderr[1:], strict=True):
        assert row[2:] == list(with_error(float(value), float(error)))
        assert abs(float(row[2]) - value) <= error  # rounding moves x by far less than 1 s.e.
    assert "held fixed (datum)" in page.parameter_rows[0][3]
    text = " ".join(page.text)
    assert "offset held fixed at 0" in text
    assert str(job_folder / "input.h5") in text  # the input's path
    assert "corrections in" in text  # the refinement history
    assert re.search(r"\d+\.\d MiB \([\d,]+ bytes\)", text)  # peak memory in binary units
    assert "constant from memory" not in text
    assert CAUTION in text and report["caution"] == CAUTION
    assert page.captions == [
        "Parameters with their standard errors",
        "Iterative refinement",
        "Standardized residuals",
        "Spectrum of R",
    ]
    assert all(name in texts(svgs[0]) for name in NAMES)  # names under the axis


def test_every_plot_has_labelled_axes_and_log_axes_bracket_their_values(
    job_folder: Path,
) -> None:
    job, _, _ = levelling_job(job_folder)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    drawn = reporting.plots(report)
    assert set(drawn) == {"answer", "refinement", "screening", "conditioning"}
    for plot in drawn.values():
        for axes in plot.axes:
            assert axes.ylabel, (plot.title, axes.title)
            assert axes.xlabel or axes.shares_x, (plot.title, axes.title)
            assert axes.ylabel in texts(ET.fromstring(plot.svg))
    (spectrum,) = drawn["conditioning"].axes
    sigma = np.array(report["r_singular_values"])
    values = np.concatenate([sigma, np.abs(report["r_diagonal"])])
    # a labelled decade at or below the smallest value and at or above the largest
    assert spectrum.yscale == "log"
    assert min(spectrum.yticks) <= values.min() and max(spectrum.yticks) >= values.max()
    assert spectrum.ylim[0] <= values.min() and spectrum.ylim[1] >= values.max()
    (refine,) = drawn["refinement"].axes
    corrections = np.array(report["refinement"]["corrections"])
    positive = corrections[corrections > 0]
    assert min(refine.yticks) <= positive.min() and max(refine.yticks) >= positive.max()


def test_a_gross_outlier_is_counted_apart_not_folded_into_the_edge_bin(
    job_folder: Path,
) -> None:
    """A 100-sigma error lies beyond the histogram's range: the edge bins keep only values
    inside it, the outlier is counted in ``above`` (``below`` for a negative one), the plot
    says so, and the other residual plots draw it on their edge."""
    job, _, _ = levelling_job(job_folder, outlier=100.0)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    screening = report["residual_screening"]
    hist = screening["histogram"]
    edges, counts = np.array(hist["edges"]), np.array(hist["counts"])
    z = np.abs(screening["worst"][0]["standardized"])
    assert screening["worst"][0]["row"] == 700 and z > edges[-1]
    assert hist["above"] + hist["below"] == 1 and hist["largest"] == pytest.approx(z)
    assert counts.sum() + hist["below"] + hist["above"] == 1500  # every row counted once
    assert counts[-1] == 0 and counts[0] == 0  # nothing else that far out (N(0,1) noise)
    drawn = reporting.plots(report)
    notes = [note for axes in drawn["screening"].axes for note in axes.notes]
    assert any("1 above +6" in note or "1 below -6" in note for note in notes)
    assert any("against row: 1 beyond" in note for note in notes)
    page, _ = parse(job_folder / "out.report.html")
    assert any("not in the bars" in t for t in page.text)


def test_plot_summaries_are_bounded_and_match_the_stored_rows(job_folder: Path) -> None:
    job, _, _ = levelling_job(job_folder)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    with h5py.File(job_folder / "out.h5", "r") as store:
        z = store["standardized_residuals"][...]
        h = store["leverage"][...]
    data = report["plots_data"]
    bins = data["row_bins"]
    assert len(bins["starts"]) == 1500 // 50  # at least 50 rows a bin (summaries.py)
    assert bins["starts"][0] == 0 and bins["stops"][-1] == 1500
    for start, stop, low, high, median in zip(
        bins["starts"], bins["stops"], bins["min"], bins["max"], bins["median"], strict=True
    ):
        assert low == np.min(z[start:stop]) and high == np.max(z[start:stop])
        # read from a histogram of 1/16 sigma bins: within one bin of the values that
        # split the bin's rows in halves
        values, step = np.sort(z[start:stop]), bins["median_resolution"]
        lower, upper = values[(values.size - 1) // 2], values[values.size // 2]
        assert lower - step <= median <= upper + step
    sample = data["sample"]
    assert sample["size"] == 500 and sample["population"] == 1500
    assert sample["seed"] == 16 and sample["rows"] == sorted(set(sample["rows"]))
    rows = np.array(sample["rows"])
    assert np.array_equal(np.array(sample["standardized"]), z[rows])
    assert np.array_equal(np.array(sample["leverage"]), h[rows])
    top = [t["row"] for t in data["high_leverage"]]
    assert top == list(np.argsort(h)[::-1][: len(top)])


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
    text = (job_folder / "out.compare.html").read_text(encoding="utf-8")
    svgs = [ET.fromstring(chunk) for chunk in re.findall(r"<svg\b.*?</svg>", text, re.DOTALL)]
    assert len(svgs) == 3  # time per method, loss of orthogonality, diag(R)
    from rowfold import compare

    drawn = compare.plots(data["methods"])
    ran = [name for name in methods if by_name[name]["status"] != "refused"]
    (loo,) = drawn[1].axes
    measured = [by_name[n]["orthogonality_loss"] for n in ran]
    limits = [by_name[n]["orthogonality_bound"] for n in ran]
    assert loo.yscale == "log"  # points, not bars standing on an arbitrary floor
    assert loo.ylim[0] <= min(measured) and loo.ylim[1] >= max(limits)
    assert all(name in texts(svgs[1]) for name in ran)
    assert (job_folder / "out.compare" / "tsqr.h5").exists()


def test_compare_refuses_unknown_methods(
    job_folder: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = write_job(job_folder, prescribed(100, 3, 10.0))
    assert main(["compare", str(job), "--methods", "tsqr,qr", "--inline"]) == 2
    assert "unknown method qr" in capsys.readouterr().err


def test_drawing_leaves_matplotlib_state_of_the_caller_alone(job_folder: Path) -> None:
    """rcParams and the backend are as before, and pyplot is never imported."""
    import matplotlib

    job, _, _ = levelling_job(job_folder)
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    before = dict(matplotlib.rcParams)
    backend = matplotlib.get_backend()
    with matplotlib.rc_context({"font.size": 17.0}):
        reporting.render_html(report)
        assert matplotlib.rcParams["font.size"] == 17.0  # the caller's own context holds
    after = dict(matplotlib.rcParams)
    assert {k for k in before if before[k] != after[k]} == set()
    assert matplotlib.get_backend() == backend


def test_matplotlib_is_imported_only_when_a_report_is_drawn() -> None:
    code = (
        "import sys, rowfold.cli, rowfold.runner, rowfold.report, rowfold.compare;"
        "print(sorted(m for m in sys.modules if m.split('.')[0] == 'matplotlib'))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_pyplot_is_never_imported_by_drawing(job_folder: Path) -> None:
    job, _, _ = levelling_job(job_folder)
    code = (
        "import sys; from rowfold.cli import main;"
        f"status = main(['--quiet', 'run', {str(job)!r}, '--inline']);"
        "print(status, 'matplotlib.figure' in sys.modules, 'matplotlib.pyplot' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.splitlines()[-1].split() == ["0", "True", "False"]


@pytest.mark.parametrize(
    ("x", "se", "expected"),
    [
        (1.23456789, 0.00123, ("1.2346", "0.0012")),  # two digits of the error
        (4.0012, 0.001, ("4.0012", "0.0010")),  # trailing zero kept: 2 significant digits
        (123456.7, 25.0, ("123457", "25")),
        (-0.5, 0.0, ("-0.5", "0")),  # a fixed parameter
        (2.5, None, ("2.5", "&mdash;")),
    ],
)
def test_x_is_rounded_to_its_standard_error(
    x: float, se: float | None, expected: tuple[str, str]
) -> None:
    assert with_error(x, se) == expected


def test_report_without_rhs_says_there_is_no_solution(job_folder: Path) -> None:
    job = write_job(job_folder, prescribed(300, 4, 10.0, seed=53))
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report: dict[str, Any] = json.loads((job_folder / "out.report.json").read_text())
    assert report["parameters"] is None
    page, _ = parse(job_folder / "out.report.html")
    text = " ".join(page.text)
    assert "no solution x" in text
    assert page.captions == ["Spectrum of R"]
    assert report["model_test"]["evaluated"] is False
    assert "Not evaluated: no right-hand side" in text


def test_model_test_section_shows_the_global_test_redundancy_and_observation_test(
    job_folder: Path,
) -> None:
    """A 100-sigma blunder with sigma0 the noise level: the page's Model test section gives
    the global test with its chi-square bounds and FAILED (so the model_test gate fails,
    exit 3, shown as p-value >= alpha), the redundancy total against f, and the
    per-observation test with its critical value and the blunder's row first."""
    job, _, _ = levelling_job(job_folder, outlier=100.0)
    args = ["--quiet", "run", str(job), "--inline", "--set", "solve.sigma0=0.01"]
    assert main([*args, "--set", "gates.model_test=true"]) == 3
    report = json.loads((job_folder / "out.report.json").read_text())
    page, _ = parse(job_folder / "out.report.html")
    text = " ".join(page.text)
    model, test = report["model_test"], report["observation_test"]
    assert "Model test" in page.headings
    assert model["passed"] is False and "Global test of the model" in text
    assert f"{model['lower']:.4g} to {model['upper']:.4g}" in text
    assert f"{report['redundancy']['degrees_of_freedom']:,}" in text
    assert f"critical value {test['critical_value']:.4g}" in text
    assert test["worst"][0]["row"] == 700 and "exceeds" in text
    gate = report["gates"]["model_test"]
    assert gate["held"] is False and f"\u2265 {gate['limit']:.4g}" in text


@pytest.mark.parametrize("suffix", [".h5", ".zarr"])
def test_parameter_names_from_a_dataset_of_text(job_folder: Path, suffix: str) -> None:
    """``input.parameter_names`` may name a 1-D text dataset (HDF5 or Zarr) in the input."""
    from rowfold.storage import write_arrays

    A = prescribed(200, 3, 10.0, seed=54)
    names = np.array(["north", "east", "höhe"])  # any UTF-8 text
    write_arrays(job_folder / f"in{suffix}", {"A": A, "b": A[:, 0], "names": names})
    job = job_folder / "job.yaml"
    job.write_text(
        f"input: {{path: in{suffix}, matrix: A, rhs: b, parameter_names: names}}\n"
        "output: {path: out.h5, overwrite: true}\n",
        encoding="utf-8",
    )
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    report = json.loads((job_folder / "out.report.json").read_text())
    assert [p["name"] for p in report["parameters"]] == list(names)
    default = job_folder / "default.yaml"
    default.write_text(
        f"input: {{path: in{suffix}, matrix: A, rhs: b}}\noutput: {{path: d.h5}}\n",
        encoding="utf-8",
    )
    assert main(["--quiet", "run", str(default), "--inline"]) == 0
    plain = json.loads((job_folder / "d.report.json").read_text())
    assert [p["name"] for p in plain["parameters"]] == ["x0", "x1", "x2"]
