"""Fixtures for the in-process reliability tests (see inproc.py)."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from inproc import App, start_app  # noqa: E402


@pytest.fixture
def app(tmp_path: Path) -> Iterator[App]:
    yield from start_app(tmp_path)
