"""Command line: ``rowfold VERB ...`` (also ``python -m rowfold``).

Verbs call :mod:`rowfold.runner` and nothing deeper. Exit statuses: 0 success, 2 invalid
job or input (nothing computed or written), 3 written but a quality gate failed or could
not be evaluated, 4 failed while running (no earlier result replaced), 130 / 143 stopped by
SIGINT / SIGTERM (cleaned up, no earlier result replaced). Errors are one line on stderr;
``--debug`` adds the traceback.

The signal handlers are installed first thing in :func:`main`, before the heavy imports
(runner, dask, h5py), so a signal during start-up is handled like one during the run.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from rowfold import __version__, interrupts, testhooks
from rowfold.progress import Progress, local_stamp

if TYPE_CHECKING:
    from rowfold.runner import RunOutcome

EXIT_INVALID, EXIT_RUN_FAILED = 2, 4  # as in rowfold.errors (imported later, it needs numpy)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rowfold",
        description="Out-of-core QR and least squares for tall-skinny matrices on disk.",
    )
    parser.add_argument("--version", action="version", version=f"rowfold {__version__}")
    _global_options(parser, defaults=True)
    common = argparse.ArgumentParser(add_help=False)
    _global_options(common, defaults=False)
    verbs = _Verbs(parser.add_subparsers(dest="verb", required=True, metavar="VERB"), common)
    run = verbs.add_parser("run", help="run jobs; write their result stores and reports")
    run.add_argument("jobs", type=Path, nargs="+", metavar="JOB", help="job files or folders")
    run.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE")
    run.add_argument(
        "--inline", action="store_true", help="run in this process without a Dask cluster"
    )
    run.add_argument(
        "--fail-fast", action="store_true", help="stop at the first job that does not exit 0"
    )
    run.add_argument(
        "--resume",
        action="store_true",
        help="reuse the checkpoints an interrupted run of the same job left (tsqr)",
    )
    _wait_lock_option(run)
    compare = verbs.add_parser("compare", help="run one job with several methods side by side")
    compare.add_argument("job", type=Path)
    compare.add_argument(
        "--methods", required=True, help="comma-separated method names, e.g. tsqr,cholqr2,auto"
    )
    compare.add_argument(
        "--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE"
    )
    compare.add_argument(
        "--inline", action="store_true", help="run in this process without a Dask cluster"
    )
    update = verbs.add_parser("update", help="fold rows appended since the last run into it")
    update.add_argument("job", type=Path)
    update.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE")
    update.add_argument(
        "--inline", action="store_true", help="run in this process without a Dask cluster"
    )
    update.add_argument("--label", default=None, help="label of the new segment (update.label)")
    _wait_lock_option(update)
    _segment_verbs(verbs)
    check = verbs.add_parser("check", help="validate a job file and its inputs, compute nothing")
    check.add_argument("job", type=Path)
    check.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE")
    demo = verbs.add_parser("demo", help="write the demo scenario into DIR and run it")
    demo.add_argument("dir", nargs="?", type=Path, default=Path("rowfold-demo"))
    demo.add_argument("--rows", type=int, default=None, help="observations (default 300000)")
    inspect = verbs.add_parser(
        "inspect", help="describe an input file or a result store (a URL result by its pointer)"
    )
    inspect.add_argument("path", type=_path_or_url)
    inspect.add_argument(
        "--json", action="store_true", help="print every array, attribute and the report as JSON"
    )
    return parser


def _path_or_url(text: str) -> Path | str:
    """A local path, or a URL (``scheme://...``) kept as text."""
    import re

    return text if re.match(r"[A-Za-z][A-Za-z0-9+.-]*://", text) else Path(text)


def _global_options(parser: argparse.ArgumentParser, defaults: bool) -> None:
    """Add the options every verb takes, before or after the verb.

    The copy after the verb has no defaults (``SUPPRESS``), so that it only overrides what
    was given before the verb when it is given itself.
    """

    def default(value: Any) -> Any:
        return value if defaults else argparse.SUPPRESS

    parser.add_argument(
        "--debug", action="store_true", default=default(False), help="show tracebacks on errors"
    )
    parser.add_argument(
        "--quiet", action="store_true", default=default(False), help="no progress, only errors"
    )
    parser.add_argument(
        "--log-file",
        type=Path,
        default=default(None),
        help="also append time-stamped progress, summaries and errors to this file",
    )


class _Verbs:
    """The verbs' sub-parsers, each taking the global options too."""

    def __init__(self, actions: Any, common: argparse.ArgumentParser) -> None:
        self.actions, self.common = actions, common

    def add_parser(self, name: str, help: str) -> argparse.ArgumentParser:
        """Add one verb."""
        parser: argparse.ArgumentParser = self.actions.add_parser(
            name, help=help, parents=[self.common]
        )
        return parser


def _segment_verbs(verbs: Any) -> None:
    """``replace`` and ``retire``: change one segment of an earlier result (rowfold.segments)."""
    replace = verbs.add_parser("replace", help="read one segment's rows again and refactor them")
    replace.add_argument("job", type=Path)
    replace.add_argument("label", help="the segment's label")
    retire = verbs.add_parser("retire", help="drop segments from the answer; reads no rows")
    retire.add_argument("job", type=Path)
    retire.add_argument("labels", nargs="+", metavar="LABEL", help="labels of the segments")
    for parser in (replace, retire):
        parser.add_argument(
            "--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE"
        )
        _wait_lock_option(parser)
    replace.add_argument(
        "--inline", action="store_true", help="run in this process without a Dask cluster"
    )


def _segment_line(outcome: RunOutcome) -> str:
    """What a segment verb read and what the answer now covers, wrapped at 80 columns."""
    info = outcome.report.get("segments") or {}
    step = info.get("step") or {}
    ranges = ", ".join(f"{a}..{b - 1}" for a, b in step.get("rows_read", [])) or "none"
    read = f"{step.get('verb', 'run')}: read {_rows(step.get('rows_read_count', 0))}"
    sentences = [f"{read} ({ranges})"]
    if step.get("rows_checked_by_digest"):
        sentences.append(f"hashed {_rows(step['rows_checked_by_digest'], 'old row')} to check")
    if step.get("retired"):
        sentences.append(f"retired {', '.join(step['retired'])}")
    labels = ", ".join(s["label"] for s in info.get("covered", []))
    covered = _count(info.get("segments_covered") or 0, "segment")
    rows = _rows(info.get("rows_covered") or 0)
    sentences.append(f"the answer covers {rows} in {covered}: {labels}")
    return _wrapped("; ".join(sentences))


def _rows(number: int, word: str = "row") -> str:
    """``1 row``, ``75,000 rows``."""
    return f"{number:,} {word if number == 1 else word + 's'}"


def _wrapped(text: str) -> str:
    """``text`` wrapped at 80 columns, later lines indented; paths and labels stay whole."""
    import textwrap

    wrapper = textwrap.TextWrapper(
        width=80, subsequent_indent="    ", break_on_hyphens=False, break_long_words=False
    )
    return wrapper.fill(text)


def _replace(args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner

    job = runner.load_job(args.job, tuple(args.overrides))
    outcome = runner.replace_job(job, args.label, progress, args.inline, args.wait_lock)
    _say(_segment_line(outcome) + "\n" + _summary(outcome))
    return outcome.status


def _retire(args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner

    job = runner.load_job(args.job, tuple(args.overrides))
    outcome = runner.retire_job(job, list(args.labels), progress, args.wait_lock)
    _say(_segment_line(outcome) + "\n" + _summary(outcome))
    return outcome.status


def _wait_lock_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--wait-lock",
        type=float,
        default=0.0,
        metavar="SECONDS",
        help="when another run holds the output, wait up to SECONDS for it (default: refuse)",
    )


_LOG: list[TextIO] = []  # the open --log-file, if any


def _count(number: int, word: str, plural: str | None = None) -> str:
    """``1 block``, ``3 blocks``."""
    return f"{number} {word if number == 1 else plural or word + 's'}"


def _log(message: str) -> None:
    stamp = local_stamp()
    for handle in _LOG:
        handle.write("".join(f"{stamp} {line}\n" for line in message.splitlines()))
        handle.flush()


def _say(message: str) -> None:
    print(message, flush=True)
    _log(message)


def _error(message: str) -> None:
    print(message, file=sys.stderr, flush=True)
    _log(message)


def _summary(outcome: RunOutcome) -> str:
    report = outcome.report

    def fmt(value: Any) -> str:
        return (
            "n/a" if value is None else f"{value:.2e}" if isinstance(value, float) else str(value)
        )

    failed = [name for name, gate in report["gates"].items() if gate["held"] is False]
    unknown = [name for name, gate in report["gates"].items() if gate["held"] is None]
    lines = [
        f"{report['name']}:",
        f"  {report['method']} on {report['rows']:,} x {report['cols']} "
        f"in {_count(report['blocks'], 'block')}, "
        f"{_count(report['passes_over_input'], 'pass', 'passes')} over A",
        f"  rank {report['rank']}, cond(R) {fmt(report['r_condition'])}, "
        f"orthogonality loss {fmt(report['orthogonality_loss'])}",
        f"  gram residual {fmt(report['gram_residual'])}",
        f"  wrote {outcome.output}",
    ]
    lines += [_wrapped(f"  warning: {w}") for w in report.get("warnings", [])]
    if failed:
        lines.append(f"  quality gate failed: {', '.join(failed)} (see the report)")
    if unknown:
        lines.append(f"  quality gate not evaluated: {', '.join(unknown)} (exit 3; see the report)")
    return "\n".join(lines)


def _job_files(paths: list[Path]) -> list[Path]:
    """Expand folders into the job files they hold (``*.yaml``/``*.yml``, sorted)."""
    files: list[Path] = []
    for path in paths:
        if path.is_dir():
            files += sorted(p for p in path.iterdir() if p.suffix in (".yaml", ".yml"))
        else:
            files.append(path)
    return files


def _run_one(path: Path, args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner

    job = runner.load_job(path, tuple(args.overrides))
    outcome = runner.run_job(
        job, progress, inline=args.inline, resume=args.resume, wait_lock=args.wait_lock
    )
    _say(_summary(outcome))
    return outcome.status


def _run(args: argparse.Namespace, progress: Progress) -> int:
    files = _job_files(args.jobs)
    if len(files) == 1:
        return _run_one(files[0], args, progress)
    invalid = _invalid_jobs(files, args)
    if invalid:
        _error(f"rowfold: {_count(len(invalid), 'job')} of {len(files)} invalid; none was run")
        return max(invalid)
    statuses: list[tuple[Path, int, str]] = []
    for path in files:
        status, note = _guarded(lambda p=path: _run_one(p, args, progress), args)
        statuses.append((path, status, note))
        if status != 0 and args.fail_fast:
            break
    _say("\n".join(["job summary:", *(f"  {s}  {p}  {n}".rstrip() for p, s, n in statuses)]))
    return max(status for _, status, _ in statuses)


def _invalid_jobs(files: list[Path], args: argparse.Namespace) -> list[int]:
    """Validate every job before the first computes; return the statuses of those that fail."""
    from rowfold import runner

    def validate(path: Path) -> int:
        runner.validate_job(runner.load_job(path, tuple(args.overrides)))
        return 0

    statuses = [_guarded(lambda p=path: validate(p), args)[0] for path in files]
    return [status for status in statuses if status != 0]


def _guarded(action: Any, args: argparse.Namespace) -> tuple[int, str]:
    """Run one job of several; an error is printed and becomes its status."""
    from rowfold.errors import RowfoldError

    try:
        return int(action()), ""
    except RowfoldError as exc:
        _error(f"rowfold: error: {exc}")
        return exc.exit_status, str(exc).splitlines()[0][:120]
    except Exception as exc:
        if args.debug:
            traceback.print_exc()
        _error(f"rowfold: failed: {exc.__class__.__name__}: {exc}")
        return EXIT_RUN_FAILED, exc.__class__.__name__


def _compare(args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner
    from rowfold.errors import JobError

    job = runner.load_job(args.job, tuple(args.overrides))
    methods = [name.strip() for name in args.methods.split(",") if name.strip()]
    unknown = [name for name in methods if name not in runner.METHOD_NAMES]
    if unknown or not methods:
        raise JobError(
            f"--methods {args.methods!r}: unknown method {', '.join(unknown) or '(none given)'}; "
            f"expected names from: {', '.join(runner.METHOD_NAMES)}"
        )
    records, json_path, html_path = runner.compare_job(job, methods, progress, args.inline)
    _say(runner.comparison_table(records))
    _say(f"wrote {json_path}\nwrote {html_path}")
    return 0


def _update(args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner

    label = () if args.label is None else (f"update.label={args.label}",)
    job = runner.load_job(args.job, (*args.overrides, *label))
    try:
        outcome = runner.update_job(job, progress, inline=args.inline, wait_lock=args.wait_lock)
    except runner.NoNewRowsError as exc:
        _say(f"{exc}; nothing to do")
        return 0
    added = outcome.report["update"]["rows_added"]
    _say(f"folded {added} new rows into the earlier result\n{_segment_line(outcome)}")
    _say(_summary(outcome))
    return outcome.status


def _check(args: argparse.Namespace) -> int:
    from rowfold import runner

    job = runner.load_job(args.job, tuple(args.overrides))
    summary = runner.check_job(job)
    _say(
        f"{args.job}: ok: {summary['rows']} x {summary['cols']} {summary['dtype']}, "
        f"{_count(summary['blocks'], 'block')} of {_count(summary['rows_per_block'], 'row')}, "
        f"method {summary['method']}, output {summary['output']}"
    )
    for warning in summary["warnings"]:
        _say(_wrapped(f"  warning: {warning}"))
    return 0


def _demo(args: argparse.Namespace, progress: Progress) -> int:
    from rowfold import runner

    worst = 0
    for outcome in runner.run_demo(args.dir, progress, rows=args.rows):
        _say(_segment_line(outcome) + "\n" + _summary(outcome))
        worst = max(worst, outcome.status)
    return worst


def _inspect(args: argparse.Namespace) -> int:
    from rowfold import runner

    info = runner.inspect_path(args.path)
    if args.json:
        _say(json.dumps(info, indent=2, default=str))
    else:
        from rowfold.inspection import human_summary

        _say(human_summary(info))
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line and return the exit status.

    SIGINT and SIGTERM stop the run cleanly (see :mod:`rowfold.interrupts`) and give
    130 or 143.
    """
    with interrupts.handled():
        try:
            testhooks.reached("startup")
            return _main(argv)
        except interrupts.Interrupted as exc:  # during start-up, before the verb runs
            _error(_interrupted_line(exc))
            return exc.exit_status
        except KeyboardInterrupt:  # outside the handlers' reach (e.g. not the main thread)
            _error("rowfold: interrupted; no result was written, the previous one is kept")
            return 130


def _interrupted_line(exc: interrupts.Interrupted) -> str:
    if exc.committed is not None:
        return f"rowfold: interrupted by {exc.name} after committing {exc.committed}; stopped"
    return f"rowfold: interrupted by {exc.name}; nothing was written, the previous result is kept"


def _main(argv: Sequence[str] | None) -> int:
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0) if exc.code in (0, None) else EXIT_INVALID
    if args.log_file is not None:
        try:
            _LOG.append(open(args.log_file, "a", encoding="utf-8"))  # noqa: SIM115
        except OSError as exc:
            print(f"rowfold: error: --log-file {args.log_file}: {exc.strerror}", file=sys.stderr)
            return EXIT_INVALID
    progress = Progress(stream=None if args.quiet else sys.stderr, log=_LOG[0] if _LOG else None)
    notes = _NoteHandler(quiet=args.quiet)
    logging.getLogger("rowfold").addHandler(notes)
    try:
        return _dispatch(args, progress)
    except interrupts.Interrupted as exc:  # said here too, so that --log-file records it
        _error(_interrupted_line(exc))
        return exc.exit_status
    finally:
        progress.close()
        logging.getLogger("rowfold").removeHandler(notes)
        while _LOG:
            _LOG.pop().close()


class _NoteHandler(logging.Handler):
    """Notes from rowfold's own loggers (e.g. a recovered commit): stderr and the log file."""

    def __init__(self, quiet: bool) -> None:
        super().__init__(logging.WARNING)
        self.quiet = quiet

    def emit(self, record: logging.LogRecord) -> None:
        line = f"rowfold: note: {record.getMessage()}"
        if not self.quiet:
            print(line, file=sys.stderr, flush=True)
        _log(line)


def _dispatch(args: argparse.Namespace, progress: Progress) -> int:
    """Run the verb; turn errors into one line and an exit status."""
    from rowfold.errors import RowfoldError

    try:
        if args.verb == "run":
            return _run(args, progress)
        if args.verb == "update":
            return _update(args, progress)
        if args.verb in ("replace", "retire"):
            return (_replace if args.verb == "replace" else _retire)(args, progress)
        if args.verb == "compare":
            return _compare(args, progress)
        if args.verb == "check":
            return _check(args)
        if args.verb == "demo":
            return _demo(args, progress)
        return _inspect(args)
    except RowfoldError as exc:
        if args.debug:
            traceback.print_exc()
        _error(f"rowfold: error: {exc}")
        return exc.exit_status
    except Exception as exc:
        if args.debug:
            traceback.print_exc()
        hint = "" if args.debug else " (rerun with --debug for details)"
        _error(f"rowfold: failed: {exc.__class__.__name__}: {exc}{hint}")
        return EXIT_RUN_FAILED
