"""Formatting of the quality report: JSON text and a human-readable HTML page with plots.

The figures themselves are assembled by :func:`rowfold.quality.assemble_report`.
"""

from __future__ import annotations

import html
import json
from typing import Any

import numpy as np

from rowfold import svgplot

CAUTION = (
    "rowfold computes factorizations and least-squares solutions; it does not judge whether a "
    "model suits its purpose. Results that feed engineering or land-survey decisions must be "
    "reviewed by a qualified professional, and local codes and licensed practice govern."
)


def to_json(report: dict[str, Any]) -> str:
    """Serialise a report as indented JSON text."""
    return json.dumps(report, indent=2, sort_keys=False) + "\n"


def _spectrum(report: dict[str, Any]) -> str:
    sigma = np.asarray(report.get("r_singular_values") or [], dtype=float)
    diag = np.abs(np.asarray(report.get("r_diagonal") or [], dtype=float))
    series = [
        svgplot.Series("singular values of R", sigma, line=True, marker="circle"),
        svgplot.Series("|diag(R)|", diag, line=False, marker="square"),
    ]
    return svgplot.line_chart(series, title="Spectrum of R", x_label="index", log_y=True)


def _timing(report: dict[str, Any]) -> str:
    seconds = report.get("seconds") or {}
    return svgplot.bar_chart(
        list(seconds),
        list(seconds.values()),
        title="Time per stage",
        value_label="seconds",
        horizontal=True,
        height=max(120, 60 + 24 * len(seconds)),
    )


def _histogram(report: dict[str, Any]) -> str | None:
    hist = (report.get("residual_screening") or {}).get("histogram")
    if not hist:
        return None
    limit = report["residual_screening"]["flag_above"]
    return svgplot.histogram(
        hist["edges"],
        hist["counts"],
        title="Standardized residuals",
        x_label="standardized residual (outer bins hold everything beyond)",
        log_y=True,
        vlines=[-limit, limit],
        vline_label=f"flag limit ±{limit:g}",
    )


def plots(report: dict[str, Any]) -> list[tuple[str, str]]:
    """(title, inline SVG text) of the report's plots."""
    out = [("Spectrum of R", _spectrum(report)), ("Time per stage", _timing(report))]
    histogram = _histogram(report)
    if histogram:
        out.append(("Standardized residuals", histogram))
    return out


_ROWS = (
    ("method", "method asked"),
    ("method_used", "method used"),
    ("rows", "rows (m)"),
    ("cols", "columns (n)"),
    ("blocks", "row blocks"),
    ("passes_over_input", "passes over A"),
    ("orthogonality_loss", "loss of orthogonality ||I - Q^H Q||_F"),
    ("factorization_residual", "||A - QR||_F / ||A||_F"),
    ("gram_residual", "||A^H A - R^H R||_F / ||A||_F^2"),
    ("r_condition", "condition number of R"),
    ("rank", "numerical rank"),
    ("solution_residual_norm", "||b - A x||"),
    ("residual_std", "residual standard deviation"),
    ("normal_equations_residual", "||A^H r|| / (||A|| ||r||)"),
    ("peak_memory_bytes", "peak memory (bytes)"),
)


def _fmt(value: Any) -> str:
    if value is None:
        return "&mdash;"
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, list):
        return ", ".join(_fmt(v) for v in value)
    return html.escape(str(value))


def _num(value: Any) -> str:
    return "n/a" if value is None else f"{value:.3g}"


def render_html(report: dict[str, Any]) -> str:
    """Render the report as a self-contained HTML page (plots inlined as SVG)."""
    rows = "\n".join(
        f"<tr><th>{html.escape(label)}</th><td>{_fmt(report.get(key))}</td></tr>"
        for key, label in _ROWS
    )
    gates = (
        "\n".join(
            f"<tr><th>{html.escape(name)}</th><td>{_fmt(g['value'])} &le; {_fmt(g['limit'])}</td>"
            f"<td>{'held' if g['held'] else 'FAILED'}</td></tr>"
            for name, g in report.get("gates", {}).items()
        )
        or "<tr><td colspan='3'>no gates set</td></tr>"
    )
    stages = ", ".join(f"{k} {v:.2f} s" for k, v in report.get("seconds", {}).items())
    warnings = "".join(f"<li>{html.escape(w)}</li>" for w in report.get("warnings", []))
    bound = report.get("orthogonality_bound") or {}
    bound_text = (
        f"Published bound for {bound.get('method')}: {bound.get('formula')} = "
        f"{_num(bound.get('value'))} at the measured condition number "
        f"({bound.get('source')}); measured loss of orthogonality {_num(bound.get('measured'))}."
        if bound
        else ""
    )
    screening = report.get("residual_screening") or {}
    worst = "".join(
        f"<tr><td>{w['row']}</td><td>{w['rhs']}</td><td>{_num(w['residual'])}</td>"
        f"<td>{_num(w['leverage'])}</td><td>{_num(w['standardized'])}</td></tr>"
        for w in screening.get("worst", [])
    )
    screening_html = (
        f"<h2>Residual screening</h2><p>{html.escape(str(screening.get('flagged')))} "
        f"standardized residuals exceed {_num(screening.get('flag_above'))}.</p>"
        "<table><tr><th>row</th><th>rhs</th><th>residual</th><th>leverage</th>"
        f"<th>standardized</th></tr>{worst}</table>"
        if screening
        else ""
    )
    images = "\n".join(f"<h2>{html.escape(title)}</h2>\n{svg}" for title, svg in plots(report))
    title = html.escape(f"rowfold report: {report.get('name', '')}")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<style>body{{font-family:sans-serif;max-width:60em;margin:2em auto}}
th{{text-align:left;padding-right:1em}}td{{font-family:monospace}}
.caution{{border-left:4px solid #b60;padding:.5em 1em;background:#fff6ea}}</style>
</head><body>
<h1>{title}</h1>
<p>rowfold {html.escape(str(report.get("rowfold_version")))}; output
<code>{html.escape(str(report.get("output")))}</code>; commit
<code>{html.escape(str(report.get("commit")))}</code></p>
<h2>Quality</h2><table>{rows}</table>
<p>{html.escape(bound_text)}</p>
<h2>Gates</h2><table>{gates}</table>
{f"<h2>Warnings</h2><ul>{warnings}</ul>" if warnings else ""}
{screening_html}
<p>Time per stage: {html.escape(stages)}</p>
{images}
<p class="caution">{html.escape(CAUTION)}</p>
</body></html>
"""
