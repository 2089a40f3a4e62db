"""The layers below the API stand on their own: the caller, the domain errors, the db
layer and the ingest path import no web framework, and the domain errors carry no HTTP
status (the API maps them in one place, service/api/errors.py)."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.exc import OperationalError

from service import errors
from service.api.errors import HTTP_STATUS, http_status

ROOT = Path(__file__).resolve().parents[2]

BELOW_THE_API = ("service.caller", "service.errors", "service.db.alerts", "service.db.thresholds", "service.db.readings", "service.ingest")

PROBE = textwrap.dedent(
    """
    import importlib, sys

    class BlockWeb:
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in ("fastapi", "starlette"):
                raise ImportError(f"the web framework is blocked below the API: {name}")
            return None

    sys.meta_path.insert(0, BlockWeb())
    for name in sys.argv[1:]:
        importlib.import_module(name)
    assert not any(m.split(".")[0] in ("fastapi", "starlette") for m in sys.modules)
    print("ok")
    """
)


def test_layers_below_the_api_import_no_web_framework() -> None:
    done = subprocess.run([sys.executable, "-c", PROBE, *BELOW_THE_API], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "ok"


def test_the_probe_does_block_the_web_framework() -> None:
    """Guard against a probe that cannot fail: importing the API under it is refused."""
    done = subprocess.run([sys.executable, "-c", PROBE, "service.api.deps"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode != 0 and "blocked below the API" in done.stderr


def test_domain_errors_carry_no_http_status_and_every_one_is_mapped() -> None:
    kinds = [getattr(errors, n) for n in dir(errors) if isinstance(getattr(errors, n), type) and issubclass(getattr(errors, n), errors.KilterError)]
    assert len(kinds) >= 10
    for kind in kinds:
        assert not hasattr(kind, "status"), kind
        if kind is not errors.KilterError:
            assert http_status(kind("x")) != 500, f"{kind.__name__} has no HTTP status in service/api/errors.py"
    assert http_status(errors.DatabaseBusy("x")) == 503 and HTTP_STATUS[errors.NotFound] == 404


def test_a_real_sqlite_lock_is_classified_busy(tmp_path: Path) -> None:
    """Two connections to one SQLite file: while one holds the write lock, the other's write
    fails with SQLite's own 'database is locked' (timeout 0), which is DatabaseBusy."""
    path = tmp_path / "busy.db"
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("CREATE TABLE t (x INTEGER)")
    holder.execute("BEGIN IMMEDIATE")
    engine = create_engine(f"sqlite:///{path}", connect_args={"timeout": 0})
    try:
        with pytest.raises(OperationalError) as info, engine.begin() as conn:
            conn.execute(text("INSERT INTO t VALUES (1)"))
        assert errors.is_busy(info.value)
        mapped = errors.database_error(info.value)
        assert isinstance(mapped, errors.DatabaseBusy) and mapped.retry_after_s == 1
    finally:
        holder.execute("ROLLBACK")
        holder.close()
        engine.dispose()


def test_a_missing_table_is_not_busy(tmp_path: Path) -> None:
    engine = create_engine(f"sqlite:///{tmp_path / 'x.db'}")
    try:
        with pytest.raises(OperationalError) as info, engine.connect() as conn:
            conn.execute(text("SELECT * FROM nowhere"))
        assert not errors.is_busy(info.value)
        assert isinstance(errors.database_error(info.value), errors.DatabaseUnavailable)
    finally:
        engine.dispose()
