"""Helpers for the alert, threshold, shelving, model and alert-health HTTP tests.

The app runs on a real SQLite file in the test's tmp folder and the bundled model; rows
the tests need as history (assets, window scores, alerts) are written through the same
query modules the service uses.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

from fastapi import FastAPI
from fastapi.testclient import TestClient

from service.app import create_app
from service.db import rule_alerts
from service.db.alerts import to_ms
from service.db.keys import create_key
from service.db.models import Alert, Asset, WindowScore
from service.db.thresholds import ensure_initial_version
from service.settings import BUNDLED_MODELS, Settings

sys.path.insert(0, str(Path(__file__).parents[1]))
import pg_server  # noqa: E402

MODEL_ID = "booster-pumps"
ROLES = ("machine", "maintenance", "operator", "admin")
T0 = datetime(2026, 10, 13, tzinfo=timezone.utc)


def bundled_model_dir() -> Path:
    return BUNDLED_MODELS


@dataclass
class Service:
    app: FastAPI
    client: TestClient
    keys: dict[str, str]  # role -> key
    names: dict[str, str]  # role -> key name (the actor recorded)

    def h(self, role: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.keys[role]}"}

    @property
    def db(self):  # service.db.session.Database
        return self.app.state.db

    def manifest(self, model_id: str = MODEL_ID):
        return self.app.state.registry.get(model_id).manifest


@contextmanager
def running(tmp_path: Path, model_dir: Path | None = None, **overrides: object) -> Iterator[Service]:
    """The app on an SQLite file in `tmp_path` (or, when KILTER_TEST_DATABASE_URL is set as
    for the rest of tests/http, a fresh PostgreSQL schema), with one key per role."""
    test_db = os.environ.get("KILTER_TEST_DATABASE_URL")
    url = pg_server.schema_url(test_db, str(tmp_path)) if test_db else f"sqlite:///{tmp_path / 'kilter.db'}"
    settings = Settings(
        _env_file=None,
        database_url=url,
        model_dir=model_dir or bundled_model_dir(),
        retention_days=0,
        auth_fail_limit=0,  # the failed-auth limit has its own tests
        **overrides,  # type: ignore[arg-type]
    )
    app = create_app(settings)
    try:
        with TestClient(app) as client:
            keys, names = {}, {}
            with app.state.db.transaction() as s:
                for role in ROLES:
                    names[role] = f"{role}-tester"
                    keys[role], _ = create_key(s, name=names[role], role=role)
            yield Service(app, client, keys, names)
    finally:
        if test_db:
            pg_server.drop_schema(url)


def add_asset(svc: Service, asset_id: str, model_id: str = MODEL_ID) -> None:
    """An asset bound to the model, with threshold version 1 from its manifest."""
    with svc.db.transaction() as s:
        asset = Asset(asset_id=asset_id, model_id=model_id)
        s.add(asset)
        s.flush()
        ensure_initial_version(s, asset=asset, manifest=svc.manifest(model_id))


def add_scores(svc: Service, asset_id: str, scores: Sequence[float], *, start: datetime = T0) -> list[datetime]:
    """Stored window scores one window period apart from `start`; returns their window ends."""
    man = svc.manifest()
    period = timedelta(seconds=man.window_period_s)
    ends = [start + i * period for i in range(len(scores))]
    with svc.db.transaction() as s:
        for end, score in zip(ends, scores):
            s.add(
                WindowScore(
                    asset_id=asset_id,
                    model_id=man.model_id,
                    model_version=man.version,
                    window_end_index=int(end.timestamp() // man.sample_period_s),
                    window_end_ms=to_ms(end),
                    score=float(score),
                    contributions={c: 1.0 / len(man.channels) for c in man.channel_names},
                )
            )
        asset = s.get(Asset, asset_id)
        newest = to_ms(ends[-1])
        asset.last_window_end_ms = max(asset.last_window_end_ms or newest, newest)
    return ends


def add_alert(
    svc: Service,
    asset_id: str,
    opened_at: datetime,
    *,
    returned_at: datetime | None = None,
    severity: str = "warning",
    peak: float = 3.0,
    channels: Sequence[tuple[str, float]] = (("vibration_mm_s", 0.6), ("bearing_temp_c", 0.25)),
) -> int:
    """An alert as the rule writes it (open, and return if `returned_at`); returns its id."""
    man = svc.manifest()
    with svc.db.transaction() as s:
        from service.db.thresholds import threshold_in_force

        tv = threshold_in_force(s, asset_id=asset_id)
        conn = s.connection()
        alert = rule_alerts.open_alert(
            conn,
            asset_id=asset_id,
            severity=severity,
            at=opened_at,
            score=peak,
            top_channels=[{"channel": c, "share": sh} for c, sh in channels],
            model_id=man.model_id,
            model_version=man.version,
            threshold_version_id=tv.id if tv else None,
            details={},
        )
        if returned_at is not None:
            rule_alerts.extend_alert(alert, at=returned_at, score=peak * 0.5, top_channels=[])
            rule_alerts.return_alert(conn, alert, at=returned_at, details={})
        return alert.id


def alert_row(svc: Service, alert_id: int) -> Alert:
    with svc.db.session() as s:
        row = s.get(Alert, alert_id)
        assert row is not None
        return row
