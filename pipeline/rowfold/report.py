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


def _plot_png(report: dict[str, Any]) -> str | None:
    """Plot the singular values and |diag(R)| and return a base64 PNG, or None."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:  # matplotlib is a dependency; keep the report readable without it
        return None
    sigma = np.asarray(report.get("r_singular_values") or [], dtype=float)
    diag = np.abs(np.asarray(report.get("r_diagonal") or [], dtype=float))
    fig, ax = plt.subplots(figsize=(7, 3.2), dpi=100)
    positions = np.arange(1, sigma.size + 1)
    ax.semilogy(positions, np.maximum(sigma, 1e-300), "o-", ms=3, label="singular values of R")
    ax.semilogy(positions, np.maximum(diag, 1e-300), "s", ms=3, label="|diag(R)|")
    ax.set_xlabel("index")
    ax.legend(loc="best", fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


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
    png = _plot_png(report)
    plot = f'<img alt="singular values of R" src="data:image/png;base64,{png}">' if png else ""
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
<h2>Time per stage</h2><p>{html.escape(stages)}</p>
<h2>Spectrum of R</h2>{plot}
<p class="caution">{html.escape(CAUTION)}</p>
</body></html>
"""
