"""Response headers that tell browsers what not to guess, and the database's files kept
private to the service's user."""

from __future__ import annotations

import stat
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service_env import TEST_DATABASE_URL


def test_every_answer_says_nosniff_and_hsts_only_over_tls(env) -> None:
    for path in ("/healthz", "/signin", "/v1/assets", "/static/kilter.css"):
        r = env.client.get(path)
        assert r.headers["x-content-type-options"] == "nosniff", path
        assert "strict-transport-security" not in r.headers, path  # plain http: HSTS would be ignored or wrong
    with TestClient(env.client.app, base_url="https://kilter.test") as tls:
        r = tls.get("/healthz")
        # RFC 6797: max-age in seconds; one year is the usual value (common practice).
        assert r.headers["strict-transport-security"] == "max-age=31536000"
        assert r.headers["x-content-type-options"] == "nosniff"


@pytest.mark.skipif(bool(TEST_DATABASE_URL), reason="SQLite files only")
def test_the_sqlite_file_and_its_backup_are_private(env, tmp_path: Path) -> None:
    from service.backup import backup_sqlite

    mode = stat.S_IMODE(env.db_path.stat().st_mode)
    assert mode == 0o600, oct(mode)
    for side in ("-wal", "-shm"):
        p = env.db_path.with_name(env.db_path.name + side)
        if p.exists():
            assert stat.S_IMODE(p.stat().st_mode) == 0o600, p
    target = tmp_path / "copy.db"
    backup_sqlite(env.settings.database_url, target)
    assert stat.S_IMODE(target.stat().st_mode) == 0o600
