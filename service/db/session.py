"""Engine and sessions. SQLite gets WAL, foreign keys and a busy timeout on every
connection (connect event), and write sessions take the write lock up front
(BEGIN IMMEDIATE), so two writers queue on the busy timeout instead of failing when a
read transaction tries to upgrade. Other engines use their own defaults.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event, make_url, text
from sqlalchemy.orm import Session, sessionmaker

_BEGIN_OPTION = "echowatch_begin"


def sqlite_file(url: str) -> Path | None:
    """The database file of an SQLite URL, None for in-memory or other engines."""
    u = make_url(url)
    if u.get_backend_name() != "sqlite" or not u.database or u.database == ":memory:":
        return None
    return Path(u.database)


def make_engine(url: str, *, busy_timeout_ms: int = 5000, echo: bool = False) -> Engine:
    """An engine for `url`; for an SQLite file, its folder is created and the pragmas set."""
    u = make_url(url)
    kwargs: dict[str, Any] = {"echo": echo, "pool_pre_ping": u.get_backend_name() != "sqlite"}
    if u.get_backend_name() == "sqlite":
        path = sqlite_file(url)
        if path is not None:
            path.parent.mkdir(parents=True, exist_ok=True)
        kwargs["connect_args"] = {"check_same_thread": False, "timeout": busy_timeout_ms / 1000}
    engine = create_engine(url, **kwargs)
    if u.get_backend_name() == "sqlite":
        _sqlite_events(engine, busy_timeout_ms)
    return engine


def _sqlite_events(engine: Engine, busy_timeout_ms: int) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Let SQLAlchemy emit BEGIN itself (below) instead of the driver's implicit one.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cur.execute("PRAGMA synchronous=NORMAL")  # safe with WAL; a commit survives a process crash
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        mode = conn.get_execution_options().get(_BEGIN_OPTION, "DEFERRED")
        conn.exec_driver_sql(f"BEGIN {mode}")


class Database:
    """One engine and its two session factories: `session()` for reads, `write()` for writes."""

    def __init__(self, url: str, *, busy_timeout_ms: int = 5000) -> None:
        self.url = url
        self.engine = make_engine(url, busy_timeout_ms=busy_timeout_ms)
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        self._write = sessionmaker(self.engine.execution_options(**{_BEGIN_OPTION: "IMMEDIATE"}), expire_on_commit=False)
        # SQLite has one writer at a time and its busy handler waits by sleeping (up to 100 ms
        # a step), which makes queued writers slow and latency tails long. Writers of this
        # process queue on a lock instead; only writers of other processes meet the busy wait.
        self._write_lock = threading.Lock() if self.is_sqlite else contextlib.nullcontext()

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    def session(self) -> Session:
        return self._read()

    def write_session(self) -> Session:
        return self._write()

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """A write session committed on success and rolled back on any error."""
        with self._write_lock, self.write_session() as s, s.begin():
            yield s

    def ping(self) -> None:
        """Raise if the database cannot answer a trivial query."""
        with self.engine.connect() as conn:
            conn.execute(text("SELECT 1"))

    def dispose(self) -> None:
        self.engine.dispose()
