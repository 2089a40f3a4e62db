"""A private, throwaway PostgreSQL server on 127.0.0.1 for the tests (Debian's postgresql).

    python tests/pg_server.py start [--fresh]  # prints the SQLAlchemy URL of a ready database
    python tests/pg_server.py stop

Idempotent: `start` reuses a running server. PostgreSQL refuses to run as root, so as
root the cluster belongs to Debian's `postgres` user (commands run through runuser); as
anyone else it belongs to that user. The data folder lives under /tmp (readable by the
`postgres` user, unlike a root-owned checkout). It is a test cluster: trust authentication
on loopback only, no Unix socket, fsync off (durability is not what these tests measure).
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

PORT = int(os.environ.get("KILTER_TEST_PG_PORT", "55432"))
DATA = Path(os.environ.get("KILTER_TEST_PG_DIR", f"/tmp/kilter-pgtest-{PORT}"))
DBNAME = "kilter_test"
USER = "kilter"


def pg_bin(name: str) -> str | None:
    """Path of a PostgreSQL server program (Debian keeps them under /usr/lib/postgresql/N/bin)."""
    found = sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"), key=lambda p: int(p.split("/")[4]) if p.split("/")[4].isdigit() else 0)
    if found:
        return found[-1]
    return shutil.which(name)


def available() -> bool:
    return pg_bin("initdb") is not None and pg_bin("pg_ctl") is not None


def url() -> str:
    return f"postgresql+psycopg://{USER}@127.0.0.1:{PORT}/{DBNAME}"


def _as_owner(cmd: list[str]) -> list[str]:
    if os.geteuid() == 0:
        return ["runuser", "-u", "postgres", "--", *cmd]
    return cmd


def _run(cmd: list[str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(_as_owner(cmd), capture_output=True, text=True, check=False, cwd="/tmp")


def _accepting() -> bool:
    try:
        with socket.create_connection(("127.0.0.1", PORT), timeout=0.5):
            return True
    except OSError:
        return False


def _psql(sql: str, db: str = "postgres") -> subprocess.CompletedProcess[str]:
    psql = shutil.which("psql") or pg_bin("psql")
    assert psql is not None
    return subprocess.run(
        [psql, "-h", "127.0.0.1", "-p", str(PORT), "-U", USER, "-d", db, "-v", "ON_ERROR_STOP=1", "-qAt", "-c", sql],
        capture_output=True, text=True, check=False,
    )


def start() -> str:
    """Start (or reuse) the server and make sure the test database exists; return its URL."""
    if not available():
        raise SystemExit("PostgreSQL server programs not found: apt-get install postgresql")
    if not _accepting():
        if not (DATA / "PG_VERSION").exists():
            if DATA.exists():
                shutil.rmtree(DATA)
            DATA.mkdir(parents=True)
            if os.geteuid() == 0:
                shutil.chown(DATA, "postgres", "postgres")
            r = _run([pg_bin("initdb") or "initdb", "-D", str(DATA), "-U", USER, "--auth=trust", "-E", "UTF8", "--locale=C.UTF-8"])
            if r.returncode != 0:
                raise SystemExit(f"initdb failed: {r.stderr.strip()}")
        opts = f"-c listen_addresses=127.0.0.1 -p {PORT} -c unix_socket_directories='' -c fsync=off -c synchronous_commit=off -c full_page_writes=off -c max_connections=200"
        r = _run([pg_bin("pg_ctl") or "pg_ctl", "-D", str(DATA), "-l", str(DATA / "server.log"), "-o", opts, "-w", "-t", "60", "start"])
        if r.returncode != 0 and not _accepting():
            log = (DATA / "server.log").read_text(errors="replace")[-2000:] if (DATA / "server.log").exists() else ""
            raise SystemExit(f"pg_ctl start failed: {r.stderr.strip()}\n{log}")
    for _ in range(100):
        if _psql("SELECT 1").returncode == 0:
            break
        time.sleep(0.1)
    have = _psql(f"SELECT 1 FROM pg_database WHERE datname = '{DBNAME}'")
    if have.returncode != 0:
        raise SystemExit(f"cannot reach the test server on 127.0.0.1:{PORT}: {have.stderr.strip()}")
    if have.stdout.strip() != "1":
        r = _psql(f"CREATE DATABASE {DBNAME}")
        if r.returncode != 0 and "already exists" not in r.stderr:
            raise SystemExit(f"CREATE DATABASE failed: {r.stderr.strip()}")
    return url()


def reset() -> None:
    """Drop the per-test schemas a previous run left behind."""
    r = _psql("SELECT nspname FROM pg_namespace WHERE nspname LIKE 't\\_%'", DBNAME)
    for name in r.stdout.split():
        _psql(f"DROP SCHEMA IF EXISTS {name} CASCADE", DBNAME)


def schema_url(base_url: str, key: str) -> str:
    """A schema of the test database for one test (named from `key`, created if new), as a URL
    whose connections use it as their search path; so tests never see each other's rows."""
    import hashlib

    from sqlalchemy import create_engine, text

    name = "t_" + hashlib.sha256(key.encode()).hexdigest()[:20]
    engine = create_engine(base_url)
    try:
        with engine.begin() as conn:
            conn.execute(text(f"CREATE SCHEMA IF NOT EXISTS {name}"))
            # Tests write their checking SQL for SQLite; give PostgreSQL SQLite's round(real, digits).
            conn.execute(text(
                f"CREATE OR REPLACE FUNCTION {name}.round(double precision, integer) RETURNS double precision "
                "AS $$ SELECT pg_catalog.round($1::numeric, $2)::double precision $$ LANGUAGE SQL IMMUTABLE"
            ))
    finally:
        engine.dispose()
    sep = "&" if "?" in base_url else "?"
    return f"{base_url}{sep}options=-csearch_path%3D{name}"


def drop_schema(url_with_schema: str) -> None:
    from urllib.parse import unquote

    from sqlalchemy import create_engine, text

    base, _, query = url_with_schema.partition("?")
    name = unquote(query).rpartition("search_path=")[2].split("&")[0]
    if not name.startswith("t_"):
        return
    engine = create_engine(base)
    try:
        with engine.begin() as conn:
            conn.execute(text(f"DROP SCHEMA IF EXISTS {name} CASCADE"))
    finally:
        engine.dispose()


def stop() -> None:
    if (DATA / "PG_VERSION").exists():
        _run([pg_bin("pg_ctl") or "pg_ctl", "-D", str(DATA), "-m", "fast", "-w", "stop"])


if __name__ == "__main__":
    action = sys.argv[1] if len(sys.argv) > 1 else "start"
    if action == "start":
        print(start())
        if "--fresh" in sys.argv[2:]:
            reset()
    elif action == "stop":
        stop()
    else:
        raise SystemExit("usage: pg_server.py start|stop")
