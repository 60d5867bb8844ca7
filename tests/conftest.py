"""Shared fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture
def job_folder(tmp_path: Path) -> Path:
    """A fresh folder for one job's files."""
    return tmp_path
