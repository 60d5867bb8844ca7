"""The HTML and JSON reports of `run` and `compare`: present, consistent, and with images
that decode (validated with Python's HTML parser and matplotlib's PNG reader)."""

from __future__ import annotations

import base64
import io
import json
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest

from rowfold.cli import main
from rowfold.report import CAUTION

from support import prescribed, write_job

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


class Page(HTMLParser):
    """Collects the images, the text and checks that tags balance."""

    def __init__(self) -> None:
        super().__init__()
        self.images: list[bytes] = []
        self.text: list[str] = []
        self.open: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "img":
            src = dict(attrs).get("src") or ""
            assert src.startswith("data:image/png;base64,")
            self.images.append(base64.b64decode(src.split(",", 1)[1], validate=True))
        elif tag not in ("meta", "br"):
            self.open.append(tag)

    def handle_endtag(self, tag: str) -> None:
        assert self.open and self.open[-1] == tag, f"unbalanced </{tag}>"
        self.open.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(path: Path) -> Page:
    page = Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    assert page.open == [], page.open
    for image in page.images:
        assert image.startswith(PNG_MAGIC)
        pixels = matplotlib.image.imread(io.BytesIO(image), format="png")
        assert pixels.shape[0] > 50 and pixels.shape[1] > 50
    return page


def test_run_report_html_renders_with_its_images(job_folder: Path) -> None:
    rng = np.random.default_rng(51)
    A = prescribed(400, 5, 1e3, seed=51)
    b = A @ np.ones(5) + 0.01 * rng.standard_normal(400)
    job = write_job(job_folder, A, b, solve={"residuals": True}, gates={"gram": 1e-10})
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    page = parse(job_folder / "out.report.html")
    assert len(page.images) == 3  # spectrum of R, time per stage, residual histogram
    text = " ".join(page.text)
    assert CAUTION in text
    assert "gram" in text and "held" in text
    report = json.loads((job_folder / "out.report.json").read_text())
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
        assert row["r_difference"] <= 1e-5  # kappa u = 1e10 * 1.1e-16
    assert by_name["auto"]["method_used"] == "scholqr3"
    page = parse(job_folder / "out.compare.html")
    assert len(page.images) == 3
    assert (job_folder / "out.compare" / "tsqr.h5").exists()


def test_compare_refuses_unknown_methods(
    job_folder: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    job = write_job(job_folder, prescribed(100, 3, 10.0))
    assert main(["compare", str(job), "--methods", "tsqr,qr", "--inline"]) == 2
    assert "unknown method qr" in capsys.readouterr().err
