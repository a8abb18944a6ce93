"""Shared test fixtures for hopwell."""

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def systems_dir() -> Path:
    """The shipped input molecules."""
    return REPO / "systems"
