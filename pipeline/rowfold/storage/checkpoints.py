"""Checkpoints of a run's first pass, kept beside the output until the result commits.

A private folder ``.rowfold-checkpoints-<output name>`` holds ``manifest.json`` (the job's
digest and, per row block, its bounds and *stamp*) and one ``.npz`` per finished block. A
block's stamp is a digest of the job, the block's bounds and the digests of its rows in
every input (:mod:`.digests`); each checkpoint carries the stamp it was computed under and a
digest of its own arrays. ``run --resume`` keeps a checkpoint only when both still hold;
anything else (rows changed since, another job, a corrupt or altered file, a file that is
not a regular file) is removed with a note naming it, and its block is computed again.

Every file is written under a new temporary name created exclusively in the folder
(``O_CREAT | O_EXCL | O_NOFOLLOW``, relative to the folder opened without following a
symlink) and renamed over its final name, so a checkpoint is complete or absent and a
symlink planted in the folder is never written through.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import secrets
import shutil
import stat
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import blake3
import numpy as np

from rowfold.errors import RunError

PREFIX = ".rowfold-checkpoints-"
MANIFEST = "manifest.json"
LEAF = re.compile(r"^tsqr-leaf-(\d{7})\.npz$")
FORMAT = 2
"""Version of the checkpoint layout (1: the unstamped first version)."""

_OPEN_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)
_OPEN_DIRECTORY = getattr(os, "O_DIRECTORY", 0)


class CheckpointError(RunError):
    """A checkpoint cannot be used: unreadable, altered, or computed from other rows."""


def checkpoint_folder(output: Path) -> Path:
    """The checkpoint folder of an output path."""
    return output.with_name(f"{PREFIX}{output.name}")


def leaf_name(index: int) -> str:
    """File name of block ``index``'s checkpoint."""
    return f"tsqr-leaf-{index:07d}.npz"


def job_digest(job: dict[str, Any]) -> str:
    """Digest of the (plain-data) job a run's checkpoints belong to."""
    text = json.dumps(job, sort_keys=True, default=str)
    return str(blake3.blake3(b"rowfold-job-v1" + text.encode()).hexdigest())


def block_stamp(job: str, start: int, stop: int, row_digests: list[str]) -> str:
    """The stamp of one block: the job digest, the bounds and its rows' digests."""
    digest = blake3.blake3(b"rowfold-stamp-v1" + job.encode())
    digest.update(np.asarray([start, stop], dtype="<i8").tobytes())
    for row_digest in row_digests:
        digest.update(bytes.fromhex(row_digest))
    return str(digest.hexdigest())


def _content_digest(arrays: dict[str, np.ndarray]) -> str:
    """Digest of a checkpoint's arrays (names, dtypes, shapes and values)."""
    digest = blake3.blake3(b"rowfold-checkpoint-v1")
    for name in sorted(arrays):
        value = np.ascontiguousarray(arrays[name])
        head = f"{name}|{value.dtype.str}|{list(value.shape)}|".encode()
        digest.update(np.asarray([len(head)], dtype="<i8").tobytes() + head)
        digest.update(value.reshape(-1).view(np.uint8).data)
    return str(digest.hexdigest())


def write_exclusive(folder: Path, name: str, write: Callable[[BinaryIO], None]) -> None:
    """Write ``folder/name`` through a temporary file created exclusively in ``folder``.

    The folder is opened without following a symlink, the temporary file with
    ``O_CREAT | O_EXCL | O_NOFOLLOW`` under a random name relative to it, and the file is
    renamed over ``name`` only when ``write`` returns; a file or symlink planted at either
    name is never written through.
    """
    tmp = f".tmp-{secrets.token_hex(8)}-{name}"
    folder_fd = os.open(folder, os.O_RDONLY | _OPEN_DIRECTORY | _OPEN_NOFOLLOW)
    try:
        flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | _OPEN_NOFOLLOW
        fd = os.open(tmp, flags, 0o600, dir_fd=folder_fd)
        try:
            with os.fdopen(fd, "wb") as handle:
                write(handle)
            os.replace(tmp, name, src_dir_fd=folder_fd, dst_dir_fd=folder_fd)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(tmp, dir_fd=folder_fd)
            raise
    finally:
        os.close(folder_fd)


def save_checkpoint(path: str, arrays: dict[str, Any], stamp: str) -> None:
    """Save arrays (None values are left out) to ``path`` (.npz) with the block's stamp and
    a digest of the arrays; the file appears complete or not at all."""
    kept = {k: np.asarray(v) for k, v in arrays.items() if v is not None}
    extra = {"stamp": np.asarray(stamp), "digest": np.asarray(_content_digest(kept))}
    target = Path(path)

    def write(handle: BinaryIO) -> None:
        np.savez(handle, **{**kept, **extra})  # type: ignore[arg-type]

    write_exclusive(target.parent, target.name, write)


def load_checkpoint(path: str, stamp: str) -> dict[str, np.ndarray]:
    """Load a checkpoint saved by :func:`save_checkpoint` under ``stamp``.

    Raises
    ------
    CheckpointError
        When the file is not a regular file, cannot be read, its arrays do not match the
        digest it carries, or it was saved under another stamp (other rows or job).
    """
    try:
        fd = os.open(path, os.O_RDONLY | _OPEN_NOFOLLOW)
        with os.fdopen(fd, "rb") as handle:
            if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
                raise CheckpointError("it is not a regular file")
            with np.load(handle, allow_pickle=False) as data:
                arrays = {name: data[name] for name in data.files}
    except CheckpointError:
        raise
    except Exception as exc:
        raise CheckpointError(f"it cannot be read ({exc.__class__.__name__}: {exc})") from None
    recorded, saved_stamp = arrays.pop("digest", None), arrays.pop("stamp", None)
    if recorded is None or str(recorded) != _content_digest(arrays):
        raise CheckpointError("its content does not match its recorded digest (corrupt or altered)")
    if saved_stamp is None or str(saved_stamp) != stamp:
        raise CheckpointError("it was computed from other rows or another job")
    return arrays


def read_manifest(folder: Path) -> dict[str, Any] | None:
    """The folder's manifest (None when absent, not a regular file, or unreadable)."""
    try:
        fd = os.open(folder / MANIFEST, os.O_RDONLY | _OPEN_NOFOLLOW)
        with os.fdopen(fd, "rb") as handle:
            if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
                return None
            loaded = json.loads(handle.read().decode("utf-8"))
    except (OSError, ValueError):
        return None
    return loaded if isinstance(loaded, dict) and loaded.get("format") == FORMAT else None


def block_stamps(folder: Path) -> tuple[list[str], list[str]]:
    """The stamp of every block of the current run, and the notes on the checkpoints
    discarded when it started, from its manifest."""
    manifest = read_manifest(folder)
    if manifest is None:
        raise RunError(f"{folder / MANIFEST}: the checkpoint manifest is missing or unreadable")
    stamps = [str(block[2]) for block in manifest["blocks"]]
    return stamps, [str(note) for note in manifest.get("discarded", [])]


def _remove(path: Path) -> None:
    """Remove whatever is at ``path`` (a symlink itself, never what it points to)."""
    if path.is_symlink() or not path.is_dir():
        path.unlink(missing_ok=True)
    else:
        shutil.rmtree(path, ignore_errors=True)


def open_checkpoints(
    output: Path, manifest: dict[str, Any], resume: bool
) -> tuple[Path, int, list[str]]:
    """Prepare the checkpoint folder for a run.

    Parameters
    ----------
    output : Path
        The run's output path.
    manifest : dict
        ``{"job": job digest, "blocks": [[start, stop, stamp], ...]}`` of this run.
    resume : bool
        Keep the checkpoints an interrupted run left that still hold (see the module
        docstring); otherwise start from an empty folder.

    Returns
    -------
    folder, kept, notes
        The folder, how many checkpoints were kept, and one line per checkpoint discarded.
    """
    folder = checkpoint_folder(output)
    notes: list[str] = []
    kept = 0
    if resume and folder.is_dir() and not folder.is_symlink():
        kept, notes = _sift(folder, manifest, read_manifest(folder))
    else:
        _remove(folder)
        folder.mkdir(mode=0o700)
    record = {"format": FORMAT, **manifest, "discarded": notes}
    text = json.dumps(record, sort_keys=True).encode("utf-8")

    def write(handle: BinaryIO) -> None:
        handle.write(text)

    write_exclusive(folder, MANIFEST, write)
    return folder, kept, notes


def _sift(
    folder: Path, manifest: dict[str, Any], earlier: dict[str, Any] | None
) -> tuple[int, list[str]]:
    """Keep the checkpoints that still hold, remove everything else; say why."""
    blocks = manifest["blocks"]
    same_job = earlier is not None and earlier.get("job") == manifest["job"]
    kept, notes = 0, []
    for entry in sorted(folder.iterdir()):
        if entry.name == MANIFEST and entry.is_file() and not entry.is_symlink():
            continue
        match = LEAF.match(entry.name)
        if match is None or entry.is_symlink() or not entry.is_file():
            _remove(entry)  # temporary leftovers, anything planted
            continue
        index = int(match.group(1))
        shown = f"checkpoint {folder.name}/{entry.name}"
        if index >= len(blocks):
            notes.append(f"{shown}: this run has no block {index}; discarded")
            entry.unlink()
            continue
        start, stop, stamp = blocks[index]
        try:
            load_checkpoint(str(entry), stamp)
        except CheckpointError as exc:
            reason = str(exc)
            if "other rows" in reason:
                reason = (
                    f"rows {start}..{stop - 1} of the input changed since it was saved"
                    if same_job
                    else "it belongs to another job (or other rows)"
                )
            notes.append(f"{shown}: {reason}; discarded, block {index} is computed again")
            entry.unlink()
            continue
        kept += 1
    return kept, notes


def close_checkpoints(output: Path) -> None:
    """Remove the checkpoint folder once the result is committed."""
    folder = checkpoint_folder(output)
    if folder.exists() or folder.is_symlink():
        _remove(folder)


@dataclass(frozen=True, slots=True)
class BlockCheckpoint:
    """One row block's checkpoint, as its leaf task carries it (text only, no handle).

    Implements :class:`rowfold.methods.base.LeafCheckpoint`.

    Attributes
    ----------
    path : str
        The checkpoint file.
    stamp : str
        The digest of the job and of the block's rows it must carry.
    saved : bool
        Whether the file was there (and kept) when the run started.
    """

    path: str
    stamp: str
    saved: bool

    def save(self, arrays: dict[str, Any]) -> None:
        """Save the leaf's arrays (see :func:`save_checkpoint`)."""
        save_checkpoint(self.path, arrays, self.stamp)

    def load(self) -> dict[str, np.ndarray]:
        """The saved arrays; a checkpoint changed since the run started fails the run with
        its name (the next resume discards it).

        Raises
        ------
        RunError
            When the file no longer holds what was checked at the start.
        """
        try:
            return load_checkpoint(self.path, self.stamp)
        except CheckpointError as exc:
            raise RunError(
                f"checkpoint {self.path}: {exc} (it changed during the run); run `rowfold run "
                "--resume` again to compute that block again"
            ) from None


@dataclass(frozen=True, slots=True)
class CheckpointFolder:
    """The run's checkpoint folder as a method sees it
    (:class:`rowfold.methods.base.Checkpoints`).

    Attributes
    ----------
    folder : Path
        The folder :func:`open_checkpoints` prepared, with its manifest.
    """

    folder: Path

    def leaves(self, blocks: int) -> tuple[list[BlockCheckpoint], list[str]]:
        """Every block's checkpoint, and the notes on those discarded when the run started.

        Raises
        ------
        RunError
            When the manifest does not describe ``blocks`` blocks.
        """
        stamps, notes = block_stamps(self.folder)
        if len(stamps) != blocks:
            raise RunError(
                f"{self.folder}: the checkpoint manifest does not describe this run's blocks"
            )
        found = []
        for i, stamp in enumerate(stamps):
            path = str(self.folder / leaf_name(i))
            found.append(BlockCheckpoint(path, stamp, os.path.isfile(path)))
        return found, notes
