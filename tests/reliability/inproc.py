"""The app in-process for the reliability tests: a real SQLite file in the test's folder,
the tiny real ONNX model, one key per role, and row counts of every table (to prove a
refused request stored nothing)."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from fastapi.testclient import TestClient

import support
from service.app import create_app
from service.settings import Settings

TABLES = ("api_keys", "assets", "readings", "window_scores", "skipped_windows", "threshold_versions", "alerts", "alert_events", "audit_log")


@dataclass
class App:
    settings: Settings
    client: TestClient
    keys: dict[str, str]
    db_path: Path

    def auth(self, role: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.keys[role]}"}

    def counts(self) -> dict[str, int]:
        import sqlite3

        conn = sqlite3.connect(self.db_path)
        try:
            return {t: conn.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0] for t in TABLES}
        finally:
            conn.close()


def start_app(tmp_path: Path, **overrides: Any) -> Iterator[App]:
    db_path = tmp_path / "rel.db"
    url = f"sqlite:///{db_path}"
    model_dir = support.build_model(tmp_path / "models")
    keys = support.prepare_database(url)
    settings = Settings(_env_file=None, database_url=url, model_dir=model_dir, retention_days=0, **overrides)
    with TestClient(create_app(settings)) as client:
        yield App(settings, client, keys, db_path)
