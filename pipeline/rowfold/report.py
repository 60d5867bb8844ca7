"""The quality report: a JSON document and a human-readable HTML page with plots."""

from __future__ import annotations

import base64
import html
import io
import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np

from rowfold import __version__
from rowfold.kernels import metrics

if TYPE_CHECKING:
    from rowfold.blocks import BlockPlan
    from rowfold.methods.base import Factorization
    from rowfold.solve import Solution, Statistics
    from rowfold.spec import Job

CAUTION = (
    "rowfold computes factorizations and least-squares solutions; it does not judge whether a "
    "model suits its purpose. Results that feed engineering or land-survey decisions must be "
    "reviewed by a qualified professional, and local codes and licensed practice govern."
)


def _clean(value: Any) -> Any:
    """Turn numpy values into JSON data; NaN and infinity become null."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return _clean(value.tolist())
    if isinstance(value, np.generic):
        return _clean(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _per_rhs(plan: BlockPlan, values: np.ndarray) -> Any:
    """A number for a 1-D rhs, a list (one per column) for a 2-D rhs."""
    return float(values[0]) if plan.rhs_1d else [float(v) for v in values]


def build_report(
    job: Job,
    plan: BlockPlan,
    fact: Factorization,
    solution: Solution | None,
    stats: Statistics | None,
    sums: metrics.Sums,
    formed_q: bool,
    seconds: dict[str, float],
    peak_memory: int,
    extra: dict[str, Any],
) -> dict[str, Any]:
    """Assemble the report dictionary (the keys SPEC lists, and more)."""
    from rowfold.quality import check_gates

    sigma = metrics.singular_values(fact.R)
    norm_a = float(sigma[0]) if sigma.size else 0.0
    a_fro2 = float(sums["a_fro2"])
    figures: dict[str, Any] = {
        "orthogonality_loss": metrics.orthogonality_loss(sums["qhq"]) if formed_q else None,
        "factorization_residual": (
            math.sqrt(sums["defect2"] / a_fro2) if formed_q and a_fro2 > 0 else None
        ),
        "gram_residual": metrics.gram_residual(sums["gram"], fact.R, a_fro2),
        "r_condition": metrics.condition_from(sigma),
    }
    report: dict[str, Any] = {
        "rowfold_version": __version__,
        "name": job.name,
        "job_file": str(job.source),
        "method": job.method.name,
        "method_details": fact.details,
        "rows": plan.rows,
        "cols": plan.cols,
        "rhs_cols": plan.rhs_cols,
        "dtype": plan.dtype,
        "blocks": plan.blocks,
        "rows_per_block": plan.bounds[0][1] - plan.bounds[0][0],
        "passes_over_input": fact.passes + 1,
        "seconds": {k: round(v, 4) for k, v in seconds.items()},
        "peak_memory_bytes": peak_memory,
        **figures,
        "r_singular_values": sigma,
        "r_diagonal": np.real(np.diagonal(fact.R)),
        "rank": solution.rank if solution else _rank_only(fact.R, job),
        "warnings": [],
        "output": str(job.output.path),
        "caution": CAUTION,
    }
    if solution is not None and stats is not None:
        report.update(_solution_figures(plan, solution, stats, sums, norm_a))
    else:
        report.update(
            {
                "solution_residual_norm": None,
                "residual_std": None,
                "normal_equations_residual": None,
            }
        )
    if report["rank"] < plan.cols:
        report["warnings"].append(
            f"rank deficient: numerical rank {report['rank']} of {plan.cols} columns; "
            "x is the minimum-norm least-squares solution"
        )
    gates = check_gates(job.gates, figures)
    report["gates"] = {
        name: {"limit": g.limit, "value": g.value, "held": g.held} for name, g in gates.items()
    }
    report.update(extra)
    cleaned: dict[str, Any] = _clean(report)
    return cleaned


def _rank_only(R: np.ndarray, job: Job) -> int:
    from rowfold.solve import numerical_rank, rank_tolerance

    rank, _ = numerical_rank(R, rank_tolerance(R.shape[1], R.dtype, job.solve.rank_tolerance))
    return rank


def _solution_figures(
    plan: BlockPlan, solution: Solution, stats: Statistics, sums: metrics.Sums, norm_a: float
) -> dict[str, Any]:
    ne = metrics.normal_equations_residual(sums["ahr"], norm_a, sums["res2"])
    return {
        "rank_tolerance": solution.tolerance,
        "rank_deficient_columns": solution.deficient_columns,
        "degrees_of_freedom": stats.degrees_of_freedom,
        "solution_residual_norm": _per_rhs(plan, stats.residual_norm),
        "residual_std": _per_rhs(plan, stats.residual_std),
        "normal_equations_residual": _per_rhs(plan, ne),
    }


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
    ("method", "method"),
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
<h2>Gates</h2><table>{gates}</table>
{f"<h2>Warnings</h2><ul>{warnings}</ul>" if warnings else ""}
<h2>Time per stage</h2><p>{html.escape(stages)}</p>
<h2>Spectrum of R</h2>{plot}
<p class="caution">{html.escape(CAUTION)}</p>
</body></html>
"""
