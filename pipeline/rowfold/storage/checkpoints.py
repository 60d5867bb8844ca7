"""Checkpoints of a run's first pass, kept beside the output until the result commits.

A folder ``.rowfold-checkpoints-<output name>`` holds ``manifest.json`` (what job and input
the checkpoints belong to) and one ``.npz`` per finished row block. Each file is written
under a temporary name and renamed, so a checkpoint is either complete or absent.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np

PREFIX = ".rowfold-checkpoints-"


def checkpoint_folder(output: Path) -> Path:
    """The checkpoint folder of an output path."""
    return output.with_name(f"{PREFIX}{output.name}")


def save_checkpoint(path: str, arrays: dict[str, Any]) -> None:
    """Save arrays (None values are left out) atomically to ``path`` (.npz)."""
    target = Path(path)
    tmp = target.with_name(f".tmp-{os.getpid()}-{target.name}")  # never matches a block name
    np.savez(tmp, **{k: np.asarray(v) for k, v in arrays.items() if v is not None})  # type: ignore[arg-type]
    os.replace(tmp, target)


def load_checkpoint(path: str) -> dict[str, np.ndarray]:
    """Load the arrays saved by :func:`save_checkpoint`."""
    with np.load(path) as data:
        return {name: data[name] for name in data.files}


def open_checkpoints(output: Path, manifest: dict[str, Any], resume: bool) -> tuple[Path, int]:
    """Prepare the checkpoint folder for a run.

    With ``resume`` and a manifest equal to ``manifest``, the finished blocks are kept;
    otherwise the folder is emptied. Returns the folder and how many blocks were kept.
    """
    folder = checkpoint_folder(output)
    stored = folder / "manifest.json"
    same = False
    if resume and stored.exists():
        try:
            same = json.loads(stored.read_text(encoding="utf-8")) == manifest
        except ValueError:
            same = False
    if not same:
        shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True, exist_ok=True)
    stored.write_text(json.dumps(manifest, sort_keys=True), encoding="utf-8")
    kept = len([p for p in folder.glob("*.npz") if not p.name.startswith(".tmp-")])
    return folder, kept


def close_checkpoints(output: Path) -> None:
    """Remove the checkpoint folder once the result is committed."""
    shutil.rmtree(checkpoint_folder(output), ignore_errors=True)
