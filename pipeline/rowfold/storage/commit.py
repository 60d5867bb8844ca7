"""The commit protocol: a result store and its two reports change together, or not at all.

For an output ``DIR/NAME`` (an ``.h5`` file or a ``.zarr`` folder) with reports
``DIR/STEM.report.json`` and ``DIR/STEM.report.html``, one commit uses::

    DIR/.rowfold-stage-<16 random hex>-NAME/   created exclusively (mkdir, mode 0700)
        new/NAME, new/STEM.report.json, ...    the staged parts, written complete
        old/                                   where a replaced folder (Zarr) is set aside
        journal.json                           the intent record, from the commit point on

The steps, each a test hook point ``commit:<step>`` (:mod:`rowfold.testhooks`):

1. ``staged``: every part is complete under ``new/``.
2. ``synced``: every file and folder of every part is fsynced.
3. ``journal-written``: ``journal.json.tmp`` holds the commit id, each part with its file
   count and bytes, and the renames in order; it is fsynced.
4. ``journal``: it is renamed to ``journal.json`` and the staging folder fsynced. This is
   the commit point.
5. For each part in order (the store first): a folder already at ``DIR/NAME`` is renamed
   to ``old/NAME`` (``aside:NAME``), then ``new/NAME`` is renamed onto ``DIR/NAME``
   (``install:NAME``; for a file this one rename atomically replaces the old one).
6. ``installed``: ``DIR`` is fsynced.
7. ``finished``: the journal is deleted and the staging folder fsynced; the staging folder,
   with any old copies, is then removed.

:func:`recover` runs, under the output's lock, at the start of the next run, update, check
or inspect of that output. A staging folder without a journal (killed before the commit
point) is removed: the old result was never touched. A staging folder with a journal is
rolled forward: each part still under ``new/`` must match the journal's file count and
bytes; then the renames are replayed (a part whose ``new/`` entry is gone was installed
already, and a folder is set aside only while its replacement is still staged, so a replay
never moves the new result away) and steps 6-7 follow. If a staged part does not match (the
disk lost data), nothing is touched and recovery refuses, naming the folder. Nothing old is
deleted before the new result is in place, so every instant of a kill leaves either the old
result whole or a journal that completes the new one. The store carries the commit id as
the attribute ``rowfold_commit`` and the JSON report as ``commit``, so a reader can check
that they belong together.

An object store (no atomic rename) fits the same steps: parts are staged under a key prefix
named by the commit id, the journal becomes the pointer object that readers follow and that
is written last (the commit point), and steps 5-7 become deleting the previous prefix once
the pointer names the new one.

Every temporary name here is created exclusively with a random part (``mkdir`` or
``O_CREAT | O_EXCL | O_NOFOLLOW``), so no planted file or link is ever written through, and
clean-up removes links themselves, never what they point to.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import secrets
import shutil
import stat
import uuid
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from rowfold import interrupts, testhooks
from rowfold.errors import OutputError

STAGE_PREFIX = ".rowfold-stage-"
WORK_PREFIX = ".rowfold-work-"
TMP_PREFIX = ".rowfold-tmp-"
JOURNAL = "journal.json"
JOURNAL_FORMAT = 1
_RANDOM = r"[0-9a-f]{16}"


def exclusive_dir(folder: Path, prefix: str, name: str, mode: int = 0o777) -> Path:
    """Create ``folder/<prefix><random>-<name>`` with ``mkdir`` (never an existing entry)."""
    for _ in range(100):
        path = folder / f"{prefix}{secrets.token_hex(8)}-{name}"
        try:
            os.mkdir(path, mode)
        except FileExistsError:
            continue
        return path
    raise FileExistsError(f"{folder}: no free name for {prefix}...-{name}")


def exclusive_name(folder: Path, prefix: str, name: str) -> Path:
    """A fresh random sibling name (the caller creates it with ``O_EXCL``)."""
    return folder / f"{prefix}{secrets.token_hex(8)}-{name}"


def write_new_file(path: Path, data: bytes) -> None:
    """Create ``path`` (it must not exist; a link there is not followed), write, fsync."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC
    fd = os.open(path, flags, 0o666)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view) :]
        os.fsync(fd)
    finally:
        os.close(fd)


def remove_entry(path: Path) -> None:
    """Remove a file, link or folder tree; a link is removed itself, never followed."""
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return
    if stat.S_ISDIR(info.st_mode):
        shutil.rmtree(path, ignore_errors=True)  # does not follow links inside (fd-based)
    else:
        path.unlink(missing_ok=True)


def sync_dir(path: Path) -> None:
    """fsync a folder, making the names created or renamed in it durable."""
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def sync_tree(path: Path) -> None:
    """fsync a file, or every file and folder of a tree (links are not followed)."""
    if not stat.S_ISDIR(os.lstat(path).st_mode):
        _sync_file(path)
        return
    for root, _, files in os.walk(path, topdown=False):
        for name in files:
            _sync_file(Path(root) / name)
        sync_dir(Path(root))


def _sync_file(path: Path) -> None:
    if not stat.S_ISREG(os.lstat(path).st_mode):
        return
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def tree_size(path: Path) -> tuple[int, int]:
    """(files, bytes) of a file or a folder tree, not following links."""
    info = os.lstat(path)
    if not stat.S_ISDIR(info.st_mode):
        return 1, info.st_size
    files = total = 0
    for root, _, names in os.walk(path):
        for name in names:
            files += 1
            total += os.lstat(Path(root) / name).st_size
    return files, total


class Staging:
    """The staging folder of one commit of ``output`` (see the module docstring).

    Parameters
    ----------
    output : Path
        The result store's final path; the staging folder is created beside it.
    """

    def __init__(self, output: Path) -> None:
        self.output = output
        self.folder = exclusive_dir(output.parent, STAGE_PREFIX, output.name, 0o700)
        os.mkdir(self.folder / "new", 0o700)
        os.mkdir(self.folder / "old", 0o700)
        self.commit_id = uuid.uuid4().hex

    def part(self, name: str) -> Path:
        """Where part ``name`` (a file name in the output's folder) is staged."""
        return self.folder / "new" / name

    def write_text(self, name: str, text: str) -> None:
        """Stage a text part (a report)."""
        write_new_file(self.part(name), text.encode("utf-8"))

    @property
    def past_commit_point(self) -> bool:
        """Whether the journal exists (the commit must then be completed, not dropped)."""
        return os.path.lexists(self.folder / JOURNAL)

    def commit(self, names: list[str]) -> None:
        """Run steps 1-7: make the staged parts ``names`` the output, in this order.

        Raises
        ------
        OutputError
            Before the commit point, when a part's destination cannot take it.
        OSError
            From the file system; after the commit point the journal stays for recovery.
        """
        testhooks.reached("commit:staged")
        base = self.output.parent
        for name in names:
            _check_destination(base / name, self.part(name))
            sync_tree(self.part(name))
        sync_dir(self.folder / "new")
        testhooks.reached("commit:synced")
        journal = self._journal(names)
        with interrupts.deferred(self.output):
            _write_journal(self.folder, journal)
            _replay(base, journal)
            _finish(base, self.folder)

    def discard(self) -> bool:
        """Remove the staging folder unless the commit point was passed; say if removed."""
        if self.past_commit_point:
            return False
        remove_entry(self.folder)
        return True

    def _journal(self, names: list[str]) -> dict[str, Any]:
        stage = self.folder.name
        parts, renames = [], []
        for name in names:
            staged = self.part(name)
            files, size = tree_size(staged)
            folder = stat.S_ISDIR(os.lstat(staged).st_mode)
            parts.append({"name": name, "folder": folder, "files": files, "bytes": size})
            if folder:
                renames.append(
                    {"step": "aside", "from": name, "to": f"{stage}/old/{name}", "name": name}
                )
            renames.append(
                {"step": "install", "from": f"{stage}/new/{name}", "to": name, "name": name}
            )
        return {
            "format": JOURNAL_FORMAT,
            "commit": self.commit_id,
            "output": self.output.name,
            "stage": stage,
            "parts": parts,
            "renames": renames,
        }


def _check_destination(final: Path, staged: Path) -> None:
    """A staged file cannot replace a folder: refuse before the commit point."""
    if os.path.isdir(final) and not os.path.islink(final) and not staged.is_dir():
        raise OutputError(f"{final}: is a folder; rowfold writes a file there")


def _write_journal(folder: Path, journal: dict[str, Any]) -> None:
    tmp = folder / f"{JOURNAL}.tmp"
    write_new_file(tmp, json.dumps(journal, indent=1).encode("utf-8"))
    testhooks.reached("commit:journal-written")
    os.rename(tmp, folder / JOURNAL)
    sync_dir(folder)
    testhooks.reached("commit:journal")


def _replay(base: Path, journal: dict[str, Any]) -> None:
    """Perform the journal's renames that have not happened yet (idempotent)."""
    stage = base / journal["stage"]
    for rename in journal["renames"]:
        source, target = base / rename["from"], base / rename["to"]
        still_staged = os.path.lexists(stage / "new" / rename["name"])
        if rename["step"] == "aside":
            if still_staged and os.path.lexists(source) and not os.path.lexists(target):
                os.rename(source, target)
            testhooks.reached(f"commit:aside:{rename['name']}")
        elif still_staged:
            os.replace(source, target)
            testhooks.reached(f"commit:install:{rename['name']}")


def _finish(base: Path, folder: Path) -> None:
    sync_dir(base)
    testhooks.reached("commit:installed")
    os.unlink(folder / JOURNAL)
    sync_dir(folder)
    testhooks.reached("commit:finished")
    remove_entry(folder)


# ---------------------------------------------------------------- recovery


def _patterns(output: Path, reports: Iterable[Path]) -> dict[str, re.Pattern[str]]:
    name = re.escape(output.name)
    legacy = "|".join(re.escape(p.name) for p in (output, *reports))
    return {
        "stage": re.compile(rf"^{re.escape(STAGE_PREFIX)}{_RANDOM}-{name}$"),
        "work": re.compile(rf"^{re.escape(WORK_PREFIX)}{_RANDOM}-{name}$"),
        # names of rowfold 0.1 before this protocol: .rowfold-tmp-PID-..., .rowfold-old-PID-...
        "legacy-tmp": re.compile(rf"^\.rowfold-tmp-\d+-(?:work-)?(?:{legacy})$"),
        "legacy-old": re.compile(rf"^\.rowfold-old-\d+-{name}$"),
    }


def leftovers(output: Path, reports: Iterable[Path]) -> list[tuple[str, Path]]:
    """Entries beside ``output`` that an earlier, interrupted run of it left."""
    patterns = _patterns(output, reports)
    try:
        names = sorted(os.listdir(output.parent))
    except OSError:
        return []
    found = []
    for entry in names:
        for kind, pattern in patterns.items():
            if pattern.match(entry):
                found.append((kind, output.parent / entry))
    return found


def recover(output: Path, reports: Iterable[Path]) -> list[str]:
    """Finish or roll back what interrupted runs of ``output`` left; call under its lock.

    Returns one note per thing done (for the log).

    Raises
    ------
    OutputError
        When an interrupted commit's journal or staged parts are damaged (nothing is
        touched then; the message names the folder).
    """
    notes = []
    for kind, path in leftovers(output, list(reports)):
        info = os.lstat(path)
        if stat.S_ISLNK(info.st_mode) or info.st_uid != os.geteuid():
            if stat.S_ISLNK(info.st_mode):
                _unlink_quietly(path)  # a link under one of our names: remove the link only
            continue
        if kind == "stage":
            notes.append(_recover_stage(output, path))
        elif kind == "legacy-old" and not os.path.lexists(output) and stat.S_ISDIR(info.st_mode):
            os.rename(path, output)
            notes.append(f"{output}: restored the previous result that {path.name} held")
        else:
            remove_entry(path)
    return [note for note in notes if note]


def _unlink_quietly(path: Path) -> None:
    with contextlib.suppress(OSError):  # e.g. another user's link in a sticky folder
        path.unlink()


def _recover_stage(output: Path, folder: Path) -> str:
    journal_path = folder / JOURNAL
    if not os.path.lexists(journal_path):
        remove_entry(folder)
        return (
            f"{output}: removed {folder.name}, the staging folder of an interrupted run "
            "(it had no journal, so nothing of it was pending)"
        )
    journal = _load_journal(output, folder)
    _verify(output, folder, journal)
    _replay(output.parent, journal)
    _finish(output.parent, folder)
    return f"{output}: completed the interrupted commit {journal['commit']}"


def _load_journal(output: Path, folder: Path) -> dict[str, Any]:
    try:
        journal = json.loads((folder / JOURNAL).read_text(encoding="utf-8"))
        ok = journal["format"] == JOURNAL_FORMAT and journal["stage"] == folder.name
        ok = ok and journal["output"] == output.name
    except (OSError, ValueError, KeyError, TypeError):
        ok = False
    if not ok:
        raise OutputError(_damaged(output, folder, "its journal cannot be read"))
    return dict(journal)


def _verify(output: Path, folder: Path, journal: dict[str, Any]) -> None:
    """Every part still staged must be as complete as the journal recorded."""
    for part in journal["parts"]:
        staged = folder / "new" / part["name"]
        if not os.path.lexists(staged):
            continue
        files, size = tree_size(staged)
        if (files, size) != (part["files"], part["bytes"]):
            found = f"{files} files, {size} bytes; the journal says "
            found += f"{part['files']} files, {part['bytes']} bytes"
            raise OutputError(_damaged(output, folder, f"staged {part['name']} holds {found}"))


def _damaged(output: Path, folder: Path, what: str) -> str:
    return (
        f"{output}: the interrupted commit in {folder.name} cannot be completed ({what}); "
        "nothing was changed; check the disk, then move that folder away"
    )
