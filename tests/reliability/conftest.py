"""Fixtures for the in-process reliability tests (see inproc.py)."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

import support  # noqa: E402
from inproc import App, start_app  # noqa: E402


@pytest.fixture
def app(tmp_path: Path) -> Iterator[App]:
    yield from start_app(tmp_path)


@pytest.fixture(scope="session")
def pg_base() -> Iterator[str]:
    """The private test PostgreSQL server's URL for this session (request it only when
    support.pg_server.available(); tests mark themselves skipif otherwise)."""
    yield from support.pg_base_url()
