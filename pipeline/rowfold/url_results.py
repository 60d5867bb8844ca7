"""Results on object stores: a verb runs on a private local copy, then publishes by pointer
(:mod:`rowfold.storage.published`)."""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any

from rowfold import storage
from rowfold.errors import InputError, OutputError, RowfoldError
from rowfold.planning import validate_job
from rowfold.spec import Job
from rowfold.stages import RunOutcome
from rowfold.storage import locations, published


def run_to_url(job: Job, resume: bool, run: Callable[[Job], RunOutcome]) -> RunOutcome:
    """Run a job whose result goes to an object store: ``run`` commits it in a private local
    folder (the job given to it names that folder), then it is published by pointer
    (:mod:`rowfold.storage.published`)."""
    url = str(job.output.path)
    if resume:
        raise OutputError(f"{url}: run --resume needs a local output.path (its checkpoints)")
    validate_job(job)  # a bad input fails before the store is touched
    existing = pointer_of(job)
    refuse_existing(job, existing)
    return through_url(job, existing, run)


def refuse_existing(job: Job, pointer: dict[str, Any] | None) -> None:
    """Refuse a URL output that holds a result unless ``output.overwrite``."""
    if pointer is not None and not job.output.overwrite:
        raise OutputError(
            f"{job.output.path}: a result exists (commit {pointer.get('rowfold_commit')}); set "
            "output.overwrite: true to replace it"
        )


def pointer_of(job: Job) -> dict[str, Any] | None:
    """The pointer of the job's URL result (None when there is none yet).

    Raises
    ------
    OutputError
        When the object store cannot be read (names the URL and ``output.path``).
    """
    url = str(job.output.path)
    try:
        return published.current(url, job.output.storage_options)
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot read the result's pointer "
            f"({locations.failure(exc, job.output.storage_options)}); "
            "check output.path and output.storage_options"
        ) from None


def through_url(
    job: Job, pointer: dict[str, Any] | None, verb: Callable[[Job], RunOutcome], fetch: bool = False
) -> RunOutcome:
    """Run ``verb`` on the job with its output in a private local folder (holding the
    current result's store first when ``fetch``), then publish what it committed there,
    provided the pointer still names the commit read before (else exit 2)."""
    url, options = str(job.output.path), job.output.storage_options
    with published.private_folder() as scratch:
        store = scratch / url.rpartition("/")[2]
        if fetch and pointer is not None:
            try:
                published.fetch_store(pointer, options, store)
            except Exception as exc:
                raise OutputError(
                    f"{pointer['store']}: cannot read the current result "
                    f"({locations.failure(exc, options)}); "
                    "check output.path and output.storage_options"
                ) from None
        local = replace(job, output=replace(job.output, path=store, overwrite=True))
        try:
            outcome = verb(local)
        except RowfoldError as exc:  # name the URL, not the private folder
            raise renamed(exc, str(store), url) from None
        parts = [store, *storage.report_paths(store)]
        commit = str(outcome.report["commit"])
        record = published.publish(url, options, commit, parts, published.commit_of(pointer))
    return RunOutcome(outcome.status, outcome.report, str(record["store"]))


def renamed(exc: RowfoldError, local: str, url: str) -> RowfoldError:
    """The error with the private folder's store named by its URL instead."""
    text = str(exc)
    if local not in text:
        return exc
    try:
        return type(exc)(text.replace(local, url))
    except TypeError:  # an error class with other arguments: keep it as it is
        return exc


def segments_on_url(job: Job, verb: str, action: Callable[[Job], RunOutcome]) -> RunOutcome:
    """``update``, ``replace`` or ``retire`` of a result at a URL: fetch the current
    result, change it locally as a local result, publish the new one by pointer."""
    pointer = pointer_of(job)
    if pointer is None:
        raise InputError(
            f"{job.output.path}: no earlier result to {verb} (no pointer "
            f"{published.pointer_url(str(job.output.path))}; key output.path); "
            "run `rowfold run` first"
        )
    return through_url(job, pointer, action, fetch=True)


def compare_to_url(
    job: Job, compare: Callable[[Job], tuple[list[dict[str, Any]], Path | str, Path | str]]
) -> tuple[list[dict[str, Any]], str, str]:
    """``compare_job`` for a URL output: ``compare`` compares locally (the job given to it
    names a private folder), and the comparison's three parts (the method results' folder,
    the JSON, the HTML) are published by pointer."""
    import uuid

    url, options = str(job.output.path), job.output.storage_options
    stem = url.rpartition("/")[2].rpartition(".")[0] or url.rpartition("/")[2]
    base = f"{url.rpartition('/')[0]}/{stem}.compare"
    try:
        pointer = published.current(base, options)
    except Exception as exc:
        raise OutputError(
            f"{url}: cannot read the comparison's pointer ({locations.failure(exc, options)}); "
            "check output.path and output.storage_options"
        ) from None
    with published.private_folder() as scratch:
        store = scratch / url.rpartition("/")[2]
        local = replace(job, output=replace(job.output, path=store, overwrite=True))
        try:
            records, json_path, html_path = compare(local)
        except RowfoldError as exc:
            raise renamed(exc, str(store), url) from None
        parts = [scratch / f"{stem}.compare", Path(json_path), Path(html_path)]
        commit = uuid.uuid4().hex
        record = published.publish(base, options, commit, parts, published.commit_of(pointer))
    return records, record["parts"][parts[1].name], record["parts"][parts[2].name]


def inspect_url(url: str) -> dict[str, Any]:
    """Describe the result a URL's pointer names (its store fetched without the row arrays'
    chunks into a private folder; the file system's own environment gives its options).

    Raises
    ------
    InputError
        When there is no pointer, or the store cannot be read (names the URL).
    """
    try:
        pointer = published.current(url)
        if pointer is None:
            raise InputError(f"{published.pointer_url(url)}: no result published at {url}")
        with published.private_folder() as scratch:
            store = scratch / url.rpartition("/")[2]
            published.fetch_store(pointer, "", store)
            info = storage.describe_path(store)
            report = published.read_part(pointer, storage.report_paths(store)[0].name)
    except RowfoldError:
        raise
    except Exception as exc:
        raise InputError(
            f"{url}: cannot read the published result ({locations.failure(exc)})"
        ) from None
    info["path"] = str(pointer["store"])
    info["pointer"] = pointer
    if report is not None:
        info["report"] = json.loads(report)
    return info
