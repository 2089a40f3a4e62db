"""Liveness, readiness (models and database), Prometheus metrics, and start-up refusals."""

from __future__ import annotations

import os
import shutil

import pytest
from fastapi.testclient import TestClient
from readings_support import readings

from service.app import create_app
from service.db.session import Database
from service.errors import ModelError


def test_healthz_and_readyz(env) -> None:
    assert env.client.get("/healthz").json() == {"status": "ok"}
    r = env.client.get("/readyz")
    assert r.status_code == 200
    assert r.json() == {"status": "ready", "checks": {"models": {"test-pumps": "1"}, "database": "ok"}}


def test_readyz_is_503_when_the_database_is_unreachable(env, tmp_path) -> None:
    app = env.client.app
    good = app.state.db
    missing_dir = tmp_path / "gone"
    missing_dir.mkdir()
    app.state.db = Database(f"sqlite:///{missing_dir}/sub/../../gone")  # a directory, not a database file
    try:
        r = env.client.get("/readyz")
        assert r.status_code == 503 and r.json()["checks"]["database"].startswith("unreachable")
    finally:
        app.state.db.dispose()
        app.state.db = good


def test_metrics_in_prometheus_text_format(env) -> None:
    """Parsed with the Prometheus project's reference parser (prometheus_client.parser,
    text exposition format 0.0.4): a format error raises there."""
    from prometheus_client.parser import text_string_to_metric_families

    env.post("pump-01", readings(range(20), 3.0))
    r = env.client.get("/metrics")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/plain; version=0.0.4")
    families = {f.name: f for f in text_string_to_metric_families(r.text)}
    s = {(x.name, tuple(sorted(x.labels.items()))): x.value for f in families.values() for x in f.samples}
    assert families["kilter_scoring_seconds"].type == "histogram"
    assert families["kilter_windows_scored"].type == "counter"
    assert s[("kilter_windows_scored_total", ())] == 7  # ends 6, 8, ..., 18
    assert s[("kilter_readings_accepted_total", ())] == 20
    assert s[("kilter_alerts_opened_total", (("severity", "warning"),))] == 1
    assert s[("kilter_scoring_seconds_count", ())] == 1
    assert s[("kilter_scoring_seconds_bucket", (("le", "+Inf"),))] == 1
    route = (("method", "POST"), ("route", "/v1/assets/{asset_id}/readings"), ("status", "200"))
    assert s[("kilter_http_requests_total", route)] == 1
    # Histogram buckets are cumulative.
    buckets = [x.value for x in families["kilter_http_request_seconds"].samples if x.name.endswith("_bucket")]
    assert buckets == sorted(buckets) and buckets[-1] >= 1


def test_start_refused_on_a_bad_model_with_the_reason(tmp_path, tiny_dir) -> None:
    from service_env import make_settings

    bad = tmp_path / "bad-models"
    shutil.copytree(tiny_dir, bad)
    onnx_path = bad / "test-pumps" / "1" / "model.onnx"
    onnx_path.write_bytes(onnx_path.read_bytes() + b"\0")
    app = create_app(make_settings(tmp_path, bad))
    with pytest.raises(ModelError, match="sha256"):
        with TestClient(app):
            pass


@pytest.mark.skipif(
    bool(os.environ.get("KILTER_TEST_DATABASE_URL")),
    reason="needs a fresh database file; the PostgreSQL run shares one server",
)
def test_start_refused_when_schema_is_behind_and_auto_upgrade_is_off(tmp_path, tiny_dir) -> None:
    from service_env import make_settings

    from service.app import StartupError

    settings = make_settings(tmp_path, tiny_dir, auto_upgrade=False)
    assert settings.database_url.startswith("sqlite")
    with pytest.raises(StartupError, match="kilter db upgrade"):
        with TestClient(create_app(settings)):
            pass
