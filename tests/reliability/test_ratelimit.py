"""Failed authentication is limited per client address, counted in the database across
workers; a correct key is never refused; X-Forwarded-For counts only from a trusted proxy."""

from __future__ import annotations

import asyncio
import sqlite3
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest
from fastapi.testclient import TestClient

import support
from inproc import App, start_app
from service.app import create_app
from service.settings import Settings

WRONG = {"Authorization": "Bearer ew_not-a-real-key"}


@pytest.fixture
def limited(tmp_path: Path) -> Iterator[App]:
    yield from start_app(tmp_path, auth_fail_limit=5, auth_fail_window_s=60)


def test_wrong_keys_are_refused_after_the_limit_and_a_correct_key_still_works(limited: App) -> None:
    app = limited
    codes = [app.client.get("/v1/assets", headers=WRONG).status_code for _ in range(5)]
    assert codes == [401] * 5
    r = app.client.get("/v1/assets", headers=WRONG)
    assert r.status_code == 429 and 1 <= int(r.headers["Retry-After"]) <= 60
    assert r.json()["error"]["code"] == "too_many_failures"
    # The right key from the same address is served: others' failures do not lock it out.
    assert app.client.get("/v1/assets", headers=app.auth("maintenance")).status_code == 200
    assert app.client.get("/healthz").status_code == 200
    assert app.client.get("/v1/assets").status_code == 429  # no key at all fails too
    # Failures beyond the limit are not stored: the table holds at most the limit per address.
    with sqlite3.connect(app.db_path) as c:
        assert c.execute("SELECT COUNT(*) FROM auth_failures").fetchone()[0] == 5


def test_the_count_is_shared_by_every_worker(tmp_path: Path) -> None:
    """Two apps on one database stand for two worker processes: failures on either count."""
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    model_dir = support.build_model(tmp_path / "models")
    keys = support.prepare_database(url)
    settings = Settings(_env_file=None, database_url=url, model_dir=model_dir, retention_days=0, auth_fail_limit=6)
    with TestClient(create_app(settings)) as a, TestClient(create_app(settings)) as b:
        codes = [(a, b)[i % 2].get("/v1/assets", headers=WRONG).status_code for i in range(8)]
        assert codes == [401] * 6 + [429, 429]
        assert b.get("/v1/assets", headers={"Authorization": f"Bearer {keys['maintenance']}"}).status_code == 200


def _from(app: object, peer: str, headers: dict[str, str]) -> int:
    """One request to the (started) app as if from TCP peer `peer`."""

    async def go() -> int:
        transport = httpx.ASGITransport(app=app, client=(peer, 40000))  # type: ignore[arg-type]
        async with httpx.AsyncClient(transport=transport, base_url="http://kilter.test") as client:
            return (await client.get("/v1/assets", headers=headers)).status_code

    with ThreadPoolExecutor(max_workers=1) as pool:
        return pool.submit(asyncio.run, go()).result()


def test_forwarded_for_counts_only_from_a_trusted_proxy(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'xff.db'}"
    model_dir = support.build_model(tmp_path / "models")
    support.prepare_database(url)
    settings = Settings(_env_file=None, database_url=url, model_dir=model_dir, retention_days=0,
                        auth_fail_limit=5, trusted_proxies="10.0.0.0/24")
    app = create_app(settings)
    with TestClient(app):
        # An untrusted peer varying X-Forwarded-For is still one address: blocked after 5.
        codes = [_from(app, "192.0.2.1", {**WRONG, "X-Forwarded-For": f"198.51.100.{i}"}) for i in range(30)]
        assert codes == [401] * 5 + [429] * 25
        # Through the trusted proxy, each forwarded client has its own count.
        assert [_from(app, "10.0.0.3", {**WRONG, "X-Forwarded-For": "203.0.113.7"}) for _ in range(6)] == [401] * 5 + [429]
        assert _from(app, "10.0.0.3", {**WRONG, "X-Forwarded-For": "203.0.113.8"}) == 401
    with sqlite3.connect(tmp_path / "xff.db") as c:
        by_address = dict(c.execute("SELECT address, COUNT(*) FROM auth_failures GROUP BY address").fetchall())
    assert by_address == {"192.0.2.1": 5, "203.0.113.7": 5, "203.0.113.8": 1}


def test_a_wildcard_proxy_setting_is_refused() -> None:
    with pytest.raises(ValueError, match="believe X-Forwarded-For from anyone"):
        Settings(_env_file=None, trusted_proxies="*")
    with pytest.raises(ValueError, match="not an IP address"):
        Settings(_env_file=None, trusted_proxies="proxy.local")
