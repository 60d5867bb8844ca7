"""Job-file parsing: :func:`rowfold.spec.load_job` against the product contract.

The contract is SPEC.md, "Job file": unknown keys are an error that names the key and the file
line, relative paths are relative to the job file, ``--set key.path=value`` overrides one key,
and every problem with the job file is a :class:`rowfold.errors.JobError` (exit status 2).
Expected errors and expected values live in one table; each row says what it exercises.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rowfold.errors import JobError
from rowfold.spec import Job, load_job

# A minimal valid job; rows below are written out in full so that line numbers can be read
# straight off the text.
GOOD = """\
name: levelling
input:
  path: data/net.h5
  matrix: network/A
output:
  path: results/net.h5
"""


@dataclass(frozen=True)
class Raises:
    """Expect a JobError whose message holds every one of ``parts`` (regular expressions)."""

    parts: tuple[str, ...]


@dataclass(frozen=True)
class Gives:
    """Expect ``attribute`` (a dotted path on the Job) to equal ``value``.

    ``value`` may be a callable taking the job file's folder, for resolved paths.
    """

    attribute: str
    value: Any


def _folder_path(relative: str) -> Callable[[Path], Path]:
    return lambda folder: (folder / relative).resolve()


def _get(job: Job, dotted: str) -> Any:
    value: Any = job
    for part in dotted.split("."):
        value = getattr(value, part)
    return value


CASES = [
    # ---------------------------------------------------------------- defaults
    pytest.param(GOOD, (), Gives("method.name", "tsqr"), id="default-method-tsqr"),
    pytest.param(GOOD, (), Gives("method.tree", "binary"), id="default-tree-binary"),
    pytest.param(GOOD, (), Gives("output.q", False), id="default-q-false"),
    pytest.param(GOOD, (), Gives("output.overwrite", False), id="default-overwrite-false"),
    pytest.param(GOOD, (), Gives("input.rhs", None), id="default-no-rhs"),
    pytest.param(GOOD, (), Gives("input.rows_per_block", None), id="default-rows-auto"),
    pytest.param(GOOD, (), Gives("gates.gram", None), id="default-no-gates"),
    pytest.param(GOOD, (), Gives("cluster.processes", None), id="default-cluster-auto"),
    pytest.param(GOOD, (), Gives("name", "levelling"), id="name-kept"),
    pytest.param(
        GOOD.replace("name: levelling\n", ""), (), Gives("name", "job"), id="name-from-file-stem"
    ),
    pytest.param(
        GOOD + "method:\n",
        (),
        Gives("method.name", "tsqr"),
        id="empty-section-gives-defaults",
    ),
    pytest.param(
        GOOD + "gates:\n  # gram: 1.0e-12\n",
        (),
        Gives("gates.gram", None),
        id="commented-out-section-gives-defaults",
    ),
    pytest.param(
        GOOD + "cluster:\n  address:\n",
        (),
        Gives("cluster.address", None),
        id="empty-value-is-null",
    ),
    pytest.param(
        GOOD + "cluster:\n  address: ~\n",
        (),
        Gives("cluster.address", None),
        id="tilde-value-is-null",
    ),
    # ---------------------------------------------------------------- paths
    pytest.param(
        GOOD, (), Gives("input.path", _folder_path("data/net.h5")), id="relative-input-path"
    ),
    pytest.param(
        GOOD, (), Gives("output.path", _folder_path("results/net.h5")), id="relative-output-path"
    ),
    pytest.param(
        GOOD.replace("data/net.h5", "../up/net.hdf5"),
        (),
        Gives("input.path", _folder_path("../up/net.hdf5")),
        id="relative-path-with-dotdot",
    ),
    pytest.param(
        GOOD.replace("data/net.h5", "/srv/shared/net.zarr"),
        (),
        Gives("input.path", Path("/srv/shared/net.zarr")),
        id="absolute-path-kept",
    ),
    pytest.param(
        GOOD.replace("results/net.h5", "results/net.ZARR"),
        (),
        Gives("output.path", _folder_path("results/net.ZARR")),
        id="suffix-case-insensitive",
    ),
    pytest.param(
        GOOD.replace("data/net.h5", "data/net.csv"),
        (),
        Raises((r"job\.yaml line 3", r"key 'input\.path'", r"\.h5", r"net\.csv")),
        id="csv-input-rejected",
    ),
    pytest.param(
        GOOD.replace("results/net.h5", "results/net.csv"),
        (),
        Raises((r"line 6", r"key 'output\.path'", r"\.zarr")),
        id="csv-output-rejected",
    ),
    pytest.param(
        GOOD.replace("data/net.h5", "data/net"),
        (),
        Raises((r"key 'input\.path'", r"ending in")),
        id="input-without-suffix-rejected",
    ),
    # ---------------------------------------------------------------- unknown keys
    pytest.param(
        GOOD + "colour: blue\n",
        (),
        Raises((r"job\.yaml line 7", r"key 'colour'", r"unknown key", r"input")),
        id="unknown-top-level-key",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  matirx: B\n"),
        (),
        Raises((r"job\.yaml line 5", r"key 'input\.matirx'", r"unknown key", r"rows_per_block")),
        id="unknown-key-in-section",
    ),
    pytest.param(
        GOOD + "gates:\n  gram: 1.0e-12\n  orthogonalty: 1.0e-12\n",
        (),
        Raises((r"line 9", r"key 'gates\.orthogonalty'", r"unknown key")),
        id="misspelt-gate",
    ),
    # ---------------------------------------------------------------- wrong types
    pytest.param(
        GOOD + "method:\n  name: qr\n",
        (),
        Raises((r"line 8", r"key 'method\.name'", r"tsqr", r"cholqr2", r"'qr'")),
        id="unknown-method-name",
    ),
    pytest.param(
        GOOD + '  q: "yes"\n',
        (),
        Raises((r"line 7", r"key 'output\.q'", r"true or false", r"'yes'")),
        id="q-as-text",
    ),
    pytest.param(
        GOOD + "  overwrite: 1\n",
        (),
        Raises((r"key 'output\.overwrite'", r"true or false")),
        id="overwrite-as-number",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  rows_per_block: -3\n"),
        (),
        Raises((r"line 5", r"key 'input\.rows_per_block'", r"'auto' or a whole number", r"-3")),
        id="negative-rows-per-block",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  rows_per_block: 2.5\n"),
        (),
        Raises((r"key 'input\.rows_per_block'",)),
        id="fractional-rows-per-block",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  rows_per_block: 4096\n"),
        (),
        Gives("input.rows_per_block", 4096),
        id="integer-rows-per-block",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  rows_per_block: auto\n"),
        (),
        Gives("input.rows_per_block", None),
        id="auto-rows-per-block",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: [network, A]\n"),
        (),
        Raises((r"line 4", r"key 'input\.matrix'", r"text")),
        id="matrix-as-list",
    ),
    pytest.param(
        GOOD + "gates:\n  gram: 0\n",
        (),
        Raises((r"line 8", r"key 'gates\.gram'", r"positive")),
        id="zero-gate",
    ),
    pytest.param(
        GOOD + "gates:\n  gram: true\n",
        (),
        Raises((r"key 'gates\.gram'", r"positive")),
        id="boolean-gate",
    ),
    pytest.param(GOOD + "gates:\n  gram: 1\n", (), Gives("gates.gram", 1.0), id="integer-gate"),
    pytest.param(
        GOOD + "method: tsqr\n",
        (),
        Raises((r"line 7", r"key 'method'", r"mapping", r"text")),
        id="section-as-text",
    ),
    pytest.param(
        GOOD + "cluster:\n  workers: 0\n",
        (),
        Raises((r"key 'cluster\.workers'",)),
        id="zero-workers",
    ),
    pytest.param(
        "name: [a, b]\n" + GOOD.replace("name: levelling\n", ""),
        (),
        Raises((r"line 1", r"key 'name'", r"text")),
        id="name-as-list",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  weights: network/w\n"),
        (),
        Gives("input.weights", "network/w"),
        id="weights-dataset-kept",
    ),
    pytest.param(
        GOOD + "solve:\n  refine: 1\n",
        (),
        Raises((r"line 8", r"key 'solve\.refine'", r"true or false")),
        id="refine-as-number",
    ),
    # ---------------------------------------------------------------- refused before any compute
    pytest.param(
        GOOD + "solve:\n  flag_above: .inf\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.flag_above'", r"finite", r"inf")),
        id="infinite-flag-above",
    ),
    pytest.param(
        GOOD + "solve:\n  flag_above: 2.5\n",
        (),
        Gives("solve.flag_above", 2.5),
        id="finite-flag-above-kept",
    ),
    pytest.param(
        GOOD + "solve:\n  sigma0: 0.002\n  alpha: 0.01\n  alpha_observation: 0.0001\n",
        (),
        Gives("solve.sigma0", 0.002),
        id="model-test-keys-kept",
    ),
    pytest.param(
        GOOD,
        (),
        Gives("solve.alpha_observation", 0.001),
        id="alpha-observation-default-common-practice",
    ),
    pytest.param(
        GOOD + "solve:\n  sigma0: -1\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.sigma0'", r"positive finite", r"-1")),
        id="negative-sigma0",
    ),
    pytest.param(
        GOOD + "solve:\n  sigma0: .inf\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.sigma0'", r"finite")),
        id="infinite-sigma0",
    ),
    pytest.param(
        GOOD + "solve:\n  alpha: 1\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.alpha'", r"between 0 and 1", r"1")),
        id="alpha-one",
    ),
    pytest.param(
        GOOD + "solve:\n  alpha: .nan\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.alpha'", r"between 0 and 1")),
        id="alpha-nan",
    ),
    pytest.param(
        GOOD + "solve:\n  refine: false\n  alpha_observation: 0\n",
        (),
        Raises((r"job\.yaml line 9", r"key 'solve\.alpha_observation'", r"between 0 and 1")),
        id="alpha-observation-zero",
    ),
    pytest.param(
        GOOD + "solve:\n  alpha: '0.05'\n",
        (),
        Raises((r"line 8", r"key 'solve\.alpha'", r"significance level")),
        id="alpha-as-text",
    ),
    pytest.param(
        GOOD + "solve:\n  observation_test: baarda\n",
        (),
        Raises((r"line 8", r"key 'solve\.observation_test'", r"estimated, known_sigma0")),
        id="unknown-observation-test",
    ),
    pytest.param(
        GOOD + "solve:\n  observation_test: known_sigma0\n",
        (),
        Gives("solve.observation_test", "known_sigma0"),
        id="known-sigma0-test-kept",
    ),
    pytest.param(
        GOOD + "gates:\n  model_test: 0.05\n",
        (),
        Raises((r"line 8", r"key 'gates\.model_test'", r"true or false")),
        id="model-test-gate-not-a-flag",
    ),
    pytest.param(
        GOOD + "gates:\n  model_test: true\n",
        (),
        Gives("gates.model_test", True),
        id="model-test-gate-kept",
    ),
    pytest.param(
        GOOD + "gates:\n  gram: .inf\n",
        (),
        Raises((r"line 8", r"key 'gates\.gram'", r"finite")),
        id="infinite-gate",
    ),
    pytest.param(
        GOOD + "solve:\n  rank_tolerance: 10\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'solve\.rank_tolerance'", r"between 0 and 1", r"10")),
        id="rank-tolerance-above-one",
    ),
    pytest.param(
        GOOD + "solve:\n  rank_tolerance: 1\n",
        (),
        Raises((r"line 8", r"key 'solve\.rank_tolerance'", r"between 0 and 1")),
        id="rank-tolerance-one",
    ),
    pytest.param(
        GOOD + "solve:\n  rank_tolerance: 1.0e-10\n",
        (),
        Gives("solve.rank_tolerance", 1e-10),
        id="rank-tolerance-kept",
    ),
    pytest.param(
        GOOD + "cluster:\n  address: not a url\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'cluster\.address'", r"tcp://", r"'not a url'")),
        id="address-not-a-url",
    ),
    pytest.param(
        GOOD + "cluster:\n  address: http://sched:8786\n",
        (),
        Raises((r"line 8", r"key 'cluster\.address'", r"tcp://")),
        id="address-with-web-scheme",
    ),
    pytest.param(
        GOOD + "cluster:\n  address: tcp://sched-1.example:8786\n",
        (),
        Gives("cluster.address", "tcp://sched-1.example:8786"),
        id="address-kept",
    ),
    pytest.param(
        GOOD + "cluster:\n  address: tls://[::1]:8786\n",
        (),
        Gives("cluster.address", "tls://[::1]:8786"),
        id="address-ipv6-kept",
    ),
    pytest.param(
        GOOD + "cluster:\n  workers: 100000\n",
        (),
        Raises((r"job\.yaml line 8", r"key 'cluster\.workers'", r"cores", r"100000")),
        id="workers-beyond-the-machine",
    ),
    pytest.param(
        GOOD + "cluster:\n  threads_per_worker: 100000\n",
        (),
        Raises((r"line 8", r"key 'cluster\.threads_per_worker'", r"cores")),
        id="threads-beyond-the-machine",
    ),
    pytest.param(
        GOOD + "cluster:\n  workers: 100000\n  address: tcp://sched:8786\n",
        (),
        Gives("cluster.workers", 100000),
        id="workers-ignored-by-remote-cluster-not-checked",
    ),
    # ---------------------------------------------------------------- missing chunks
    pytest.param(GOOD, (), Gives("input.missing_chunks", "error"), id="default-missing-chunks"),
    pytest.param(
        GOOD.replace(
            "  matrix: network/A\n", "  matrix: network/A\n  missing_chunks: fill_value\n"
        ),
        (),
        Gives("input.missing_chunks", "fill_value"),
        id="missing-chunks-fill-value",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  missing_chunks: zeros\n"),
        (),
        Raises((r"line 5", r"key 'input\.missing_chunks'", r"error, fill_value")),
        id="missing-chunks-unknown",
    ),
    # ---------------------------------------------------------------- dashboard and timeouts
    pytest.param(GOOD, (), Gives("cluster.dashboard", None), id="default-no-dashboard"),
    pytest.param(
        GOOD + "cluster:\n  dashboard: true\n",
        (),
        Gives("cluster.dashboard", "127.0.0.1:0"),
        id="dashboard-true-is-loopback",
    ),
    pytest.param(
        GOOD + "cluster:\n  dashboard: '127.0.0.1:8787'\n",
        (),
        Gives("cluster.dashboard", "127.0.0.1:8787"),
        id="dashboard-address-kept",
    ),
    pytest.param(
        GOOD + "cluster:\n  dashboard: 8787\n",
        (),
        Raises((r"line 8", r"key 'cluster\.dashboard'", r"host:port")),
        id="dashboard-port-only",
    ),
    pytest.param(
        GOOD + "cluster:\n  dashboard: true\n  address: tcp://sched:8786\n",
        (),
        Raises((r"line 8", r"key 'cluster\.dashboard'", r"embedded")),
        id="dashboard-with-remote-cluster",
    ),
    pytest.param(GOOD, (), Gives("cluster.timeout", 10.0), id="default-timeout"),
    pytest.param(GOOD, (), Gives("cluster.worker_timeout", 60.0), id="default-worker-timeout"),
    pytest.param(GOOD, (), Gives("cluster.stall_timeout", 1800.0), id="default-stall-timeout"),
    pytest.param(
        GOOD + "cluster:\n  timeout: 2.5\n  worker_timeout: 5\n  stall_timeout: 30\n",
        (),
        Gives("cluster.worker_timeout", 5.0),
        id="timeouts-kept",
    ),
    pytest.param(
        GOOD + "cluster:\n  timeout: 0\n",
        (),
        Raises((r"line 8", r"key 'cluster\.timeout'", r"seconds")),
        id="zero-timeout",
    ),
    pytest.param(
        GOOD + "cluster:\n  stall_timeout: .inf\n",
        (),
        Raises((r"line 8", r"key 'cluster\.stall_timeout'", r"seconds")),
        id="infinite-stall-timeout",
    ),
    # ---------------------------------------------------------------- missing keys and sections
    pytest.param(
        GOOD.replace("  path: data/net.h5\n", ""),
        (),
        Raises((r"key 'input\.path'", r"required")),
        id="missing-input-path",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", ""),
        (),
        Raises((r"key 'input\.matrix'", r"required")),
        id="missing-input-matrix",
    ),
    pytest.param(
        GOOD.replace("  path: results/net.h5\n", "  q: true\n"),
        (),
        Raises((r"key 'output\.path'", r"required")),
        id="missing-output-path",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: null\n"),
        (),
        Raises((r"key 'input\.matrix'", r"required")),
        id="null-required-key",
    ),
    pytest.param(
        GOOD.split("output:")[0],
        (),
        Raises((r"key 'output'", r"required section")),
        id="missing-output-section",
    ),
    pytest.param("", (), Raises((r"key 'input'", r"required section")), id="empty-file"),
    pytest.param("- input\n- output\n", (), Raises((r"line 1", r"mapping")), id="top-level-list"),
    # ---------------------------------------------------------------- malformed YAML, duplicates
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network: A\n"),
        (),
        Raises((r"job\.yaml line 4 column \d+", r"malformed YAML")),
        id="malformed-mapping-value",
    ),
    pytest.param(
        GOOD + "method: {name: tsqr\n",
        (),
        Raises((r"line \d+ column \d+", r"malformed YAML")),
        id="malformed-unclosed-flow",
    ),
    pytest.param(
        GOOD + "\tq: true\n",
        (),
        Raises((r"line 7 column 1", r"malformed YAML")),
        id="malformed-tab-indent",
    ),
    pytest.param(
        GOOD + "---\nname: second\n",
        (),
        Raises((r"line 7 column 1", r"malformed YAML")),
        id="two-documents",
    ),
    pytest.param(
        GOOD + "input:\n  path: other.h5\n",
        (),
        Raises((r"job\.yaml line 7", r"key 'input'", r"twice")),
        id="duplicate-section",
    ),
    pytest.param(
        GOOD.replace("  matrix: network/A\n", "  matrix: network/A\n  path: other.h5\n"),
        (),
        Raises((r"job\.yaml line 5", r"key 'input\.path'", r"twice")),
        id="duplicate-key-in-section",
    ),
    # ---------------------------------------------------------------- tree only for tsqr
    pytest.param(
        GOOD + "method:\n  name: tsqr\n  tree: flat\n",
        (),
        Gives("method.tree", "flat"),
        id="tsqr-flat-tree",
    ),
    pytest.param(GOOD + "method:\n  tree: 4\n", (), Gives("method.tree", 4), id="tsqr-fan-in-tree"),
    pytest.param(
        GOOD + "method:\n  tree: 1\n",
        (),
        Raises((r"line 8", r"key 'method\.tree'", r"k >= 2")),
        id="fan-in-below-two",
    ),
    pytest.param(
        GOOD + "method:\n  name: cholqr2\n  tree: flat\n",
        (),
        Raises((r"line 9", r"key 'method\.tree'", r"tsqr", r"cholqr2")),
        id="tree-with-cholqr2",
    ),
    # ---------------------------------------------------------------- --set overrides
    pytest.param(
        GOOD, ("method.name=cholqr2",), Gives("method.name", "cholqr2"), id="set-method-name"
    ),
    pytest.param(
        GOOD + "method:\n  name: tsqr\n",
        ("method.name=cholqr2",),
        Gives("method.name", "cholqr2"),
        id="set-replaces-file-value",
    ),
    pytest.param(GOOD, ("output.q=true",), Gives("output.q", True), id="set-parses-yaml-boolean"),
    pytest.param(
        GOOD,
        ("input.rows_per_block=500", "input.rows_per_block=700"),
        Gives("input.rows_per_block", 700),
        id="set-last-one-wins",
    ),
    pytest.param(
        GOOD,
        ("cluster.processes=false",),
        Gives("cluster.processes", False),
        id="set-new-section",
    ),
    pytest.param(
        GOOD,
        ("output.path=elsewhere/r.zarr",),
        Gives("output.path", _folder_path("elsewhere/r.zarr")),
        id="set-path-relative-to-job-file",
    ),
    pytest.param(
        GOOD,
        ("method.nmae=cholqr2",),
        Raises((r"--set", r"key 'method\.nmae'", r"unknown key")),
        id="set-unknown-key",
    ),
    pytest.param(
        GOOD,
        ("colour=blue",),
        Raises((r"--set", r"key 'colour'", r"unknown key")),
        id="set-unknown-section",
    ),
    pytest.param(
        GOOD,
        ("method.name=qr",),
        Raises((r"--set", r"key 'method\.name'", r"tsqr", r"cholqr2")),
        id="set-bad-value",
    ),
    pytest.param(
        GOOD, ("methodname",), Raises((r"--set", r"key\.path=value")), id="set-without-equals"
    ),
    pytest.param(
        GOOD,
        ("input.path.deeper=x",),
        Raises((r"--set", r"'input\.path' is not a section")),
        id="set-below-a-value",
    ),
    pytest.param(
        GOOD + "method:\n  tree: flat\n",
        ("method.name=cholqr2",),
        Raises((r"key 'method\.tree'", r"tsqr", r"cholqr2")),
        id="set-cholqr2-keeps-tree-check",
    ),
]


def _write(folder: Path, text: str) -> Path:
    path = folder / "job.yaml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize(("text", "overrides", "expected"), CASES)
def test_load_job(
    tmp_path: Path, text: str, overrides: tuple[str, ...], expected: Raises | Gives
) -> None:
    """Each row: a job file and overrides, and the JobError or the value it must give."""
    path = _write(tmp_path, text)
    if isinstance(expected, Raises):
        with pytest.raises(JobError) as caught:
            load_job(path, overrides)
        message = str(caught.value)
        assert "\n" not in message.strip(), message
        for part in expected.parts:
            assert re.search(part, message), f"{part!r} not in {message!r}"
        return
    job = load_job(path, overrides)
    want = expected.value(tmp_path) if callable(expected.value) else expected.value
    got = _get(job, expected.attribute)
    assert got == want
    assert type(got) is type(want)


def test_job_is_frozen(tmp_path: Path) -> None:
    """Spec objects are frozen (DESIGN.md: frozen, validated spec objects)."""
    job = load_job(_write(tmp_path, GOOD))
    with pytest.raises(AttributeError):
        job.method.name = "cholqr2"  # type: ignore[misc]


def test_resolved_job_carries_overrides_and_absolute_paths(tmp_path: Path) -> None:
    """The resolved job (stored with the result) shows the override and resolved paths."""
    job = load_job(_write(tmp_path, GOOD), ("method.name=cholqr2",))
    assert job.resolved["method"]["name"] == "cholqr2"
    assert job.resolved["input"]["path"] == str((tmp_path / "data/net.h5").resolve())


def test_resolved_json_is_a_json_object(tmp_path: Path) -> None:
    """SPEC.md, result store attribute ``job``: the resolved job as JSON (an object)."""
    job = load_job(_write(tmp_path, GOOD), ("method.name=cholqr2",))
    decoded = json.loads(job.resolved_json())
    assert isinstance(decoded, dict)
    assert decoded["method"]["name"] == "cholqr2"


def test_missing_job_file_is_a_job_error(tmp_path: Path) -> None:
    """A job file that does not exist is a JobError naming the file."""
    with pytest.raises(JobError, match="not found"):
        load_job(tmp_path / "absent.yaml")


def test_job_error_is_a_value_error() -> None:
    """STYLE.md: domain errors also subclass the builtin a caller would catch."""
    assert issubclass(JobError, ValueError)


# ---------------------------------------------------------------- documents that broke the parser

HOSTILE = [
    pytest.param(
        "name: !local-tag levelling\n",
        id="unknown-local-tag",
    ),
    pytest.param(
        "base: &b {path: a.h5, matrix: A}\ninput:\n  <<: *b\noutput: {path: o.h5}\n",
        id="yaml-merge-key",
    ),
    pytest.param(
        "name: &loop [*loop]\n",
        id="self-referencing-alias",
    ),
    pytest.param(
        "name: " + "[" * 2000 + "]" * 2000 + "\n",
        id="deeply-nested-lists",
    ),
    pytest.param(
        "input: {path: '~no-such-user-rowfold/a.h5', matrix: A}\noutput: {path: o.h5}\n",
        id="home-of-unknown-user",
    ),
    pytest.param(
        "name: =\n",
        id="value-indicator-scalar",
    ),
    pytest.param("? [a, b]\n: 1\n", id="sequence-as-key"),
    pytest.param("? !!binary aGVsbG8=\n: 1\n", id="binary-key"),
    pytest.param("name: !!python/tuple [1, 2]\n", id="python-tag"),
    pytest.param("name: 2024-05-01\n" + GOOD.replace("name: levelling\n", ""), id="date-name"),
    pytest.param('input: {path: "a\\0.h5", matrix: A}\noutput: {path: o.h5}\n', id="nul"),
    pytest.param("\x00\x01", id="control-characters"),
]


@pytest.mark.parametrize("text", HOSTILE)
def test_hostile_document_gives_job_or_job_error(tmp_path: Path, text: str) -> None:
    """Whatever the document, load_job returns a Job or raises JobError."""
    _check_job_or_job_error(_write(tmp_path, text))


def test_undecodable_bytes_give_job_error(tmp_path: Path) -> None:
    """A job file that is not UTF-8 is a JobError naming the file."""
    path = tmp_path / "job.yaml"
    path.write_bytes(b"\xff\xfe\x00name: x\n")
    with pytest.raises(JobError, match=r"job\.yaml"):
        load_job(path)


# ---------------------------------------------------------------- property: never another error

KNOWN_KEYS = (
    "name",
    "input",
    "method",
    "output",
    "solve",
    "gates",
    "cluster",
    "path",
    "matrix",
    "rhs",
    "weights",
    "rows_per_block",
    "tree",
    "q",
    "overwrite",
    "refine",
    "rank_tolerance",
    "orthogonality",
    "residual",
    "gram",
    "address",
    "workers",
    "threads_per_worker",
    "processes",
)
KNOWN_VALUES = (
    "tsqr",
    "cholqr2",
    "auto",
    "flat",
    "binary",
    "data/a.h5",
    "../b.hdf5",
    "/srv/c.zarr",
    "~/d.h5",
    "e.csv",
    "yes",
    "",
    " ",
)

scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=12)
    | st.sampled_from(KNOWN_VALUES)
    | st.dates()
)
keys = st.sampled_from(KNOWN_KEYS) | st.text(max_size=8) | st.integers(-3, 3) | st.booleans()
documents = st.recursive(
    scalars,
    lambda children: st.lists(children, max_size=4) | st.dictionaries(keys, children, max_size=6),
    max_leaves=24,
)
sections = st.dictionaries(st.sampled_from(KNOWN_KEYS[:7]) | keys, documents, max_size=7)
override_strings = st.builds(
    lambda key, value: f"{key}={value}",
    st.sampled_from(KNOWN_KEYS).flatmap(
        lambda first: st.sampled_from([first, *(f"{first}.{k}" for k in KNOWN_KEYS[7:])])
    ),
    st.sampled_from(KNOWN_VALUES) | st.text(max_size=6),
) | st.text(max_size=12)
YAML_ALPHABET = "abcnqtu019.:-_ \n\t[]{},#&*!|>'\"%@`?~/\\"


def _check_job_or_job_error(path: Path, overrides: tuple[str, ...] = ()) -> None:
    try:
        job = load_job(path, overrides)
    except JobError as exc:
        assert str(exc).strip()
    else:
        assert isinstance(job, Job)


@pytest.fixture(scope="module")
def scratch(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One folder reused by every hypothesis example (the file is rewritten each time)."""
    return tmp_path_factory.mktemp("hypothesis-jobs")


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(document=documents | sections, overrides=st.lists(override_strings, max_size=3))
def test_any_yaml_data_gives_job_or_job_error(
    scratch: Path, document: Any, overrides: list[str]
) -> None:
    """Arbitrary YAML data (dumped with yaml.safe_dump) plus arbitrary --set strings."""
    path = scratch / "job.yaml"
    path.write_text(yaml.safe_dump(document), encoding="utf-8")
    _check_job_or_job_error(path, tuple(overrides))


@settings(max_examples=300)
@given(text=st.text(max_size=80) | st.text(alphabet=YAML_ALPHABET, max_size=80))
def test_any_text_gives_job_or_job_error(scratch: Path, text: str) -> None:
    """Arbitrary text, some of it drawn from YAML's punctuation."""
    path = scratch / "job.yaml"
    path.write_text(text, encoding="utf-8")
    _check_job_or_job_error(path)
