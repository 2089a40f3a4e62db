"""The HTTP tests' service under test: settings in a temporary folder, a real SQLite file
(or a schema of a real PostgreSQL server), a real model folder, the app under TestClient
with its lifespan, and one key per role. Imported by name (not from conftest, which is
ambiguous when several test folders have one)."""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

sys.path.insert(0, str(Path(__file__).parents[1]))
import pg_server  # noqa: E402

# Set (e.g. by `make test`) to run this suite a second time on a real PostgreSQL server:
# each test gets a fresh schema of that database instead of an SQLite file.
TEST_DATABASE_URL = os.environ.get("KILTER_TEST_DATABASE_URL")

from service.app import create_app  # noqa: E402
from service.db.keys import create_key  # noqa: E402
from service.db.session import Database, make_engine  # noqa: E402
from service.settings import BUNDLED_MODELS, Settings  # noqa: E402

ROLES = ("machine", "maintenance", "operator", "admin")
BUNDLED_ID = "booster-pumps"


@dataclass
class Env:
    settings: Settings
    client: TestClient
    keys: dict[str, str]
    db_path: Path

    def auth(self, role: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.keys[role]}"}

    def count(self, table: str, where: str = "", *params: Any) -> int:
        return self.rows(f"SELECT COUNT(*) FROM {table} {('WHERE ' + where) if where else ''}", *params)[0][0]

    def rows(self, sql: str, *params: Any) -> list[tuple[Any, ...]]:
        """Raw SQL with `?` placeholders, on whichever engine the test runs."""
        engine = make_engine(self.settings.database_url)
        try:
            with engine.connect() as conn:
                if engine.dialect.name != "sqlite":
                    sql = sql.replace("%", "%%").replace("?", "%s")
                rows = conn.exec_driver_sql(sql, tuple(params)).fetchall()
        finally:
            engine.dispose()
        # SQLite hands JSON columns back as text, PostgreSQL's driver parses them; tests compare text.
        return [tuple(json.dumps(v) if isinstance(v, (dict, list)) else v for v in r) for r in rows]

    def execute(self, sql: str, *params: Any) -> None:
        """A raw SQL statement that returns no rows (`?` placeholders), committed."""
        engine = make_engine(self.settings.database_url)
        try:
            with engine.begin() as conn:
                if engine.dialect.name != "sqlite":
                    sql = sql.replace("%", "%%").replace("?", "%s")
                conn.exec_driver_sql(sql, tuple(params))
        finally:
            engine.dispose()

    def add_key(self, role: str, name: str, assets: list[str] | None = None) -> str:
        db = Database(self.settings.database_url)
        try:
            with db.transaction() as s:
                key, _ = create_key(s, name=name, role=role, assets=assets)
        finally:
            db.dispose()
        return key

    def post(self, asset: str, readings: list[dict[str, Any]], role: str = "machine", key: str | None = None) -> Any:
        headers = {"Authorization": f"Bearer {key}"} if key else self.auth(role)
        return self.client.post(f"/v1/assets/{asset}/readings", json={"readings": readings}, headers=headers)


def make_settings(tmp_path: Path, model_dir: Path, **overrides: Any) -> Settings:
    return Settings(
        _env_file=None,
        database_url=pg_server.schema_url(TEST_DATABASE_URL, str(tmp_path)) if TEST_DATABASE_URL else f"sqlite:///{tmp_path / 'kilter.db'}",
        model_dir=model_dir,
        **{"auth_fail_limit": 0, "retention_days": 0, **overrides},  # the failed-auth limit has its own tests (tests/reliability)
    )


def start_env(tmp_path: Path, model_dir: Path, **overrides: Any) -> Iterator[Env]:
    settings = make_settings(tmp_path, model_dir, **overrides)
    app = create_app(settings)
    try:
        with TestClient(app) as client:
            env = Env(settings, client, {}, tmp_path / "kilter.db")
            env.keys = {role: env.add_key(role, f"test-{role}") for role in ROLES}
            yield env
    finally:
        if TEST_DATABASE_URL:
            pg_server.drop_schema(settings.database_url)


def bundled_model_dir() -> Path:
    if not (BUNDLED_MODELS / BUNDLED_ID).is_dir():
        pytest.fail(f"the bundled model {BUNDLED_MODELS / BUNDLED_ID} is missing (make model)")
    return BUNDLED_MODELS


