"""``rowfold compare``: one job, several methods, side by side.

Each method runs on the same input through the same engine, with Q formed in its
verification pass (to measure orthogonality) but not written. Each result goes to
``<output stem>.compare/<method><suffix>``; the comparison goes to
``<output stem>.compare.json`` and ``.compare.html`` beside the job's output.
"""

from __future__ import annotations

import html
import json
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from rowfold.errors import BreakdownError
from rowfold.kernels.norms import frobenius
from rowfold.report import CAUTION
from rowfold.spec import Job


@dataclass(frozen=True)
class Row:
    """One method's line of the comparison."""

    method: str
    status: str
    report: dict[str, Any] | None
    R: np.ndarray | None
    message: str = ""


def method_job(job: Job, method: str) -> Job:
    """The job for one method: its own output, Q measured but not written."""
    out = job.output.local
    target = out.with_name(out.with_suffix("").name + ".compare") / f"{method}{out.suffix}"
    target.parent.mkdir(parents=True, exist_ok=True)
    output = replace(job.output, path=target, q=False, overwrite=True, measure_q=True)
    return replace(job, method=replace(job.method, name=method), output=output)


def compare_paths(job: Job) -> tuple[Path, Path]:
    """Where the comparison JSON and HTML go."""
    stem = job.output.local.with_suffix("")
    return stem.with_name(stem.name + ".compare.json"), stem.with_name(stem.name + ".compare.html")


def run_row(job: Job, method: str, run: Any) -> Row:
    """Run one method; a refusal (breakdown) is a row too, not an error."""
    try:
        outcome = run(method_job(job, method))
    except BreakdownError as exc:
        return Row(method, "refused", None, None, str(exc))
    from rowfold import storage

    R = storage.read_result(outcome.output)["R"]
    status = "ok" if outcome.status == 0 else "gate failed"
    return Row(method, status, outcome.report, R)


def table(rows: list[Row]) -> list[dict[str, Any]]:
    """The comparison as records; R differences are relative to the first method that ran."""
    reference = next((row.R for row in rows if row.R is not None), None)
    records = []
    for row in rows:
        rep = row.report or {}
        diff = None
        if row.R is not None and reference is not None:
            diff = frobenius(row.R - reference) / frobenius(reference)
        seconds = rep.get("seconds", {})
        records.append(
            {
                "method": row.method,
                "status": row.status,
                "method_used": rep.get("method_used"),
                "seconds": round(sum(v for k, v in seconds.items() if k != "cluster_start"), 3),
                "passes_over_input": rep.get("passes_over_input"),
                "orthogonality_loss": rep.get("orthogonality_loss"),
                "orthogonality_bound": (rep.get("orthogonality_bound") or {}).get("value"),
                "factorization_residual": rep.get("factorization_residual"),
                "r_condition": rep.get("r_condition"),
                "r_difference": diff,
                "r_diagonal": rep.get("r_diagonal"),
                "message": row.message,
            }
        )
    return records


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return (
            f"{value:.2e}" if value and (abs(value) < 1e-2 or abs(value) >= 1e4) else f"{value:.3g}"
        )
    return str(value)


COLUMNS = (
    ("method", "method"),
    ("status", "status"),
    ("seconds", "seconds"),
    ("passes_over_input", "passes"),
    ("orthogonality_loss", "LOO"),
    ("factorization_residual", "||A-QR||/||A||"),
    ("r_condition", "cond(R)"),
    ("r_difference", "dR vs first"),
)


def text_table(records: list[dict[str, Any]]) -> str:
    """The comparison as a fixed-width terminal table."""
    header = [label for _, label in COLUMNS]
    lines = [[_fmt(rec[key]) for key, _ in COLUMNS] for rec in records]
    widths = [max(len(h), *(len(line[i]) for line in lines)) for i, h in enumerate(header)]
    out = ["  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))]
    out += ["  ".join(c.ljust(w) for c, w in zip(line, widths, strict=True)) for line in lines]
    out += [f"  {rec['method']}: {rec['message']}" for rec in records if rec["message"]]
    return "\n".join(out)


def plots(records: list[dict[str, Any]]) -> list[Any]:
    """The comparison's plots (:class:`rowfold.plots.Plot`): time per method, loss of
    orthogonality against its published bound, and diag(R) of each method."""
    from rowfold import plots as draw

    ran = [r for r in records if r["status"] != "refused"]
    names = [r["method"] for r in ran]
    with draw.drawing() as canvas:
        return [
            draw.method_times(canvas, names, [r["seconds"] for r in ran]),
            draw.orthogonality(
                canvas,
                names,
                [r["orthogonality_loss"] for r in ran],
                [r["orthogonality_bound"] for r in ran],
            ),
            draw.diagonals(canvas, {r["method"]: r["r_diagonal"] or [] for r in ran}),
        ]


def render_html(job: Job, records: list[dict[str, Any]]) -> str:
    """A self-contained HTML page: the table and the plots."""
    head = "".join(f"<th>{html.escape(label)}</th>" for _, label in COLUMNS)
    body = "".join(
        "<tr>" + "".join(f"<td>{html.escape(_fmt(r[key]))}</td>" for key, _ in COLUMNS) + "</tr>"
        for r in records
    )
    notes = "".join(
        f"<li>{html.escape(r['method'])}: {html.escape(r['message'])}</li>"
        for r in records
        if r["message"]
    )
    images = "".join(f"<h2>{html.escape(plot.title)}</h2>{plot.svg}" for plot in plots(records))
    title = html.escape(f"rowfold comparison: {job.name}")
    return (
        f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{title}</title>"
        "<style>body{font-family:sans-serif;max-width:60em;margin:2em auto}"
        "td,th{padding:.2em .6em;text-align:left}td{font-family:monospace}"
        "svg.plot{width:100%;height:auto;max-width:54em;display:block}</style></head>"
        f"<body><h1>{title}</h1><table><tr>{head}</tr>{body}</table>"
        f"{f'<ul>{notes}</ul>' if notes else ''}{images}"
        f"<p>{html.escape(CAUTION)}</p></body></html>\n"
    )


def write(job: Job, records: list[dict[str, Any]]) -> tuple[Path, Path]:
    """Write the comparison JSON and HTML; return their paths."""
    from rowfold.storage import write_text_atomic

    json_path, html_path = compare_paths(job)
    payload = {"job": job.name, "methods": records}
    write_text_atomic(json_path, json.dumps(payload, indent=2) + "\n")
    write_text_atomic(html_path, render_html(job, records))
    return json_path, html_path
