"""Formatting of the quality report: JSON text and a human-readable HTML page with plots.

The figures themselves are assembled by :func:`rowfold.quality.assemble_report`. The page
shows the answer first (the parameters with their standard errors, the datum, the
refinement, the inputs), then the quality figures and gates, the model test (the global
test, the redundancy numbers, the per-observation test), then the residual screening and
the plots (:mod:`rowfold.plots`, drawn with matplotlib, imported only here and only when a
page is rendered).
"""

from __future__ import annotations

import html
import json
import math
from typing import Any

import numpy as np

CAUTION = (
    "rowfold computes factorizations and least-squares solutions; it does not judge whether a "
    "model suits its purpose. Results that feed engineering or land-survey decisions must be "
    "reviewed by a qualified professional, and local codes and licensed practice govern."
)
# Parameter tables longer than this scroll inside their own box.
SCROLL_ROWS = 25
STYLE = """body{font-family:sans-serif;max-width:62em;margin:2em auto;padding:0 1em;color:#222}
h1{font-size:1.5em}h2{margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.4em 0}th,td{padding:.15em .7em;text-align:left}
td.num{font-family:monospace;text-align:right;white-space:nowrap}
td.mono{font-family:monospace;overflow-wrap:anywhere}
tr:nth-child(even) td{background:#f6f6f6}
.scroll{max-height:28em;overflow:auto;border:1px solid #ddd;display:inline-block}
.scroll th{position:sticky;top:0;background:#fff}
.verdict{padding:.5em 1em;font-weight:bold}.ok{background:#e7f4e7}.bad{background:#fbe3e3}
svg.plot{width:100%;height:auto;max-width:54em;display:block}figure{margin:1em 0}
.caution{border-left:4px solid #b60;padding:.5em 1em;background:#fff6ea}
.note{color:#555;font-size:.92em}"""


def to_json(report: dict[str, Any]) -> str:
    """Serialise a report as indented JSON text."""
    return json.dumps(report, indent=2, sort_keys=False) + "\n"


def _esc(value: Any) -> str:
    return html.escape(str(value))


def _num(value: Any, digits: int = 4) -> str:
    """A number for a table cell; per-rhs lists joined; null as a dash."""
    if value is None:
        return "&mdash;"
    if isinstance(value, list):
        return ", ".join(_num(v, digits) for v in value)
    if isinstance(value, dict) and "re" in value:
        return f"{value['re']:.{digits}g}{value['im']:+.{digits}g}j"
    if isinstance(value, bool) or not isinstance(value, int | float):
        return _esc(value)
    return f"{value:.{digits}g}" if isinstance(value, float) else f"{value:,}"


def _bytes(count: Any) -> str:
    """Bytes in binary units, with the exact count beside."""
    if not isinstance(count, int):
        return "&mdash;"
    size, unit = float(count), "bytes"
    for name in ("KiB", "MiB", "GiB", "TiB"):
        if size < 1024:
            break
        size, unit = size / 1024, name
    return f"{size:.1f} {unit} ({count:,} bytes)" if unit != "bytes" else f"{count:,} bytes"


def with_error(x: Any, se: Any) -> tuple[str, str]:
    """x rounded to two significant digits of its standard error, and the error.

    A zero or missing error (a fixed parameter) keeps x at 6 significant digits.
    """
    if isinstance(x, dict) or x is None:
        return _num(x, 10), _num(se, 2)
    if se is None or not math.isfinite(se) or se <= 0:
        return f"{x:.6g}", "0" if se == 0 else "&mdash;"
    decimals = 1 - math.floor(math.log10(se))
    if decimals < 0 or abs(x) >= 1e15:
        return f"{x:.6g}", f"{se:.2g}"
    return f"{x:.{decimals}f}", f"{se:#.2g}".rstrip(".")


# ------------------------------------------------------------------------------ sections


def _verdict(report: dict[str, Any]) -> str:
    gates = report.get("gates", {})
    status = report.get("gates_status", "held")
    if not gates:
        return "<p class='verdict ok'>No quality gates set (exit status 0).</p>"
    if status == "held":
        return f"<p class='verdict ok'>Every quality gate held ({len(gates)}; exit status 0).</p>"
    failed = [n for n, g in gates.items() if g["held"] is False]
    unknown = [n for n, g in gates.items() if g["held"] is None]
    parts = []
    if failed:
        parts.append(f"failed: {', '.join(failed)}")
    if unknown:
        parts.append(f"not evaluated: {', '.join(unknown)}")
    return (
        f"<p class='verdict bad'>Quality gates {_esc('; '.join(parts))} (exit status 3). "
        "See Gates below.</p>"
    )


def _answer(report: dict[str, Any]) -> str:
    table = report.get("parameters")
    head = "<h2 id='answer'>Answer</h2>"
    if not table:
        return head + (
            "<p>No right-hand side (<code>input.rhs</code>) was given, so there is no "
            "solution x; the result is the factorization (R"
            f"{', and Q' if report.get('orthogonality_loss') is not None else ''}).</p>"
            + _datum(report)
        )
    rhs = report.get("rhs_cols", 1)
    weighted = "weights" in (report.get("inputs") or {})
    sigma = "of unit weight (units of b times sqrt(w))" if weighted else "(units of b)"
    summary = (
        f"<p>{len(table)} parameters from {report.get('rows', 0):,} rows"
        f"{f' and {rhs} right-hand sides' if rhs > 1 else ''}; numerical rank "
        f"{report.get('rank')} of {report.get('cols')} estimated columns; residual standard "
        f"deviation {sigma} {_num(report.get('residual_std'))} with "
        f"{_num(report.get('degrees_of_freedom'))} degrees of freedom."
        f"{_model_verdict(report.get('model_test') or {})}</p>"
    )
    return head + summary + _datum(report) + _parameter_table(table, rhs)


def _model_verdict(model: dict[str, Any]) -> str:
    """One sentence on the global test of the model, for the answer's summary."""
    if not model.get("evaluated"):
        return ""
    passed = model.get("passed")
    verdicts = passed if isinstance(passed, list) else [passed]
    outcome = "passed" if all(verdicts) else "<b>FAILED</b>"
    return (
        f" Global test of the model (variance factor against sigma0 = "
        f"{_num(model.get('sigma0'))}, alpha {_num(model.get('alpha'))}, two-sided): "
        f"{outcome}; see Model test."
    )


def _datum(report: dict[str, Any]) -> str:
    datum = report.get("datum") or {}
    if not datum:
        return ""
    return f"<p><b>Datum.</b> {_esc(datum.get('note', ''))}.</p>"


def _parameter_table(table: list[dict[str, Any]], rhs: int) -> str:
    per = [f" (rhs {k})" for k in range(rhs)] if rhs > 1 else [""]
    head = (
        "<tr><th>column</th><th>name</th>"
        + "".join(f"<th>x{p}</th><th>standard error{p}</th>" for p in per)
        + "</tr>"
    )
    rows = []
    for entry in table:
        xs = entry["x"] if rhs > 1 else [entry["x"]]
        ses = entry["stderr"] if rhs > 1 else [entry["stderr"]]
        cells = []
        for x, se in zip(xs, ses, strict=True):
            x_text, se_text = with_error(x, se)
            if entry["fixed"]:
                se_text = "held fixed (datum)"
            cells.append(f"<td class='num'>{x_text}</td><td class='num'>{se_text}</td>")
        rows.append(
            f"<tr><td class='num'>{entry['column']}</td><td>{_esc(entry['name'])}</td>"
            f"{''.join(cells)}</tr>"
        )
    body = f"<table class='parameters'>{head}{''.join(rows)}</table>"
    if len(table) > SCROLL_ROWS:
        body = f"<div class='scroll'>{body}</div>"
    return (
        body + "<p class='note'>x is rounded to two significant digits of its standard error; "
        "the JSON report and the result store hold every digit.</p>"
    )


def _refinement(report: dict[str, Any]) -> str:
    head = "<h2 id='refinement'>Refinement</h2>"
    info = report.get("refinement")
    if info:
        corrections = ", ".join(f"{v:.2g}" for v in info.get("corrections", []))
        return head + (
            f"<p>Augmented-system iterative refinement made {info.get('iterations')} "
            f"corrections in {info.get('passes')} passes over A; the relative size of each "
            f"correction: {corrections}; the last: {_num(info.get('last_correction'), 3)}.</p>"
        )
    skipped = [w for w in report.get("warnings", []) if "refine" in w]
    if skipped:
        return head + "".join(f"<p>{_esc(w)}.</p>" for w in skipped)
    return head + "<p>Not asked for (<code>solve.refine: false</code>).</p>"


_INPUT_ROLES = (
    ("matrix", "A (input.matrix)"),
    ("rhs", "b (input.rhs)"),
    ("weights", "w (input.weights)"),
)


def _inputs(report: dict[str, Any]) -> str:
    records = report.get("inputs") or {}
    rows = []
    for key, role in _INPUT_ROLES:
        rec = records.get(key)
        if not rec:
            continue
        shape = " x ".join(str(v) for v in rec.get("shape", []))
        rows.append(
            f"<tr><td>{_esc(role)}</td><td class='mono'>{_esc(rec.get('path'))}</td>"
            f"<td class='mono'>{_esc(rec.get('dataset'))}</td><td class='num'>{shape}</td>"
            f"<td>{_esc(rec.get('format'))}</td>"
            f"<td class='mono' title='{_esc(rec.get('content'))}'>"
            f"{_esc(str(rec.get('content', ''))[:16])}&hellip;</td></tr>"
        )
    table = (
        "<table><tr><th>role</th><th>file</th><th>dataset</th><th>shape</th><th>format</th>"
        f"<th>content digest ({_esc(_first_hash(records))})</th></tr>{''.join(rows)}</table>"
    )
    return (
        f"<h2 id='inputs'>Inputs</h2>{table}"
        f"<p>Job file <code>{_esc(report.get('job_file'))}</code>; result store "
        f"<code>{_esc(report.get('output'))}</code>.</p>"
    )


def _coverage(report: dict[str, Any]) -> str:
    """Which segments and rows the answer covers, what this step read, and which figures
    were not recomputed (after update, replace or retire; a run's one segment is in the
    JSON report only)."""
    info = report.get("segments")
    if not info or (info.get("step") or {}).get("verb") == "run":
        return ""
    rows = "".join(
        f"<tr><td class='mono'>{_esc(s.get('label'))}</td>"
        f"<td class='num'>{_esc(s.get('first_row'))}..{_esc(int(s.get('stop_row', 0)) - 1)}</td>"
        f"<td class='num'>{_esc(s.get('rows'))}</td><td>{_esc(s.get('how'))}</td>"
        f"<td>{_esc(s.get('added'))}</td></tr>"
        for s in info.get("covered", [])
    )
    table = (
        "<table><tr><th>segment</th><th>rows</th><th>count</th><th>by</th><th>added</th></tr>"
        f"{rows}</table>"
    )
    step = info.get("step") or {}
    read = ", ".join(f"{a}..{b - 1}" for a, b in step.get("rows_read", [])) or "no rows"
    retired = ", ".join(str(r.get("label")) for r in info.get("retired", [])) or "none"
    missing = "".join(
        f"<li><code>{_esc(name)}</code>: {_esc(why)}</li>"
        for name, why in (info.get("not_recomputed") or {}).items()
    )
    skipped = f"<p>Not recomputed by this step:</p><ul>{missing}</ul>" if missing else ""
    return (
        f"<h2 id='segments'>Segments</h2><p>The answer covers {_esc(info.get('rows_covered'))} "
        f"rows in {_esc(info.get('segments_covered'))} segments. This step "
        f"(<code>{_esc(step.get('verb', 'run'))}</code>) read {_esc(read)}. "
        f"Retired: {_esc(retired)}.</p>{table}{skipped}"
    )


def _first_hash(records: dict[str, Any]) -> str:
    return next((str(r.get("hash")) for r in records.values() if r.get("hash")), "digest")


_FIGURES = (
    ("orthogonality_loss", "loss of orthogonality ||I - Q^H Q||_F"),
    ("factorization_residual", "||A - QR||_F / ||A||_F"),
    ("gram_residual", "||A^H A - R^H R||_F / ||A||_F^2"),
    ("normal_equations_residual", "||A^H r|| / (||A|| ||r||)"),
    ("r_condition", "condition number of R"),
    ("rank", "numerical rank"),
    ("rank_tolerance", "rank tolerance (relative)"),
    ("solution_residual_norm", "||b - A x|| (weighted)"),
    ("residual_std", "residual standard deviation"),
    ("degrees_of_freedom", "degrees of freedom"),
)


def _quality(report: dict[str, Any]) -> str:
    rows = "".join(
        f"<tr><th>{_esc(label)}</th><td class='num'>{_num(report.get(key))}</td></tr>"
        for key, label in _FIGURES
        if key in report
    )
    warnings = "".join(f"<li>{_esc(w)}</li>" for w in report.get("warnings", []))
    return (
        f"<h2 id='quality'>Quality</h2><table>{rows}</table><p>{_esc(_bound_text(report))}</p>"
        f"<h3>Gates</h3>{_gates(report)}"
        f"{f'<h3>Warnings</h3><ul>{warnings}</ul>' if warnings else ''}"
    )


def _bound_text(report: dict[str, Any]) -> str:
    bound = report.get("orthogonality_bound") or {}
    if not bound:
        return ""
    measured = bound.get("measured")
    text = (
        f"Published bound on the loss of orthogonality for {bound.get('method')}: "
        f"{bound.get('formula')} = {_plain(bound.get('value'))} at the measured condition "
        f"number ({bound.get('source')})"
    )
    if "10 n" in str(bound.get("formula")):
        text += "; the constant 10 n is common practice, not published"
    if measured is None:
        return text + ". Q was not formed, so the loss itself was not measured."
    return text + f". Measured: {_plain(measured)}."


def _plain(value: Any) -> str:
    return "n/a" if value is None else f"{value:.3g}"


def _gates(report: dict[str, Any]) -> str:
    gates = report.get("gates", {})
    if not gates:
        return "<p>No gates set (<code>gates:</code> in the job).</p>"
    rows = []
    for name, gate in gates.items():
        if gate["held"] is None:
            result = f"<b>NOT EVALUATED</b>: {_esc(gate.get('reason') or '')}"
        else:
            result = "held" if gate["held"] else "<b>FAILED</b>"
        relation = "&ge;" if str(gate.get("rule", "")).startswith("value >=") else "&le;"
        rows.append(
            f"<tr><th>{_esc(name)}</th><td class='num'>{_num(gate['value'])}</td>"
            f"<td class='num'>{relation} {_num(gate['limit'])}</td><td>{result}</td></tr>"
        )
    return (
        "<table><tr><th>gate</th><th>measured</th><th>limit</th><th>result</th></tr>"
        f"{''.join(rows)}</table><p class='note'>A gate that held gives exit status 0; one "
        "that failed or could not be evaluated gives 3. The model_test gate compares the "
        "smallest p-value of the global test with solve.alpha.</p>"
    )


def _model_test(report: dict[str, Any]) -> str:
    head = "<h2 id='model-test'>Model test</h2>"
    return head + _global_test(report) + _redundancy(report) + _observation_test(report)


def _global_test(report: dict[str, Any]) -> str:
    model = report.get("model_test") or {}
    if not model.get("evaluated"):
        reason = model.get("reason") or "not computed"
        return f"<h3>Global test</h3><p>Not evaluated: {_esc(reason)}.</p>"
    passed = model.get("passed")
    verdicts = passed if isinstance(passed, list) else [passed]
    result = ", ".join("passed" if v else "<b>FAILED</b>" for v in verdicts)
    facts = [
        (
            "a priori sigma0 (solve.sigma0), variance factor",
            _pair(model, "sigma0", "a_priori_variance_factor"),
        ),
        ("a posteriori s0, variance factor s0^2", _pair(model, "s0", "variance_factor")),
        ("s0^2 / sigma0^2", _num(model.get("ratio"))),
        ("degrees of freedom f", _num(model.get("degrees_of_freedom"))),
        ("statistic T = f s0^2 / sigma0^2", _num(model.get("statistic"))),
        (
            f"chi-square({model.get('degrees_of_freedom')}) bounds at alpha "
            f"{_num(model.get('alpha'))}, two-sided",
            f"{_num(model.get('lower'))} to {_num(model.get('upper'))}",
        ),
        ("p-value (two-sided)", _num(model.get("p_value"))),
        ("result", result),
    ]
    rows = "".join(f"<tr><th>{_esc(k)}</th><td class='num'>{v}</td></tr>" for k, v in facts)
    return (
        f"<h3>Global test</h3><table>{rows}</table><p class='note'>The weights are taken as "
        "sigma0^2 / sigma_i^2. The test is "
        f"{_esc(model.get('why_two_sided'))}. Failing it is a statistical finding, not a "
        "numerical failure: it changes the exit status only with gates.model_test. "
        f"Source: {_esc(model.get('source'))}.</p>"
    )


def _pair(model: dict[str, Any], first: str, second: str) -> str:
    return f"{_num(model.get(first))}; {_num(model.get(second))}"


def _redundancy(report: dict[str, Any]) -> str:
    info = report.get("redundancy")
    head = "<h3>Redundancy numbers</h3>"
    if not info:
        return head + (
            "<p>Not computed (<code>solve.residuals: true</code> writes the redundancy "
            "numbers r_i = 1 - h_i and tests every observation; <code>update</code> does "
            "not, it reads no old rows).</p>"
        )
    facts = [
        ("sum of r_i over the observations", _num(info.get("total"), 12)),
        ("degrees of freedom f", _num(info.get("degrees_of_freedom"))),
        (
            "difference (allowed by rounding)",
            f"{_num(info.get('difference'))} ({_num(info.get('bound'))})",
        ),
        ("observations (rows of positive weight)", _num(info.get("observations"))),
        ("mean r_i, smallest r_i", _pair(info, "mean", "smallest")),
        (
            f"uncontrolled (r_i at most {_num(info.get('resolution'), 2)}, not tested)",
            _num(info.get("uncontrolled")),
        ),
        ("rows of weight 0 (redundancy NaN)", _num(info.get("zero_weight_rows"))),
    ]
    rows = "".join(f"<tr><th>{_esc(k)}</th><td class='num'>{v}</td></tr>" for k, v in facts)
    return head + f"<table>{rows}</table>"


def _observation_test(report: dict[str, Any]) -> str:
    test = report.get("observation_test")
    head = "<h3>Per-observation test</h3>"
    if not test:
        return head + "<p>Not computed (it needs <code>solve.residuals: true</code>).</p>"
    if not test.get("evaluated"):
        return head + f"<p>Not evaluated: {_esc(test.get('reason'))}.</p>"
    worst = "".join(
        f"<tr><td class='num'>{w['row']:,}</td><td class='num'>{w['rhs']}</td>"
        f"<td class='num'>{_num(w['residual'])}</td><td class='num'>{_num(w['redundancy'])}</td>"
        f"<td class='num'>{_num(w['statistic'])}</td><td class='num'>{_num(w['studentized'])}</td>"
        f"<td>{'<b>exceeds</b>' if w['exceeds'] else ''}</td></tr>"
        for w in test.get("worst", [])
    )
    return head + (
        f"<p>{_esc(test.get('name'))} (solve.observation_test: {_esc(test.get('test'))}): "
        f"{_esc(test.get('statistic'))}, {_esc(test.get('distribution'))}; critical value "
        f"{_num(test.get('critical_value'))} at alpha {_num(test.get('alpha'))} per "
        f"observation. {_num(test.get('exceeding'))} of {_num(test.get('tested'))} "
        f"observations exceed it (about {_num(test.get('expected_false_alarms'), 3)} would by "
        "chance alone if the model were right). The rows of largest |statistic|:</p>"
        "<div class='scroll'><table><tr><th>row</th><th>rhs</th><th>residual (weighted)</th>"
        "<th>redundancy r_i</th><th>statistic</th><th>studentized (leave-one-out)</th>"
        f"<th></th></tr>{worst}</table></div><p class='note'>The leave-one-out residual "
        "uses the s0 of the adjustment without the row, so one gross error does not shrink "
        f"its own statistic. Source: {_esc(test.get('source'))}.</p>"
    )


def _screening(report: dict[str, Any]) -> str:
    screening = report.get("residual_screening")
    head = "<h2 id='screening'>Residual screening</h2>"
    if not screening:
        return head + (
            "<p>Not asked for (<code>solve.residuals: true</code> writes residuals, leverages "
            "and standardized residuals and draws their plots here).</p>"
        )
    worst = "".join(
        f"<tr><td class='num'>{w['row']:,}</td><td class='num'>{w['rhs']}</td>"
        f"<td class='num'>{_num(w['residual'])}</td><td class='num'>{_num(w['leverage'])}</td>"
        f"<td class='num'>{_num(w['standardized'])}</td></tr>"
        for w in screening.get("worst", [])
    )
    sample = (report.get("plots_data") or {}).get("sample") or {}
    return head + (
        f"<p>{_num(screening.get('flagged'))} standardized residuals exceed "
        f"{_num(screening.get('flag_above'))} in absolute value. The rows with the largest "
        "(row numbers count from 0):</p><div class='scroll'><table><tr><th>row</th>"
        "<th>rhs</th><th>residual (units of b, weighted)</th><th>leverage</th>"
        f"<th>|standardized|</th></tr>{worst}</table></div>"
        "<p class='note'>The plots below are drawn from bounded summaries made in the "
        f"screening pass: per-bin statistics over rows, a uniform sample of "
        f"{sample.get('size', 0)} rows (seed {sample.get('seed')}), the rows above and the "
        "rows of highest leverage.</p>"
    )


def _run(report: dict[str, Any]) -> str:
    details = report.get("method_details") or {}
    prov = report.get("provenance") or {}
    facts = [
        ("method asked / used", _esc(f"{report.get('method')} / {report.get('method_used')}")),
        ("method details", ", ".join(f"{_esc(k)} {_num(v)}" for k, v in details.items())),
        ("rows x columns", _esc(f"{report.get('rows', 0):,} x {report.get('cols')}")),
        ("row blocks", _esc(f"{report.get('blocks')} of {report.get('rows_per_block', 0):,} rows")),
        ("passes over A", _esc(report.get("passes_over_input"))),
        ("peak memory (client and workers)", _bytes(report.get("peak_memory_bytes"))),
        ("started / finished", _esc(f"{prov.get('started')} / {prov.get('finished')}")),
        ("host", _esc(prov.get("host"))),
    ]
    rows = "".join(f"<tr><th>{_esc(k)}</th><td>{v}</td></tr>" for k, v in facts)
    seconds = report.get("seconds") or {}
    stages = "".join(
        f"<tr><th>{_esc(name)}</th><td class='num'>{value:.3f}</td></tr>"
        for name, value in seconds.items()
    )
    return (
        f"<h2 id='run'>Run</h2><table>{rows}</table><h3>Time per stage</h3>"
        f"<table class='stages'><tr><th>stage</th><th>seconds</th></tr>{stages}</table>"
        "<p class='note'>Drawing this page is timed as <code>seconds.report</code> in the "
        "JSON report.</p>"
    )


# ------------------------------------------------------------------------------ plots


def _unit_roundoff(report: dict[str, Any]) -> float:
    kind = str(report.get("dtype", "<f8"))
    single = kind.endswith(("f4", "c8"))
    return float(np.finfo(np.float32 if single else np.float64).eps) / 2


def plots(report: dict[str, Any]) -> dict[str, Any]:
    """The report's plots by section: ``answer``, ``refinement``, ``screening`` and
    ``conditioning`` (each a :class:`rowfold.plots.Plot`; absent when there is nothing to
    draw)."""
    from rowfold import plots as draw

    out: dict[str, Any] = {}
    with draw.drawing() as canvas:
        answer = draw.parameters(canvas, report.get("parameters") or [], report.get("rhs_cols", 1))
        if answer is not None:
            out["answer"] = answer
        corrections = (report.get("refinement") or {}).get("corrections")
        if corrections:
            out["refinement"] = draw.refinement(canvas, corrections, _unit_roundoff(report))
        residuals = _residual_data(report)
        if residuals is not None:
            out["screening"] = draw.residuals(canvas, residuals)
        out["conditioning"] = draw.spectrum(
            canvas, report.get("r_singular_values") or [], report.get("r_diagonal") or []
        )
    return out


def _residual_data(report: dict[str, Any]) -> Any:
    from rowfold.plots import Residuals

    screening = report.get("residual_screening")
    summaries = report.get("plots_data")
    if not screening or not summaries:
        return None
    return Residuals(
        flag_above=float(screening["flag_above"]),
        histogram=screening["histogram"],
        worst=screening["worst"],
        row_bins=summaries["row_bins"],
        sample=summaries["sample"],
        high_leverage=summaries["high_leverage"],
        rows=int(report.get("rows", 0)),
        cols=int(report.get("cols", 0)),
    )


def _figure(drawn: dict[str, Any], section: str) -> str:
    plot = drawn.get(section)
    if plot is None:
        return ""
    notes = "".join(
        f"<p class='note'>{_esc(note)}</p>" for axes in plot.axes for note in axes.notes
    )
    return f"<figure><figcaption><b>{_esc(plot.title)}</b></figcaption>{plot.svg}</figure>{notes}"


def render_html(report: dict[str, Any]) -> str:
    """Render the report as a self-contained HTML page (plots inlined as SVG)."""
    drawn = plots(report)
    title = _esc(f"rowfold report: {report.get('name', '')}")
    body = "\n".join(
        [
            _verdict(report),
            _answer(report) + _figure(drawn, "answer"),
            _refinement(report) + _figure(drawn, "refinement"),
            _inputs(report),
            _coverage(report),
            _quality(report),
            _model_test(report),
            _screening(report) + _figure(drawn, "screening"),
            "<h2 id='conditioning'>Conditioning</h2>" + _figure(drawn, "conditioning"),
            _run(report),
        ]
    )
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<style>{STYLE}</style>
</head><body>
<h1>{title}</h1>
<p>rowfold {_esc(report.get("rowfold_version"))}; job <code>{_esc(report.get("name"))}</code>;
result <code>{_esc(report.get("output"))}</code>; commit
<code>{_esc(report.get("commit"))}</code></p>
{body}
<p class="caution">{_esc(report.get("caution") or CAUTION)}</p>
</body></html>
"""
