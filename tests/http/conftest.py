"""Fixtures for the HTTP tests; the machinery is in service_env.py and tiny_model.py."""

from __future__ import annotations

import sys
import weakref
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import event
from sqlalchemy.pool import Pool

sys.path.insert(0, str(Path(__file__).parent))

import tiny_model  # noqa: E402
from service_env import TEST_DATABASE_URL, Env, bundled_model_dir, start_env  # noqa: E402


@pytest.fixture(scope="session")
def opened_connections() -> Iterator[weakref.WeakSet[Any]]:
    """On the PostgreSQL run, every driver connection any SQLAlchemy pool opens during the
    session (weakly held, so a lost one stays listed until it is collected)."""
    opened: weakref.WeakSet[Any] = weakref.WeakSet()
    if not TEST_DATABASE_URL:
        yield opened
        return

    import psycopg

    def remember(dbapi_conn: Any, _record: Any) -> None:
        if isinstance(dbapi_conn, psycopg.Connection):  # some tests of this run use SQLite files
            opened.add(dbapi_conn)

    event.listen(Pool, "connect", remember)
    yield opened
    event.remove(Pool, "connect", remember)


@pytest.fixture(autouse=True)
def no_database_connection_left_open(opened_connections: weakref.WeakSet[Any]) -> Iterator[None]:
    """On the PostgreSQL run: after each test (and its services' shutdown) no driver
    connection may still be open. One left behind (say, handed back to a pool already
    disposed) is otherwise only noticed when the collector finds it, as a warning at the end
    of the session that names no test."""
    yield
    left = [c for c in list(opened_connections) if not c.closed]
    for c in left:
        c.close()  # so the next tests do not report it again
    assert not left, f"{len(left)} PostgreSQL connection(s) still open after the test"


@pytest.fixture
def tiny_dir(tmp_path: Path) -> Path:
    root = tmp_path / "models"
    tiny_model.build(root)
    return root


@pytest.fixture
def env(tmp_path: Path, tiny_dir: Path) -> Iterator[Env]:
    """The app on the steerable tiny model (window 6, stride 2, 60 s grid, fill 2 steps)."""
    yield from start_env(tmp_path, tiny_dir)


@pytest.fixture
def bundled_env(tmp_path: Path) -> Iterator[Env]:
    """The app on the bundled model."""
    yield from start_env(tmp_path, bundled_model_dir())
