"""The short human summary that ``rowfold inspect`` prints (``--json`` prints everything).

:func:`human_summary` turns what :func:`rowfold.runner.inspect_path` returns into a few
lines: what the path is, one line per array (shape, dtype, chunks, compression and what the
array holds), CSR groups as one sparse matrix each, and the report's headline figures when
the path is a result store. It reads nothing itself.
"""

from __future__ import annotations

from typing import Any

# What each array of a result store holds (see SPEC.md, "Result store").
ARRAY_MEANINGS = {
    "R": "triangular factor R (n x n)",
    "Q": "orthonormal factor Q (m x n)",
    "x": "least-squares solution",
    "x_stderr": "standard errors of x",
    "x_covariance": "covariance of x",
    "qhb": "Q^H b",
    "residuals": "residuals b - A x",
    "standardized_residuals": "standardized residuals",
    "studentized_residuals": "leave-one-out studentized residuals",
    "leverage": "leverages h_i (diagonal of the hat matrix)",
    "redundancy": "redundancy numbers 1 - h_i",
    "column_scale": "column equilibration scale",
}
CSR_PARTS = ("data", "indices", "indptr")


def human_summary(info: dict[str, Any]) -> str:
    """Describe an input file or result store in a few lines.

    Parameters
    ----------
    info : dict
        What :func:`rowfold.runner.inspect_path` returned.

    Returns
    -------
    str
        Lines for a terminal, at most about 100 characters wide.
    """
    arrays: dict[str, dict[str, Any]] = info.get("arrays", {})
    groups: dict[str, dict[str, Any]] = info.get("groups", {})
    report = info.get("report")
    kind = "result store" if report or "rowfold_version" in info.get("attrs", {}) else "input"
    commit = info.get("attrs", {}).get("rowfold_commit")
    made = f", commit {commit}" if commit else ""
    lines = [f"{info['path']}: {kind}{made}, {len(arrays)} arrays"]
    lines += _sparse_lines(groups, arrays)
    shown = sorted(
        (name for name in arrays if not _in_csr_group(name, groups)),
        key=lambda name: (name.startswith("state/"), name),
    )
    lines += _array_lines(shown, arrays)
    if report:
        lines += _report_lines(report)
    lines.append("(rowfold inspect --json PATH prints every array, attribute and the report)")
    return "\n".join(lines)


def _in_csr_group(name: str, groups: dict[str, dict[str, Any]]) -> bool:
    group, _, part = name.rpartition("/")
    return group in groups and part in CSR_PARTS


def _sparse_lines(groups: dict[str, dict[str, Any]], arrays: dict[str, Any]) -> list[str]:
    lines = []
    for name, attrs in groups.items():
        data = arrays.get(f"{name}/data")
        if data is None:
            continue
        shape = " x ".join(str(v) for v in attrs.get("shape", []))
        lines.append(
            f"  {name:<24} CSR sparse {shape}, {data['shape'][0]:,} stored values, "
            f"{_dtype(data['dtype'])}"
        )
    return lines


def _array_lines(names: list[str], arrays: dict[str, dict[str, Any]]) -> list[str]:
    lines = []
    for name in names:
        array = arrays[name]
        shape = " x ".join(f"{v:,}" for v in array["shape"]) or "scalar"
        chunks = array.get("chunks")
        layout = "contiguous" if not chunks else "chunks " + "x".join(f"{v:,}" for v in chunks)
        codec = (array.get("compression") or "none").removesuffix("Codec").lower()
        meaning = ARRAY_MEANINGS.get(name, "update state" if name.startswith("state/") else "")
        text = f"  {name:<23} {shape:<13} {_dtype(array['dtype']):<8} {layout:<20} {codec:<5}"
        lines.append(f"{text}  {meaning}".rstrip())
    return lines


def _dtype(code: str) -> str:
    names = {"<f8": "float64", "<f4": "float32", "<c16": "complex128", "<c8": "complex64"}
    names |= {"<i8": "int64", "<i4": "int32", "|u1": "uint8", "|b1": "bool"}
    return names.get(code, code)


def _report_lines(report: dict[str, Any]) -> list[str]:
    gates = report.get("gates", {})
    failed = sorted(name for name, gate in gates.items() if gate.get("held") is False)
    unknown = sorted(name for name, gate in gates.items() if gate.get("held") is None)
    status = "all held" if gates and not failed and not unknown else "none set"
    if failed or unknown:
        status = ", ".join(
            part
            for part in (
                f"failed: {', '.join(failed)}" if failed else "",
                f"not evaluated: {', '.join(unknown)}" if unknown else "",
            )
            if part
        )
    condition = report.get("r_condition")
    return [
        f"report: job {report.get('name')}, {report.get('method_used') or report.get('method')} "
        f"on {report.get('rows'):,} x {report.get('cols')}, rank {report.get('rank')}, "
        f"cond(R) {'n/a' if condition is None else f'{condition:.3g}'}, "
        f"exit status {report.get('exit_status')}",
        f"gates: {status}",
    ]
