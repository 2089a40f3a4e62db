"""Engine and sessions. SQLite gets WAL, foreign keys and a busy timeout on every
connection (connect event), and write sessions take the write lock up front
(BEGIN IMMEDIATE), so two writers queue on the busy timeout instead of failing when a
read transaction tries to upgrade. Other engines use their own defaults.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pydantic_core

from sqlalchemy import Connection, Engine, create_engine, event, make_url, text

try:
    import fcntl
except ImportError:  # not on Windows: writers there meet SQLite's busy timeout
    fcntl = None  # type: ignore[assignment]
from sqlalchemy.orm import Session, sessionmaker

_BEGIN_OPTION = "kilter_begin"


def sqlite_file(url: str) -> Path | None:
    """The database file of an SQLite URL, None for in-memory or other engines."""
    u = make_url(url)
    if u.get_backend_name() != "sqlite" or not u.database or u.database == ":memory:":
        return None
    return Path(u.database)


def private_file(path: Path) -> None:
    """Create `path` empty with mode 0600 if it does not exist yet, so an SQLite database
    (which holds key hashes and the session secret) is never readable by other users;
    SQLite gives its -wal and -shm files the database file's mode."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return
    os.close(fd)


def json_text(value: Any) -> str:
    """JSON columns are written by pydantic-core's serializer (compact, several times faster
    than the json module; the ingest path writes one document per reading) and read back by
    its parser. Floats round-trip exactly; a non-finite float becomes null."""
    return pydantic_core.to_json(value).decode()


def make_engine(url: str, *, busy_timeout_ms: int = 5000, echo: bool = False) -> Engine:
    """An engine for `url`; for an SQLite file, its folder is created and the pragmas set."""
    u = make_url(url)
    kwargs: dict[str, Any] = {
        "echo": echo,
        "pool_pre_ping": u.get_backend_name() != "sqlite",
        "json_serializer": json_text,
        "json_deserializer": pydantic_core.from_json,
    }
    if u.get_backend_name() == "sqlite":
        path = sqlite_file(url)
        if path is not None:
            path.parent.mkdir(parents=True, exist_ok=True)
            private_file(path)
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
        conn.connection.dbapi_connection.execute(f"BEGIN {mode}")  # the driver's own call: no statement machinery


class _WriterLock:
    """Thread lock plus, where the platform has fcntl and the database is a file, an
    exclusive flock on `<database>.writer-lock`."""

    def __init__(self, db_file: Path | None) -> None:
        self._thread_lock = threading.Lock()
        self._path = db_file.with_name(db_file.name + ".writer-lock") if db_file is not None and fcntl is not None else None
        self._fd: int | None = None

    def __enter__(self) -> None:
        self._thread_lock.acquire()
        try:
            if self._path is not None:
                if self._fd is None:
                    self._fd = os.open(self._path, os.O_RDWR | os.O_CREAT, 0o600)
                fcntl.flock(self._fd, fcntl.LOCK_EX)
        except BaseException:
            self._thread_lock.release()
            raise

    def __exit__(self, *exc: object) -> None:
        try:
            if self._fd is not None:
                fcntl.flock(self._fd, fcntl.LOCK_UN)
        finally:
            self._thread_lock.release()

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None


class Database:
    """One engine and its two session factories: `session()` for reads, `write()` for writes."""

    def __init__(self, url: str, *, busy_timeout_ms: int = 5000) -> None:
        self.url = url
        self.engine = make_engine(url, busy_timeout_ms=busy_timeout_ms)
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        self._write_engine = self.engine.execution_options(**{_BEGIN_OPTION: "IMMEDIATE"})
        self._write = sessionmaker(self._write_engine, expire_on_commit=False)
        # SQLite has one writer at a time and its busy handler waits by sleeping (up to 100 ms
        # a step), which makes queued writers slow and latency tails long. Writers queue on a
        # lock instead: a thread lock within the process and, for a database file, an flock on
        # a file beside it across processes (serve --workers N); the busy timeout stays as the
        # backstop for writers outside the service.
        self._write_lock: contextlib.AbstractContextManager[object] = contextlib.nullcontext()
        if self.is_sqlite:
            self._write_lock = _WriterLock(sqlite_file(url))

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    def session(self) -> Session:
        return self._read()

    def write_session(self) -> Session:
        return self._write()

    def connect(self) -> Connection:
        """A Core connection: reads first (no lock; a session on it begins a plain, deferred
        transaction), then `write_transaction(conn)` for the writes. The ingest path uses
        one such connection per request."""
        return self.engine.connect()

    @contextmanager
    def write_transaction(self, conn: Connection) -> Iterator[Connection]:
        """`conn` in a write transaction (BEGIN IMMEDIATE on SQLite, under the writer lock),
        committed on success and rolled back on any error. No ORM session is needed on the
        usual course; `Session(bind=conn)` joins this transaction when one is."""
        with self._write_lock:
            if conn.in_transaction():  # reads left a transaction open
                conn.rollback()
            conn.execution_options(**{_BEGIN_OPTION: "IMMEDIATE"})
            with conn.begin():
                yield conn

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
        if isinstance(self._write_lock, _WriterLock):
            self._write_lock.close()
