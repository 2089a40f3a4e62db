"""POST/DELETE /v1/assets/{id}/shelve: limits, audit, roles, and the ingest path honouring it."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from sqlalchemy import select

from alerts_support import Service, add_asset, running
from service.db.models import Alert, Asset, AuditLog, WindowScore
from training.demo_data import demo_day

A = "pump-01"


@pytest.fixture()
def svc(tmp_path):
    with running(tmp_path) as s:
        add_asset(s, A)
        yield s


def future(**kw) -> str:
    return (datetime.now(timezone.utc) + timedelta(**kw)).isoformat()


def test_shelve_and_unshelve_are_stored_and_audited(svc: Service):
    c, ho = svc.client, svc.h("operator")
    r = c.post(f"/v1/assets/{A}/shelve", json={"until": future(hours=8), "reason": "impeller swap today"}, headers=ho)
    assert r.status_code == 200, r.text
    assert r.json()["shelved"] and r.json()["shelved_by"] == "operator-tester" and r.json()["shelved_until"].endswith("Z")
    with svc.db.session() as s:
        asset = s.get(Asset, A)
        assert asset.shelve_reason == "impeller swap today" and asset.shelved_until > datetime.now(timezone.utc)
    r = c.delete(f"/v1/assets/{A}/shelve", headers=ho)
    assert r.status_code == 200 and not r.json()["shelved"] and r.json()["shelved_until"] is None
    with svc.db.session() as s:
        assert s.get(Asset, A).shelved_until is None
        audit = [(a.action, a.actor, a.target) for a in s.scalars(select(AuditLog).where(AuditLog.action.like("asset.%")).order_by(AuditLog.id))]
    assert audit == [("asset.shelve", "operator-tester", f"asset:{A}"), ("asset.unshelve", "operator-tester", f"asset:{A}")]


BAD = [
    ({"until": "2020-01-01T00:00:00Z", "reason": "long ago"}, "body.until", "in the future"),
    ({"until": future(days=31), "reason": "a month and a day"}, "body.until", "at most 30 days"),
    ({"until": "2030-01-01T00:00:00", "reason": "no zone"}, "body.until", "time zone"),
    ({"until": future(hours=1)}, "body.reason", "Field required"),
    ({"until": future(hours=1), "reason": "     "}, "body.reason", "blank"),
]


def test_bad_shelve_requests_name_the_field_and_store_nothing(svc: Service):
    for body, field, words in BAD:
        r = svc.client.post(f"/v1/assets/{A}/shelve", json=body, headers=svc.h("operator"))
        assert r.status_code == 422, (body, r.text)
        assert r.json()["error"]["field"] == field and words in r.json()["error"]["message"], r.json()
    with svc.db.session() as s:
        assert s.get(Asset, A).shelved_until is None
        assert not list(s.scalars(select(AuditLog).where(AuditLog.action == "asset.shelve")))
    r = svc.client.post("/v1/assets/pump-77/shelve", json={"until": future(hours=1), "reason": "unknown"}, headers=svc.h("operator"))
    assert r.status_code == 404


def test_shelving_needs_an_operator(svc: Service):
    body = {"until": future(hours=1), "reason": "roles"}
    assert svc.client.post(f"/v1/assets/{A}/shelve", json=body).status_code == 401
    assert svc.client.post(f"/v1/assets/{A}/shelve", json=body, headers=svc.h("maintenance")).status_code == 403
    assert svc.client.delete(f"/v1/assets/{A}/shelve", headers=svc.h("maintenance")).status_code == 403
    assert svc.client.post(f"/v1/assets/{A}/shelve", json=body, headers=svc.h("machine")).status_code == 403
    assert svc.client.post(f"/v1/assets/{A}/shelve", json=body, headers=svc.h("admin")).status_code == 200


def _post(svc: Service, times: np.ndarray, values: np.ndarray, channels) -> dict:
    rows = [
        {"ts": float(t), "values": {c: (None if np.isnan(v) else float(v)) for c, v in zip(channels, row)}}
        for t, row in zip(times, values)
    ]
    r = svc.client.post(f"/v1/assets/{A}/readings", json={"readings": rows}, headers=svc.h("machine"))
    assert r.status_code == 200, r.text
    return r.json()


def test_a_shelved_asset_stores_scores_but_opens_no_alert(svc: Service):
    # A level every window exceeds, so only shelving can keep an alert from opening.
    r = svc.client.put(f"/v1/assets/{A}/threshold", json={"warning": 1e-9, "reason": "make every window alert", "confirm_short_history": True}, headers=svc.h("operator"))
    assert r.status_code == 200
    svc.client.post(f"/v1/assets/{A}/shelve", json={"until": future(hours=2), "reason": "commissioning"}, headers=svc.h("operator"))
    day = demo_day(assets=1)
    t, v = day.times_s[A], day.values[A]
    first = _post(svc, t[:180], v[:180], day.channels)
    assert first["windows_scored"] >= 5 and first["alerts_opened"] == 0
    assert first["threshold_version"] == 2  # the ingest path runs the rule with the version just PUT
    with svc.db.session() as s:
        assert len(list(s.scalars(select(WindowScore).where(WindowScore.asset_id == A)))) == first["windows_scored"]
        assert not list(s.scalars(select(Alert)))
    svc.client.delete(f"/v1/assets/{A}/shelve", headers=svc.h("operator"))
    second = _post(svc, t[180:240], v[180:240], day.channels)
    assert second["windows_scored"] >= 1 and second["alerts_opened"] == 1
