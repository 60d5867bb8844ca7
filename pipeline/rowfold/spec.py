"""Parse a YAML job file into frozen, validated objects before any compute starts.

Every error names the file, the key (as a dotted path) and the line it sits on, says what
was expected and what was found, and is raised as :class:`rowfold.errors.JobError`.
Relative paths resolve against the folder of the job file.
"""

from __future__ import annotations

import datetime
import json
import math
import os
import re
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

import yaml

from rowfold.errors import JobError, OutputError
from rowfold.methods import catalog
from rowfold.methods.catalog import METHOD_NAMES
from rowfold.storage.locations import ZIP_SUFFIX, redacted, scheme

TSQR_TREES = ("flat", "binary")
INNER_QR = ("householder", "cholqr2", "mgs")
SKETCHES = ("sparse_sign", "gaussian")
PRECISIONS = ("float64", "native")
MISSING_CHUNKS = ("error", "fill_value")
# rcholqr: most sketch rows per column of A (each task holds sketch_rows x rows_per_block
# numbers of the embedding, so this keeps that within 8 times the memory of one block).
SKETCH_ROWS_PER_COLUMN = 8
# Local workers, threads per worker, and their product may be at most this many times the
# cores this process may use (more only queues work and can exhaust the machine).
CORES_OVERCOMMIT = 4
# cluster.dashboard: true serves Dask's dashboard here (a free port on the loopback only).
LOOPBACK_DASHBOARD = "127.0.0.1:0"
VERIFY_MODES = ("all", "sample")
# solve.observation_test: the per-observation test on the residuals (see rowfold.model_tests)
OBSERVATION_TESTS = ("estimated", "known_sigma0")

# Which method takes which option (every method takes ``precision``): see the catalog.
METHOD_OPTIONS: dict[str, tuple[str, ...]] = {e.name: e.options for e in catalog.CATALOG}


@dataclass(frozen=True, slots=True)
class InputSpec:
    """Where the matrix and its companions live.

    Attributes
    ----------
    path : Path or str
        HDF5 or NetCDF-4 file (``.h5``/``.hdf5``/``.nc``), Zarr store (``.zarr``) or Zarr
        zip store (``.zarr.zip``), absolute; or, as text, the fsspec URL of a Zarr store or
        of an HDF5/NetCDF-4 file (``s3://bucket/obs.zarr``, ``memory://.../obs.h5``; a
        ``file://`` URL becomes a path).
    matrix : str
        Dataset (HDF5) or array path (Zarr) of the m x n matrix A.
    rhs : str or None
        Dataset of the right-hand sides, 1-D (m) or 2-D (m x k).
    weights : str or None
        Dataset of per-row weights w >= 0 (weighted least squares).
    rows_per_block : int or None
        Rows per block; None means choose automatically.
    fixed_columns : tuple of int
        Columns of A whose unknowns are held fixed at zero (a datum): left out before
        factoring, reported as 0 with standard error 0.
    missing_chunks : str
        ``"error"`` (default): a chunk absent from a Zarr store, or never written in an
        HDF5 file, stops the run naming it; ``"fill_value"``: read it as the array's fill
        value (for writers that leave out chunks equal to the fill value).
    parameter_names : tuple of str, str or None
        A name per input column (for the report), or the name of a 1-D dataset of text in
        the input file that holds them; None names them ``x0 .. x{n-1}``.
    storage_options : str
        The file system's options for a URL ``path`` (``input.storage_options``) as JSON
        text, "" for none; the resolved job keeps only their names.
    """

    path: Path | str
    matrix: str
    rhs: str | None = None
    weights: str | None = None
    rows_per_block: int | None = None
    fixed_columns: tuple[int, ...] = ()
    missing_chunks: str = "error"
    parameter_names: tuple[str, ...] | str | None = None
    storage_options: str = field(default="", repr=False)

    @property
    def is_url(self) -> bool:
        """Whether the input is read by URL (through fsspec) rather than from a path."""
        return isinstance(self.path, str)


@dataclass(frozen=True, slots=True)
class MethodSpec:
    """The factorization strategy and its options.

    Attributes
    ----------
    name : str
        One of :data:`METHOD_NAMES`.
    tree : str or int
        tsqr: reduction tree ``"flat"``, ``"binary"`` or a fan-in k >= 2.
    panel : int
        bcgs2/bmgs: columns per panel.
    inner : str
        bcgs2/bmgs: QR inside a panel, one of :data:`INNER_QR`.
    reorthogonalize : bool
        bmgs: a second projection pass per panel.
    sketch : str
        rcholqr: random embedding, one of :data:`SKETCHES`.
    sketch_rows : int or None
        rcholqr: rows of the sketch; None means 3 n.
    seed : int
        rcholqr: seed of the random embedding (recorded in the report).
    precision : str
        ``"float64"`` computes float32 input in float64; ``"native"`` keeps float32.
    """

    name: str = "tsqr"
    tree: str | int = "binary"
    panel: int = 16
    inner: str = "householder"
    reorthogonalize: bool = False
    sketch: str = "sparse_sign"
    sketch_rows: int | None = None
    seed: int = 0
    precision: str = "float64"


@dataclass(frozen=True, slots=True)
class OutputSpec:
    """Where and what to write.

    Attributes
    ----------
    path : Path or str
        Result store, ``.h5``/``.hdf5`` or ``.zarr``, absolute; or, as text, the fsspec URL
        of a Zarr result on an object store (committed by pointer,
        :mod:`rowfold.storage.published`).
    q : bool
        Also write the thin Q (m x n).
    overwrite : bool
        Replace an existing result.
    measure_q : bool
        Form Q in the verification pass to measure its orthogonality and the
        factorization residual, without writing it.
    storage_options : str
        The file system's options for a URL ``path`` as JSON text ("" for none); the
        resolved job keeps only their names.
    """

    path: Path | str
    q: bool = False
    overwrite: bool = False
    measure_q: bool = False
    storage_options: str = field(default="", repr=False)

    @property
    def is_url(self) -> bool:
        """Whether the result goes to an object store by URL (committed by pointer)."""
        return isinstance(self.path, str)

    @property
    def local(self) -> Path:
        """The local result path.

        Raises
        ------
        OutputError
            For a URL result: the verbs commit it in a private local folder first and then
            publish it (:mod:`rowfold.storage.published`); nothing else opens it as a path.
        """
        if isinstance(self.path, Path):
            return self.path
        raise OutputError(
            f"{self.path}: a result on an object store has no local path (key output.path)"
        )


@dataclass(frozen=True, slots=True)
class SolveSpec:
    """Least-squares options.

    Attributes
    ----------
    refine : bool
        Augmented-system iterative refinement with extended-precision residuals.
    refine_iterations : int
        Most refinement corrections to compute.
    rank_tolerance : float or None
        Relative cut-off on the singular values of the column-equilibrated R;
        None means ``10 * n * eps``.
    covariance : bool
        Also write the full covariance of x (``x_covariance``).
    residuals : bool
        Write the residuals, leverages and standardized residuals, and screen them.
    flag_above : float
        Standardized residuals larger than this in magnitude are flagged (a fixed screening
        limit for the plots; the statistical test is ``observation_test``).
    scale_columns : bool
        Equilibrate the columns of A to unit norm before factoring (results unscaled).
    sigma0 : float
        A priori standard deviation of unit weight: the weights are taken as
        ``w_i = sigma0^2 / sigma_i^2`` (so ``w_i = 1 / sigma_i^2`` when sigma0 is 1), and
        without weights every row has standard deviation sigma0.
    alpha : float
        Significance level of the global (chi-square) test of the model, in (0, 1).
    alpha_observation : float
        Significance level of the per-observation test, in (0, 1); 0.001 by default
        (common practice in survey networks).
    observation_test : str
        ``"estimated"``: Pope's tau test on ``e_i / (s0 sqrt(r_i))`` with the a posteriori
        s0; ``"known_sigma0"``: Baarda's w-test on ``e_i / (sigma0 sqrt(r_i))``.
    """

    refine: bool = False
    refine_iterations: int = 10
    rank_tolerance: float | None = None
    covariance: bool = False
    residuals: bool = False
    flag_above: float = 3.0
    scale_columns: bool = False
    sigma0: float = 1.0
    alpha: float = 0.05
    alpha_observation: float = 0.001
    observation_test: str = "estimated"


@dataclass(frozen=True, slots=True)
class GateSpec:
    """Quality gates; a gate set to None is not checked.

    Attributes
    ----------
    orthogonality : float or None
        Largest allowed ``||I - Q^H Q||_F``.
    residual : float or None
        Largest allowed ``||A - QR||_F / ||A||_F``.
    gram : float or None
        Largest allowed ``||A^H A - R^H R||_F / ||A||_F^2``.
    model_test : bool
        Fail the run (exit 3) when the global chi-square test of the model fails at
        ``solve.alpha``, or cannot be evaluated (no rhs, no degrees of freedom).
    """

    orthogonality: float | None = None
    residual: float | None = None
    gram: float | None = None
    model_test: bool = False


@dataclass(frozen=True, slots=True)
class UpdateSpec:
    """How ``rowfold update`` proves that the input still starts with the old rows.

    Attributes
    ----------
    verify : str
        ``"all"`` (default): every old row block of every input is hashed and compared with
        the digests the earlier result recorded; ``"sample"``: only a random share of the
        old blocks (always the last), which the report and a warning say.
    sample_fraction : float
        With ``verify: sample``, the share of old row blocks checked, in (0, 1].
    label : str or None
        The label of the segment a run or update adds (``update --label``); None gives
        ``rows-<first>-<last>`` (see :mod:`rowfold.segments`).
    window : int or None
        Keep only the last ``window`` segments: ``update`` retires older ones itself.
    """

    verify: str = "all"
    sample_fraction: float = 0.1
    label: str | None = None
    window: int | None = None


@dataclass(frozen=True, slots=True)
class ClusterSpec:
    """Where the Dask work runs.

    Attributes
    ----------
    address : str or None
        None for the embedded local cluster, else a scheduler address ``tcp://host:port``.
    scheduler_file : Path or None
        A scheduler file as ``dask-mpi``, ``dask scheduler --scheduler-file`` and batch
        launchers write it (JSON naming the scheduler's address); the job connects to that
        scheduler. Cannot be combined with ``address``.
    workers : int or None
        Local workers; None means one per core.
    threads_per_worker : int or None
        Threads per local worker; None means cores // workers.
    processes : bool or None
        Local workers as processes (True) or threads of this process (False); None
        (``auto``, the default) picks threads, the faster layout for dense and CSR input
        alike on the measurements in the README.
    scheduler : str
        ``auto`` (default): ``threads`` for a small job that would run on the embedded
        cluster (:func:`rowfold.cluster.choose_scheduler`), else ``distributed``;
        ``distributed``: a ``LocalCluster`` or the cluster at ``address``;
        ``threads``: Dask's threaded scheduler inside this process (no dashboard, no worker
        restarts, less start-up and per-task overhead).
    dashboard : str or None
        Embedded cluster only: None (default) serves no dashboard; else the ``host:port``
        the scheduler's dashboard listens on (``true`` in the job means
        :data:`LOOPBACK_DASHBOARD`).
    timeout : float
        Seconds to wait for the scheduler: to connect, and for each answer while running.
    worker_timeout : float
        Seconds a worker may send no heartbeat while the run waits before it fails.
    stall_timeout : float
        Seconds the run waits while no task of the cluster starts or finishes.
    """

    address: str | None = None
    scheduler_file: Path | None = None
    workers: int | None = None
    threads_per_worker: int | None = None
    processes: bool | None = None
    scheduler: str = "auto"
    dashboard: str | None = None
    timeout: float = 10.0
    worker_timeout: float = 60.0
    stall_timeout: float = 1800.0


@dataclass(frozen=True, slots=True)
class Job:
    """A whole validated job.

    Attributes
    ----------
    name : str
        Free text used in reports.
    source : Path
        The job file it came from.
    input, method, output, solve, gates, cluster, update
        The sections, each validated.
    resolved : Mapping
        The job as plain data after overrides and path resolution (goes into the store).
    places : Mapping
        Dotted key -> where it was set (``job.yaml line 7`` or ``--set``), for errors
        found after parsing (see :meth:`fail`).
    """

    name: str
    source: Path
    input: InputSpec
    method: MethodSpec
    output: OutputSpec
    solve: SolveSpec = field(default_factory=SolveSpec)
    gates: GateSpec = field(default_factory=GateSpec)
    cluster: ClusterSpec = field(default_factory=ClusterSpec)
    resolved: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))
    places: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))
    update: UpdateSpec = field(default_factory=UpdateSpec)

    def resolved_json(self) -> str:
        """Return the resolved job as a JSON string."""
        return json.dumps(dict(self.resolved), sort_keys=True, default=str)

    def fail(self, key: str, message: str) -> JobError:
        """Build a JobError for ``key`` (dotted) naming the line it was set on."""
        parts = key.split(".")
        for cut in range(len(parts), 0, -1):
            place = self.places.get(".".join(parts[:cut]))
            if place is not None:
                break
        else:
            place = self.source.name
        return JobError(f"{place}: key '{key}': {message}")


# ---------------------------------------------------------------- loading with line numbers


@dataclass(slots=True)
class _Doc:
    """Plain data parsed from YAML plus the line of every key path."""

    file: Path
    data: dict[str, Any]
    lines: dict[tuple[str, ...], int]

    def where(self, keypath: tuple[str, ...]) -> str:
        """Describe where a key sits, e.g. ``job.yaml line 4``."""
        for cut in range(len(keypath), 0, -1):
            line = self.lines.get(keypath[:cut])
            if line is not None:
                return f"{self.file.name} line {line}" if line > 0 else "--set"
        return self.file.name

    def fail(self, keypath: tuple[str, ...], message: str) -> JobError:
        """Build a JobError for a key path."""
        key = ".".join(keypath) if keypath else "(top level)"
        return JobError(f"{self.where(keypath)}: key '{key}': {message}")


def _key_lines(
    node: yaml.Node,
    path: tuple[str, ...],
    lines: dict[tuple[str, ...], int],
    file: Path,
    seen: set[int],
) -> None:
    """Record the line of every mapping key (by dotted path) and refuse duplicate keys."""
    if id(node) in seen:
        return
    seen.add(id(node))
    if isinstance(node, yaml.MappingNode):
        for key_node, value_node in node.value:
            if not isinstance(key_node, yaml.ScalarNode):
                continue
            sub = (*path, str(key_node.value))
            line = key_node.start_mark.line + 1
            if sub in lines and key_node.value != "<<":
                raise JobError(f"{file.name} line {line}: key '{'.'.join(sub)}' appears twice")
            lines[sub] = line
            _key_lines(value_node, sub, lines, file, seen)
    elif isinstance(node, yaml.SequenceNode):
        for item in node.value:
            _key_lines(item, path, lines, file, seen)


class _Yaml12Loader(yaml.SafeLoader):
    """PyYAML's safe loader, reading numbers as YAML 1.2 does.

    PyYAML follows YAML 1.1, where a float needs a dot, so ``1e-12`` would be read as a
    string. YAML 1.2's core schema (section 10.3.2) also takes ``1e-12``, ``5E3`` and
    ``.5``; this loader adds that pattern to the 1.1 ones, so nothing read before changes.
    """


_Yaml12Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?$"),
    list("-+0123456789."),
)


def _yaml_value(text: str) -> Any:
    """Parse YAML text (one document) with :class:`_Yaml12Loader`."""
    return yaml.load(text, Loader=_Yaml12Loader)


def _parse_text(text: str, file: Path) -> tuple[Any, dict[tuple[str, ...], int]]:
    """Parse YAML text with the safe loader; return the data and the key lines."""
    try:
        root = yaml.compose(text, Loader=_Yaml12Loader)
        data = _yaml_value(text)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        where = f"line {mark.line + 1} column {mark.column + 1}" if mark else "somewhere"
        raise JobError(f"{file.name} {where}: malformed YAML: {exc.problem}") from None
    except yaml.YAMLError as exc:
        raise JobError(f"{file.name}: malformed YAML: {exc}") from None
    except RecursionError:
        raise JobError(f"{file.name}: malformed YAML: nested too deeply") from None
    lines: dict[tuple[str, ...], int] = {}
    if root is not None:
        _key_lines(root, (), lines, file, set())
    return data, lines


def _read_yaml(file: Path) -> _Doc:
    """Read a job file into a :class:`_Doc`, turning YAML errors into JobError."""
    try:
        text = file.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise JobError(f"{file}: job file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise JobError(f"{file}: cannot read job file ({exc.__class__.__name__}: {exc})") from None
    data, lines = _parse_text(text, file)
    data = {} if data is None else data
    if not isinstance(data, dict):
        raise JobError(f"{file.name} line 1: a job file must be a mapping of sections")
    return _Doc(file=file, data={str(k): v for k, v in data.items()}, lines=lines)


def _apply_override(doc: _Doc, override: str) -> None:
    """Apply one ``key.path=value`` override to the document."""
    key, sep, raw = override.partition("=")
    keypath = tuple(part for part in key.strip().split(".") if part)
    if not sep or not keypath:
        raise JobError(f"--set {override!r}: expected key.path=value, e.g. method.name=cholqr2")
    try:
        value = _yaml_value(raw) if raw.strip() else None
    except yaml.YAMLError:
        value = raw
    _set_value(doc, keypath, value, f"--set {override!r}")


def _set_value(doc: _Doc, keypath: tuple[str, ...], value: Any, where: str) -> None:
    """Set the value at a key path as ``--set`` does (messages then say ``--set``)."""
    node: dict[str, Any] = doc.data
    for depth, part in enumerate(keypath[:-1]):
        child = node.setdefault(part, {})
        if not isinstance(child, dict):
            raise JobError(f"{where}: '{'.'.join(keypath[: depth + 1])}' is not a section")
        node = child
    node[keypath[-1]] = value
    doc.lines[keypath] = 0


# ---------------------------------------------------------------- typed field readers


class _Section:
    """Typed access to one section; reports unknown keys after reading."""

    def __init__(self, doc: _Doc, keypath: tuple[str, ...], allowed: tuple[str, ...]) -> None:
        self.doc = doc
        self.keypath = keypath
        raw = doc.data.get(keypath[0], {}) if keypath else doc.data
        if raw is None:
            raw = {}
        if not isinstance(raw, dict):
            raise doc.fail(keypath, f"expected a mapping of keys, found {_kind(raw)}")
        self.raw: dict[str, Any] = raw
        for key in raw:
            if key not in allowed:
                hint = ", ".join(allowed)
                raise doc.fail((*keypath, key), f"unknown key; expected one of: {hint}")

    def get(self, key: str, parse: Callable[[Any], Any], default: Any = None) -> Any:
        """Read ``key`` with ``parse``; missing or null gives ``default``."""
        value = self.raw.get(key)
        if value is None:
            return default
        try:
            return parse(value)
        except (TypeError, ValueError) as exc:
            found = repr(value)
            found = found if len(found) <= 80 else found[:76] + " ..."
            raise self.doc.fail((*self.keypath, key), f"{exc}, found {found}") from None

    def require(self, key: str, parse: Callable[[Any], Any]) -> Any:
        """Read a key that must be present."""
        if self.raw.get(key) is None:
            raise self.doc.fail((*self.keypath, key), "required key is missing")
        return self.get(key, parse)


def _kind(value: Any) -> str:
    """Name the YAML kind of a plain value for error messages."""
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false"}.get(
        type(value), type(value).__name__
    )


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise TypeError("expected non-empty text")
    return value


def _flag(value: Any) -> bool:
    if not isinstance(value, bool):
        raise TypeError("expected true or false")
    return value


def _auto_or_flag(value: Any) -> bool | None:
    if value == "auto":
        return None
    try:
        return _flag(value)
    except TypeError:
        raise TypeError("expected auto, true or false") from None


def _count(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise TypeError("expected a whole number >= 1")
    return value


def _auto_or_count(value: Any) -> int | None:
    if value == "auto":
        return None
    try:
        return _count(value)
    except TypeError:
        raise TypeError("expected 'auto' or a whole number >= 1") from None


def _positive(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not value > 0:
        raise TypeError("expected a positive finite number")
    if not math.isfinite(value):
        raise ValueError("expected a positive finite number")
    return float(value)


def _fraction(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value < 1:
        raise ValueError("expected a relative tolerance between 0 and 1 (exclusive)")
    return float(value)


def _significance(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise TypeError("expected a significance level between 0 and 1 (exclusive)")
    if not 0 < value < 1:  # also refuses NaN and infinities
        raise ValueError("expected a significance level between 0 and 1 (exclusive)")
    return float(value)


def _seconds(value: Any) -> float:
    try:
        return _positive(value)
    except (TypeError, ValueError):
        raise ValueError("expected a finite number of seconds > 0") from None


_HOST = r"(?:\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?)"
_SCHEDULER_ADDRESS = re.compile(rf"(?:(?:tcp|tls|ws|wss|ucx)://)?{_HOST}(?::(\d{{1,5}}))?")
_LISTEN_ADDRESS = re.compile(rf"{_HOST}:(\d{{1,5}})")


def _port_ok(match: re.Match[str] | None) -> bool:
    return match is not None and (match.group(1) is None or int(match.group(1)) <= 65535)


def _scheduler_address(value: Any) -> str:
    text = _text(value).strip()
    if not _port_ok(_SCHEDULER_ADDRESS.fullmatch(text)):
        raise ValueError("expected a scheduler address such as tcp://scheduler-host:8786")
    return text


def _dashboard(value: Any) -> str | None:
    if value is False:
        return None
    if value is True:
        return LOOPBACK_DASHBOARD
    if isinstance(value, str) and _port_ok(_LISTEN_ADDRESS.fullmatch(value.strip())):
        return value.strip()
    raise ValueError("expected false, true (127.0.0.1, a free port) or host:port")


def _one_of(choices: tuple[str, ...]) -> Callable[[Any], str]:
    def parse(value: Any) -> str:
        if value not in choices:
            raise ValueError(f"expected one of {', '.join(choices)}")
        return str(value)

    return parse


def _tree(value: Any) -> str | int:
    if value in TSQR_TREES:
        return str(value)
    if isinstance(value, int) and not isinstance(value, bool) and value >= 2:
        return value
    raise ValueError("expected flat, binary or a fan-in k >= 2")


def _suffixed_path(suffixes: tuple[str, ...], base: Path) -> Callable[[Any], Path]:
    def parse(value: Any) -> Path:
        text = _text(value)
        if scheme(text) == "file":
            text = _file_url_path(text)
        try:
            path = Path(text).expanduser()
        except RuntimeError as exc:  # e.g. ~unknownuser
            raise ValueError(f"cannot expand the path ({exc})") from None
        if not _has_suffix(path.name, suffixes):
            raise ValueError(f"expected a path ending in {' or '.join(suffixes)}")
        return path if path.is_absolute() else (base / path).resolve()

    return parse


def _has_suffix(name: str, suffixes: tuple[str, ...]) -> bool:
    return any(name.lower().endswith(suffix) for suffix in suffixes)


def _file_url_path(url: str) -> str:
    """The local path of a ``file://`` URL (``file:///data/obs.zarr`` -> ``/data/obs.zarr``)."""
    from urllib.parse import unquote, urlsplit

    parts = urlsplit(url)
    if parts.netloc not in ("", "localhost") or not parts.path.startswith("/"):
        raise ValueError("expected a file URL of an absolute path, file:///folder/name")
    return unquote(parts.path)


def _input_location(base: Path) -> Callable[[Any], Path | str]:
    """A local path (as :func:`_suffixed_path`) or the fsspec URL of a Zarr store."""
    return _location(
        INPUT_SUFFIXES,
        base,
        "expected the URL of a Zarr store ending in .zarr, or of an HDF5 or NetCDF-4 file "
        "ending in .h5, .hdf5 or .nc (zip stores are read from local paths)",
        URL_INPUT_SUFFIXES,
    )


def _location(
    suffixes: tuple[str, ...],
    base: Path,
    not_zarr: str,
    url_suffixes: tuple[str, ...] = (".zarr",),
) -> Callable[[Any], Path | str]:
    """A local path with one of ``suffixes``, or an fsspec URL ending in one of
    ``url_suffixes`` (``not_zarr`` is the message for a URL of anything else)."""
    local = _suffixed_path(suffixes, base)

    def parse(value: Any) -> Path | str:
        text = _text(value).strip()
        protocol = scheme(text)
        if protocol is None or protocol == "file":
            return local(text)
        if not text.rstrip("/").lower().endswith(url_suffixes):
            raise ValueError(not_zarr)
        _require_file_system(protocol)
        return text.rstrip("/")

    return parse


def _require_file_system(protocol: str) -> None:
    """Refuse a URL scheme fsspec does not know, or whose package is not installed."""
    import fsspec

    try:
        fsspec.get_filesystem_class(protocol)
    except ValueError:
        raise ValueError(f"fsspec knows no file system for {protocol}://") from None
    except ImportError as exc:
        raise ValueError(f"{protocol}:// needs a package that is not installed ({exc})") from None


DATA_SUFFIXES = (".h5", ".hdf5", ".zarr")
INPUT_SUFFIXES = (*DATA_SUFFIXES, ".nc", ZIP_SUFFIX)  # .nc: NetCDF-4, an HDF5 file
URL_INPUT_SUFFIXES = (".zarr", ".h5", ".hdf5", ".nc")


def _any_path(base: Path) -> Callable[[Any], Path]:
    """A path of any name, resolved against ``base`` when relative."""

    def parse(value: Any) -> Path:
        try:
            path = Path(_text(value)).expanduser()
        except RuntimeError as exc:  # e.g. ~unknownuser
            raise ValueError(f"cannot expand the path ({exc})") from None
        return path if path.is_absolute() else (base / path).resolve()

    return parse


INPUT_KEYS = (
    "path",
    "matrix",
    "rhs",
    "weights",
    "rows_per_block",
    "fixed_columns",
    "missing_chunks",
    "parameter_names",
    "storage_options",
)


def _parse_input(doc: _Doc, base: Path) -> InputSpec:
    section = _Section(doc, ("input",), INPUT_KEYS)
    _refuse_url_credentials(doc, ("input", "path"), section.raw.get("path"))
    spec = InputSpec(
        weights=section.get("weights", _text),
        path=section.require("path", _input_location(base)),
        matrix=section.require("matrix", _text),
        rhs=section.get("rhs", _text),
        rows_per_block=section.get("rows_per_block", _auto_or_count),
        fixed_columns=section.get("fixed_columns", _column_list, ()),
        missing_chunks=section.get("missing_chunks", _one_of(MISSING_CHUNKS), "error"),
        parameter_names=section.get("parameter_names", _names_or_dataset),
        storage_options=_storage_options(doc, section, ("input", "storage_options")),
    )
    if spec.storage_options and not spec.is_url:
        raise doc.fail(
            ("input", "storage_options"),
            "applies only to a URL input.path (s3://, gs://, memory://, ...); "
            "remove it or give the store's URL",
        )
    if spec.is_url:
        return spec
    raw = str(section.raw["path"]).strip()
    raw = _file_url_path(raw) if scheme(raw) == "file" else raw
    link = _broken_link(base / Path(raw).expanduser())
    if link is not None:
        name, target = link
        raise doc.fail(
            ("input", "path"),
            f"{name} is a broken symbolic link to {target} (which does not exist); "
            "restore the target or point input.path at the data",
        )
    return spec


def _refuse_url_credentials(doc: _Doc, keypath: tuple[str, ...], value: Any) -> None:
    """Refuse a URL with a user or password in it, without repeating it in the message."""
    from urllib.parse import urlsplit

    if not isinstance(value, str) or scheme(value.strip()) is None:
        return
    try:
        userinfo = "@" in urlsplit(value.strip()).netloc
    except ValueError:
        userinfo = False
    if userinfo:
        raise doc.fail(
            keypath,
            "a URL with a user or password in it is not accepted (it would be recorded); "
            "give credentials in storage_options or the file system's own configuration",
        )


def _storage_options(doc: _Doc, section: _Section, keypath: tuple[str, ...]) -> str:
    """Storage options as JSON text; errors never repeat a value (it may be a credential)."""
    value = section.raw.get(keypath[-1])
    if value is None:
        return ""
    if not isinstance(value, dict) or not all(isinstance(k, str) for k in value):
        raise doc.fail(
            keypath, f"expected a mapping of option names to values, found {_kind(value)}"
        )
    try:
        return json.dumps(value, sort_keys=True, allow_nan=False)
    except (TypeError, ValueError):
        raise doc.fail(
            keypath,
            "expected plain values (text, numbers, true/false, lists and mappings of them)",
        ) from None


def _broken_link(path: Path) -> tuple[str, str] | None:
    """The first component of ``path`` that is a symbolic link to nothing, and its target."""
    if os.path.exists(path):
        return None
    for part in (path, *path.parents):
        if os.path.islink(part) and not os.path.exists(part):
            return str(part), os.readlink(part)
    return None


def _names_or_dataset(value: Any) -> tuple[str, ...] | str:
    """A list of distinct non-empty names, or the name of a dataset holding them."""
    if isinstance(value, str):
        return _text(value)
    if not isinstance(value, list) or not value:
        raise TypeError("expected a list of names (one per column) or a dataset name")
    return check_names(value)


def check_names(names: list[Any]) -> tuple[str, ...]:
    """Parameter names as a tuple: each non-empty text, each given once.

    Raises
    ------
    TypeError, ValueError
        Naming the first offending entry (by position, counting from 0).
    """
    for position, name in enumerate(names):
        if not isinstance(name, str) or not name.strip():
            raise TypeError(f"expected non-empty text for every name; entry {position} is not")
    seen: dict[str, int] = {}
    for position, name in enumerate(names):
        if name in seen:
            raise ValueError(
                f"expected each name once; {name!r} is entries {seen[name]} and {position}"
            )
        seen[name] = position
    return tuple(names)


def check_parameter_names(job: Job, names: tuple[str, ...], cols: int, where: str) -> None:
    """Refuse a list of parameter names whose length is not the input's column count.

    Raises
    ------
    JobError
        Naming ``input.parameter_names``, its line, ``where`` the names came from, and
        both counts.
    """
    if len(names) != cols:
        raise job.fail(
            "input.parameter_names",
            f"{where} gives {len(names)} names for the {cols} columns of input.matrix; "
            "give one name per column (fixed columns included)",
        )


def _column_list(value: Any) -> tuple[int, ...]:
    items = value if isinstance(value, list) else [value]
    if not all(isinstance(j, int) and not isinstance(j, bool) and j >= 0 for j in items):
        raise TypeError("expected a list of column numbers >= 0 (counting from 0)")
    if len(set(items)) != len(items):
        raise ValueError("expected each column number once")
    return tuple(sorted(items))


def _seed(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise TypeError("expected a whole number >= 0")
    return value


def _parse_method(doc: _Doc) -> MethodSpec:
    every = ("name", "precision", *sorted({k for keys in METHOD_OPTIONS.values() for k in keys}))
    section = _Section(doc, ("method",), every)
    name = section.get("name", _one_of(METHOD_NAMES), "tsqr")
    for key in section.raw:
        if key not in ("name", "precision", *METHOD_OPTIONS[name]):
            takers = [m for m, keys in METHOD_OPTIONS.items() if key in keys]
            raise doc.fail(
                ("method", key), f"method {name} takes no '{key}' (it is for {', '.join(takers)})"
            )
    return MethodSpec(
        name=name,
        tree=section.get("tree", _tree, "binary"),
        panel=section.get("panel", _count, 16),
        inner=section.get("inner", _one_of(INNER_QR), "householder"),
        reorthogonalize=section.get("reorthogonalize", _flag, False),
        sketch=section.get("sketch", _one_of(SKETCHES), "sparse_sign"),
        sketch_rows=section.get("sketch_rows", _auto_or_count),
        seed=section.get("seed", _seed, 0),
        precision=section.get("precision", _one_of(PRECISIONS), "float64"),
    )


def _parse_output(doc: _Doc, base: Path) -> OutputSpec:
    keys = ("path", "q", "overwrite", "measure_q", "storage_options")
    section = _Section(doc, ("output",), keys)
    _refuse_url_credentials(doc, ("output", "path"), section.raw.get("path"))
    _refuse_zip_output(doc, section.raw.get("path"))
    path = section.require("path", _output_location(base))
    options = _storage_options(doc, section, ("output", "storage_options"))
    if options and not isinstance(path, str):
        raise doc.fail(
            ("output", "storage_options"),
            "applies only to a URL output.path (s3://, gs://, memory://, ...); remove it",
        )
    is_zarr = str(path).lower().endswith(".zarr")
    if isinstance(path, Path) and path.exists() and path.is_dir() != is_zarr:
        found, wanted = ("a file", "a folder") if is_zarr else ("a folder", "a file")
        raise doc.fail(
            ("output", "path"),
            f"{path} is {found}, but a {path.suffix} result is {wanted}; "
            "choose another output.path or move it away",
        )
    return OutputSpec(
        path=path,
        q=section.get("q", _flag, False),
        overwrite=section.get("overwrite", _flag, False),
        measure_q=section.get("measure_q", _flag, False),
        storage_options=options,
    )


def _output_location(base: Path) -> Callable[[Any], Path | str]:
    """A local result path, or the fsspec URL of a Zarr result on an object store."""
    return _location(
        DATA_SUFFIXES,
        base,
        "expected the URL of a Zarr result ending in .zarr (HDF5 results are written "
        "to local paths)",
    )


def _refuse_zip_output(doc: _Doc, value: Any) -> None:
    """Refuse a ``.zarr.zip`` output (zip stores are read as inputs only)."""
    if isinstance(value, str) and value.strip().lower().endswith(ZIP_SUFFIX):
        raise doc.fail(
            ("output", "path"), "a .zarr.zip store is read as an input only; write a .zarr folder"
        )


def _parse_solve(doc: _Doc) -> SolveSpec:
    keys = (
        "refine",
        "refine_iterations",
        "rank_tolerance",
        "covariance",
        "residuals",
        "flag_above",
        "scale_columns",
        "sigma0",
        "alpha",
        "alpha_observation",
        "observation_test",
    )
    section = _Section(doc, ("solve",), keys)
    return SolveSpec(
        refine=section.get("refine", _flag, False),
        refine_iterations=section.get("refine_iterations", _count, 10),
        rank_tolerance=section.get("rank_tolerance", _fraction),
        covariance=section.get("covariance", _flag, False),
        residuals=section.get("residuals", _flag, False),
        flag_above=section.get("flag_above", _positive, 3.0),
        scale_columns=section.get("scale_columns", _flag, False),
        sigma0=section.get("sigma0", _positive, 1.0),
        alpha=section.get("alpha", _significance, 0.05),
        alpha_observation=section.get("alpha_observation", _significance, 0.001),
        observation_test=section.get("observation_test", _one_of(OBSERVATION_TESTS), "estimated"),
    )


def _parse_gates(doc: _Doc) -> GateSpec:
    section = _Section(doc, ("gates",), ("orthogonality", "residual", "gram", "model_test"))
    return GateSpec(
        orthogonality=section.get("orthogonality", _positive),
        residual=section.get("residual", _positive),
        gram=section.get("gram", _positive),
        model_test=section.get("model_test", _flag, False),
    )


def _share(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value <= 1:
        raise TypeError("expected a fraction in (0, 1]")
    return float(value)


def _label(value: Any) -> str:
    """A segment label: one line of text (a YAML date or number is taken as its text)."""
    if isinstance(value, bool) or not isinstance(value, str | int | datetime.date):
        raise TypeError("expected a label: one line of text, e.g. a night's date")
    text = str(value).strip()
    if not text or "\n" in text or len(text) > 100:
        raise ValueError("expected a label of 1 to 100 characters on one line")
    return text


def _parse_update(doc: _Doc) -> UpdateSpec:
    keys = ("verify", "sample_fraction", "label", "window")
    section = _Section(doc, ("update",), keys)
    return UpdateSpec(
        verify=section.get("verify", _one_of(VERIFY_MODES), "all"),
        sample_fraction=section.get("sample_fraction", _share, 0.1),
        label=section.get("label", _label),
        window=section.get("window", _count),
    )


CLUSTER_KEYS = (
    "address",
    "scheduler_file",
    "workers",
    "threads_per_worker",
    "processes",
    "scheduler",
    "dashboard",
    "timeout",
    "worker_timeout",
    "stall_timeout",
)
SCHEDULERS = ("auto", "distributed", "threads")


def _merge_profile(doc: _Doc, base: Path) -> None:
    """Fill the cluster section from ``cluster.profile``; keys set in the job win."""
    section = doc.data.get("cluster")
    if not isinstance(section, dict) or "profile" not in section:
        return
    where = doc.where(("cluster", "profile"))
    value = section.pop("profile")
    if value is None:
        return
    profile_path = Path(_text_or_fail(doc, value))
    profile_path = profile_path if profile_path.is_absolute() else (base / profile_path).resolve()
    profile = _read_yaml(profile_path)
    cluster = profile.data.get("cluster", profile.data)
    if not isinstance(cluster, dict):
        raise JobError(f"{where}: profile {profile_path.name} must hold a cluster mapping")
    for key, value in cluster.items():
        if key not in CLUSTER_KEYS:
            raise JobError(
                f"{profile_path.name}: unknown cluster key '{key}'; expected one of: "
                + ", ".join(CLUSTER_KEYS)
            )
        section.setdefault(key, value)


def _text_or_fail(doc: _Doc, value: Any) -> str:
    try:
        return _text(value)
    except TypeError as exc:
        raise doc.fail(("cluster", "profile"), f"{exc}, found {value!r}") from None


def _parse_cluster(doc: _Doc, base: Path) -> ClusterSpec:
    _merge_profile(doc, base)
    section = _Section(doc, ("cluster",), CLUSTER_KEYS)
    spec = ClusterSpec(
        address=section.get("address", _scheduler_address),
        scheduler_file=section.get("scheduler_file", _any_path(base)),
        workers=section.get("workers", _auto_or_count),
        threads_per_worker=section.get("threads_per_worker", _auto_or_count),
        processes=section.get("processes", _auto_or_flag),
        scheduler=section.get("scheduler", _one_of(SCHEDULERS), "auto"),
        dashboard=section.get("dashboard", _dashboard),
        timeout=section.get("timeout", _seconds, 10.0),
        worker_timeout=section.get("worker_timeout", _seconds, 60.0),
        stall_timeout=section.get("stall_timeout", _seconds, 1800.0),
    )
    if spec.address and spec.scheduler_file:
        raise doc.fail(
            ("cluster", "scheduler_file"),
            "names the scheduler as cluster.address does; give one of the two",
        )
    remote = spec.address or spec.scheduler_file
    if spec.scheduler == "threads" and (remote or spec.processes):
        raise doc.fail(
            ("cluster", "scheduler"),
            "threads runs the job inside this process; it cannot be combined with "
            "cluster.address, cluster.scheduler_file or cluster.processes: true "
            "(use scheduler: distributed)",
        )
    if spec.dashboard is not None and (remote or spec.scheduler == "threads"):
        raise doc.fail(
            ("cluster", "dashboard"),
            "only the embedded cluster (scheduler: distributed, no address) serves a "
            "dashboard; a remote scheduler has its own",
        )
    if not remote:
        _check_local_counts(doc, spec)
    return spec


def usable_cores() -> int:
    """Cores this process may use: ``dask.system.CPU_COUNT`` (CPU affinity and cgroup
    quotas), the count the embedded cluster is sized from."""
    from dask.system import CPU_COUNT

    return max(1, int(CPU_COUNT))


def _check_local_counts(doc: _Doc, spec: ClusterSpec) -> None:
    """Refuse local worker and thread counts beyond CORES_OVERCOMMIT x the usable cores."""
    cores = usable_cores()
    limit = CORES_OVERCOMMIT * cores
    workers, threads = spec.workers or 1, spec.threads_per_worker or 1
    for key, count in (("workers", workers), ("threads_per_worker", threads)):
        if count > limit:
            raise doc.fail(
                ("cluster", key),
                f"{count} is more than {CORES_OVERCOMMIT} x the {cores} cores this machine "
                f"offers; use at most {limit} (or auto)",
            )
    if workers * threads > limit:
        raise doc.fail(
            ("cluster", "workers" if spec.workers else "threads_per_worker"),
            f"{workers} workers x {threads} threads is more than {CORES_OVERCOMMIT} x the "
            f"{cores} cores this machine offers; keep the product at most {limit}",
        )


def check_fits_input(job: Job, rows: int, cols: int) -> None:
    """Refuse options that the input's size makes unusable, before any compute.

    ``method.sketch_rows`` (rcholqr) must lie in ``[n, min(m, SKETCH_ROWS_PER_COLUMN n)]``:
    fewer rows than columns cannot give a full-rank sketch, a sketch taller than A
    compresses nothing, and each task holds ``sketch_rows x rows_per_block`` numbers of the
    embedding (at most 8 blocks' worth).

    Raises
    ------
    JobError
        Naming the key and its line.
    """
    sketch = job.method.sketch_rows
    if job.method.name != "rcholqr" or sketch is None:
        return
    limit = min(rows, SKETCH_ROWS_PER_COLUMN * cols)
    if not cols <= sketch <= limit:
        raise job.fail(
            "method.sketch_rows",
            f"{sketch} sketch rows for a {rows} x {cols} matrix; expected {cols} to {limit} "
            f"(at least n, at most m and {SKETCH_ROWS_PER_COLUMN} n), or auto",
        )


SECTIONS = ("name", "input", "method", "output", "solve", "gates", "cluster", "update")


def load_job(
    path: str | Path,
    overrides: tuple[str, ...] = (),
    values: Mapping[str, Any] | None = None,
) -> Job:
    """Read, override and validate a job file.

    Parameters
    ----------
    path : str or Path
        The YAML job file.
    overrides : tuple of str
        ``key.path=value`` strings from ``--set``, applied in order.
    values : mapping, optional
        Dotted key -> value, applied after ``overrides`` exactly as ``--set`` applies them
        (errors name them as ``--set``), but with the value as given instead of YAML text
        (the Python API's overrides).

    Returns
    -------
    Job
        The frozen, validated job.

    Raises
    ------
    JobError
        On malformed YAML, unknown keys, wrong types or missing keys.
    """
    file = Path(path).expanduser().resolve()
    doc = _read_yaml(file)
    for override in overrides:
        _apply_override(doc, override)
    for key, value in (values or {}).items():
        keypath = tuple(part for part in key.split(".") if part)
        if not keypath:
            raise JobError(f"--set {key!r}: expected a dotted key, e.g. method.name")
        _set_value(doc, keypath, value, f"--set {key!r}")
    return _job_from_doc(doc, file)


def job_from_data(data: Mapping[str, Any], label: str, base: Path) -> Job:
    """Validate a job given as plain data (a job file's document), as :func:`load_job` does.

    Parameters
    ----------
    data : mapping
        Sections as a job file holds them (``input``, ``method``, ...).
    label : str
        What errors name in place of the file and line, e.g. ``rowfold.lstsq``.
    base : Path
        The folder relative paths resolve against.

    Raises
    ------
    JobError
        With the same messages as for a job file, ``label`` naming where.
    """
    file = base.expanduser().resolve() / label
    plain = json.loads(json.dumps(dict(data), default=_plain_value))
    return _job_from_doc(_Doc(file=file, data=plain, lines={}), file)


def _plain_value(value: Any) -> Any:
    """A value JSON cannot hold, as the job file would: paths and numpy scalars."""
    if isinstance(value, Path):
        return str(value)
    tolist = getattr(value, "tolist", None)  # numpy arrays and scalars
    if callable(tolist):
        return tolist()
    raise JobError(f"value {value!r}: expected plain data (text, numbers, lists, mappings)")


def _job_from_doc(doc: _Doc, file: Path) -> Job:
    """Validate a parsed job document."""
    _Section(doc, (), SECTIONS)
    for required in ("input", "output"):
        if required not in doc.data:
            raise doc.fail((required,), "required section is missing")
    base = file.parent
    name = doc.data.get("name", file.stem)
    if not isinstance(name, str | int | float):
        raise doc.fail(("name",), f"expected text, found {_kind(name)}")
    job = Job(
        name=str(name),
        source=file,
        input=_parse_input(doc, base),
        method=_parse_method(doc),
        output=_parse_output(doc, base),
        solve=_parse_solve(doc),
        gates=_parse_gates(doc),
        cluster=_parse_cluster(doc, base),
        places=MappingProxyType({".".join(key): doc.where(key) for key in doc.lines}),
        update=_parse_update(doc),
    )
    return _with_resolved(job)


def _with_resolved(job: Job) -> Job:
    """Attach the plain-data view of the job (paths as strings)."""
    plain = {
        "name": job.name,
        "source": str(job.source),
        "input": {
            **asdict(job.input),
            "storage_options": redacted(json.loads(job.input.storage_options or "{}")),
        },
        "method": asdict(job.method),
        "output": {
            **asdict(job.output),
            "storage_options": redacted(json.loads(job.output.storage_options or "{}")),
        },
        "solve": asdict(job.solve),
        "gates": asdict(job.gates),
        "cluster": asdict(job.cluster),
        "update": asdict(job.update),
    }
    resolved = json.loads(json.dumps(plain, default=str))
    return Job(
        name=job.name,
        source=job.source,
        input=job.input,
        method=job.method,
        output=job.output,
        solve=job.solve,
        gates=job.gates,
        cluster=job.cluster,
        resolved=MappingProxyType(resolved),
        places=job.places,
        update=job.update,
    )
