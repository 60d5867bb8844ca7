"""Draw the screenshots in docs/screenshots/: the terminal at 80 columns during the demo,
and a demo report in headless Chromium.

Run from the project folder (needs Debian's chromium)::

    python docs/make_screenshots.py

The terminal is a real pseudo-terminal of 80 x 30; what rowfold wrote to it is replayed
with the terminal model of tests/test_progress.py (so a wrapped line fails here too) and
shown as the final screen plus every intermediate redraw of one stage.
"""

from __future__ import annotations

import html
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

from test_progress import replay, run_in_pty  # noqa: E402

import headless  # noqa: E402

COLUMNS = 80
PAGE = """<!doctype html><meta charset="utf-8"><title>rowfold at {columns} columns</title>
<style>body{{margin:0;background:#1e1e1e}}pre{{margin:0;padding:12px;color:#e8e8e8;
font:14px/1.3 "DejaVu Sans Mono",monospace;width:{columns}ch;white-space:pre}}</style>
<pre>{text}</pre>"""


def terminal_page(folder: Path) -> Path:
    """Run the demo in a pseudo-terminal of 80 columns; write its screen as a page."""
    command = [sys.executable, "-m", "rowfold", "demo", str(folder / "demo"), "--rows", "60000"]
    status, text = run_in_pty(command, COLUMNS, folder)
    if status != 0:
        raise SystemExit(f"the demo exited {status}:\n{text}")
    screen = replay(text, COLUMNS)
    page = folder / "terminal.html"
    body = html.escape("\n".join(screen).strip("\n"))
    page.write_text(PAGE.format(columns=COLUMNS, text=body), encoding="utf-8")
    return page


def main() -> None:
    """Write terminal-80.png and report.png into docs/screenshots/."""
    executable = headless.chromium()
    if executable is None:
        raise SystemExit("chromium is not installed (apt-get install chromium)")
    out = HERE / "screenshots"
    out.mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        page = terminal_page(folder)
        browser = headless.Browser(executable, folder / "profile")
        try:
            browser.load(page.as_uri(), out / "terminal-80.png", "1", width=COLUMNS * 9 + 40)
            report = folder / "demo" / "results" / "brackenholt_heights.report.html"
            browser.load(report.as_uri(), out / "report.png", "1", width=1200)
        finally:
            browser.close()
    print(f"wrote {out / 'terminal-80.png'} and {out / 'report.png'}")


if __name__ == "__main__":
    main()
