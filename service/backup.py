"""A consistent copy of a live SQLite database through sqlite3's online backup API.

The copy is taken page by page while the service keeps writing (the API restarts a pass
that a concurrent writer invalidates), written to a temporary file beside the target,
checked with `PRAGMA integrity_check`, and only then renamed into place: the target is
either a complete, checked copy or untouched. PostgreSQL has its own tools (pg_dump).
"""

from __future__ import annotations

import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path

from service.db.session import sqlite_file

PAGES_PER_STEP = 1024  # pages copied per step; writers get the lock between steps


class BackupError(Exception):
    """The backup could not be made; the message says why and what to do."""


@dataclass(frozen=True)
class BackupResult:
    source: Path
    target: Path
    size_bytes: int
    pages: int
    seconds: float
    tables: dict[str, int]  # rows per table in the copy


def backup_sqlite(database_url: str, target: Path, *, overwrite: bool = False) -> BackupResult:
    """Copy the SQLite database behind `database_url` to `target`; see the module docstring."""
    source = sqlite_file(database_url)
    if source is None:
        raise BackupError(f"{database_url} is not an SQLite file; back up PostgreSQL with pg_dump")
    if not source.is_file():
        raise BackupError(f"database file {source} does not exist (KILTER_DATABASE_URL={database_url})")
    target = Path(target)
    if target.resolve() == source.resolve():
        raise BackupError(f"--to {target} is the live database itself; give another file")
    if target.exists() and not overwrite:
        raise BackupError(f"{target} already exists; remove it or pass --overwrite")
    if not target.parent.is_dir():
        raise BackupError(f"folder {target.parent} does not exist")
    tmp = target.with_name(f".{target.name}.{os.getpid()}.partial")
    t0 = time.perf_counter()
    pages = 0

    def progress(_status: int, remaining: int, total: int) -> None:
        nonlocal pages
        pages = total

    try:
        # The copy holds what the database holds (key hashes, the session secret): mode 0600.
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        os.close(fd)
        src = sqlite3.connect(f"file:{source}?mode=rw", uri=True, timeout=30)  # rw: never creates a file
        try:
            dst = sqlite3.connect(tmp)
            try:
                src.backup(dst, pages=PAGES_PER_STEP, progress=progress, sleep=0.005)
                # The copy is a self-contained file: no WAL beside it.
                dst.execute("PRAGMA journal_mode=DELETE")
                check = dst.execute("PRAGMA integrity_check").fetchall()
                if check != [("ok",)]:
                    raise BackupError(f"the copy failed its integrity check: {check[:5]}")
                names = [r[0] for r in dst.execute("SELECT name FROM sqlite_master WHERE type='table' AND name NOT LIKE 'sqlite_%' ORDER BY name")]
                tables = {n: dst.execute(f'SELECT COUNT(*) FROM "{n}"').fetchone()[0] for n in names}
            finally:
                dst.close()
        finally:
            src.close()
        with open(tmp, "rb") as f:
            os.fsync(f.fileno())
        os.replace(tmp, target)
    except sqlite3.Error as e:
        raise BackupError(f"backup of {source} failed: {e}") from e
    finally:
        if tmp.exists():
            tmp.unlink()
    return BackupResult(source, target, target.stat().st_size, pages, time.perf_counter() - t0, tables)
