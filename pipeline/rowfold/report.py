"""Formatting of the quality report: JSON text and a human-readable HTML page with plots.

The figures themselves are assembled by :func:`rowfold.quality.assemble_report`.
"""

from __future__ import annotations

import base64
import html
import io
import json
from typing import Any

import numpy as np

CAUTION = (
    "rowfold computes factorizations and least-squares solutions; it does not judge whether a "
    "model suits its purpose. Results that feed engineering or land-survey decisions must be "
    "reviewed by a qualified professional, and local codes and licensed practice govern."
)


def to_json(report: dict[str, Any]) -> str:
    """Serialise a report as indented JSON text."""
    return json.dumps(report, indent=2, sort_keys=False) + "\n"


def _pyplot() -> Any:
    """matplotlib's pyplot on the Agg backend, or None when matplotlib is missing."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:  # matplotlib is a dependency; keep the report readable without it
        return None
    return plt


def _png(plt: Any, fig: Any) -> str:
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100)
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _spectrum(plt: Any, report: dict[str, Any]) -> str:
    sigma = np.asarray(report.get("r_singular_values") or [], dtype=float)
    diag = np.abs(np.asarray(report.get("r_diagonal") or [], dtype=float))
    fig, ax = plt.subplots(figsize=(7, 3.2))
    positions = np.arange(1, sigma.size + 1)
    ax.semilogy(positions, np.maximum(sigma, 1e-300), "o-", ms=3, label="singular values of R")
    ax.semilogy(positions, np.maximum(diag, 1e-300), "s", ms=3, label="|diag(R)|")
    ax.set_xlabel("index")
    ax.legend(loc="best", fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    return _png(plt, fig)


def _timing(plt: Any, report: dict[str, Any]) -> str:
    seconds = report.get("seconds") or {}
    fig, ax = plt.subplots(figsize=(7, 2.6))
    ax.barh(list(seconds), list(seconds.values()), color="#4a7ab0")
    ax.set_xlabel("seconds")
    return _png(plt, fig)


def _histogram(plt: Any, report: dict[str, Any]) -> str | None:
    hist = (report.get("residual_screening") or {}).get("histogram")
    if not hist:
        return None
    edges = np.asarray(hist["edges"])
    fig, ax = plt.subplots(figsize=(7, 2.8))
    ax.stairs(hist["counts"], edges, fill=True, color="#b0704a")
    limit = report["residual_screening"]["flag_above"]
    for x in (-limit, limit):
        ax.axvline(x, color="black", lw=0.8, ls="--")
    ax.set_xlabel("standardized residual (outer bins hold everything beyond)")
    ax.set_yscale("log")
    return _png(plt, fig)


def plots(report: dict[str, Any]) -> list[tuple[str, str]]:
    """(title, base64 PNG) of the report's plots."""
    plt = _pyplot()
    if plt is None:
        return []
    out = [
        ("Spectrum of R", _spectrum(plt, report)),
        ("Time per stage", _timing(plt, report)),
    ]
    histogram = _histogram(plt, report)
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
    """Render the report as a self-contained HTML page (plot embedded as PNG)."""
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
    images = "".join(
        f'<h2>{html.escape(title)}</h2><img alt="{html.escape(title)}" '
        f'src="data:image/png;base64,{png}">'
        for title, png in plots(report)
    )
    title = html.escape(f"rowfold report: {report.get('name', '')}")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<style>body{{font-family:sans-serif;max-width:60em;margin:2em auto}}
th{{text-align:left;padding-right:1em}}td{{font-family:monospace}}
.caution{{border-left:4px solid #b60;padding:.5em 1em;background:#fff6ea}}</style>
</head><body>
<h1>{title}</h1>
<p>rowfold {html.escape(str(report.get("rowfold_version")))}; output
<code>{html.escape(str(report.get("output")))}</code></p>
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
