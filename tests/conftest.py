"""Shared fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest
from _shared import SHARED


@pytest.fixture
def shared_dir() -> Path:
    """The read-only shared folder beside the repository."""
    if not SHARED.is_dir():
        pytest.skip(f"shared folder not found at {SHARED}")
    return SHARED
