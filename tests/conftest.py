"""Shared fixtures for the whole suite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

# Keep compiled kernels across test runs in one stable folder (CI sets LAMPYR_CACHE too).
os.environ.setdefault("LAMPYR_CACHE", str(Path.home() / ".cache" / "lampyr"))

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def repo_root() -> Path:
    return ROOT
