"""Threshold in force, preview (by value and by budget), PUT versions, rollback, history."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
from sqlalchemy import select

from alerts_support import T0, Service, add_alert, add_asset, add_scores, running
from service.alerting import AlertRule
from service.db.models import AuditLog
from service.manifest import load_calibration
from service.thresholds import CalibrationSet, threshold_for_budget

# No stored history before these changes: each accepts the short preview explicitly (service/retune_risk.py).
SHORT = {"confirm_short_history": True}
A = "pump-03"


@pytest.fixture()
def svc(tmp_path):
    with running(tmp_path) as s:
        add_asset(s, A)
        yield s


def burst_scores(w: float, on_n: int, off_m: int) -> tuple[list[float], list[tuple[int, int]]]:
    """Baseline 0.2 w with three bursts (1.5 w, 3 w, 1.2 w), each long enough to open an alert
    under the manifest's rule and far enough apart to return in between."""
    run, gap = max(on_n, 6), off_m + on_n + 4
    scores: list[float] = [0.2 * w] * gap
    spans = []
    for level in (1.5, 3.0, 1.2):
        spans.append((len(scores), len(scores) + run - 1))
        scores += [level * w] * run + [0.2 * w] * gap
    return scores, spans


def test_get_threshold_in_force(svc: Service):
    man = svc.manifest()
    r = svc.client.get(f"/v1/assets/{A}/threshold", headers=svc.h("maintenance"))
    assert r.status_code == 200
    t = r.json()
    assert (t["version"], t["origin"], t["created_by"]) == (1, "calibrated", f"model {man.model_id}/{man.version}")
    assert (t["warning"], t["critical"]) == (man.thresholds.warning, man.thresholds.critical)
    assert (t["on_k"], t["on_n"], t["off_m"]) == (man.alert_rule.on_k, man.alert_rule.on_n, man.alert_rule.off_m)
    assert t["off_delay_s"] == man.alert_rule.off_m * man.window_period_s
    assert svc.client.get("/v1/assets/nope/threshold", headers=svc.h("maintenance")).status_code == 404


def test_preview_by_value_counts_and_overlaps(svc: Service):
    man = svc.manifest()
    w = man.thresholds.warning
    scores, spans = burst_scores(w, man.alert_rule.on_n, man.alert_rule.off_m)
    ends = add_scores(svc, A, scores)
    # People already worked the first two bursts' alerts: a false alarm, then a confirmed fault.
    fa = add_alert(svc, A, ends[spans[0][0]], returned_at=ends[spans[0][1] + 2])
    cf = add_alert(svc, A, ends[spans[1][0]], returned_at=ends[spans[1][1] + 2])
    svc.client.post(f"/v1/alerts/{fa}/close", json={"outcome": "false_alarm"}, headers=svc.h("maintenance"))
    svc.client.post(f"/v1/alerts/{cf}/close", json={"outcome": "confirmed_fault"}, headers=svc.h("maintenance"))

    def preview(body):
        r = svc.client.post(f"/v1/assets/{A}/threshold/preview", json=body, headers=svc.h("operator"))
        assert r.status_code == 200, r.text
        return r.json()

    same = preview({"warning": w})
    assert same["would_open_count"] == 3 and same["current_count"] == 3
    assert (same["overlap_false_alarm"], same["overlap_confirmed_fault"]) == (1, 1)
    assert same["windows"] == len(scores)
    higher = preview({"warning": 2 * w})
    assert higher["would_open_count"] == 1 and higher["current_count"] == 3
    (only,) = higher["alerts_would_open"]
    assert only["peak"] == pytest.approx(3 * w) and only["returned"]
    assert only["start"] == ends[spans[1][0] + man.alert_rule.on_k - 1].isoformat().replace("+00:00", "Z")
    assert (higher["overlap_false_alarm"], higher["overlap_confirmed_fault"]) == (0, 1)
    assert higher["rule"]["critical"] == pytest.approx(2 * w * man.thresholds.critical / w)
    assert higher["stored_alerts"]["false_alarm"] == 1 and higher["stored_alerts"]["confirmed_fault"] == 1
    assert preview({"warning": 4 * w})["would_open_count"] == 0
    # Fewer alerts expected on normal data at the higher level (from the calibration scores).
    assert higher["expected_false_alarms_per_week"] is not None
    assert higher["expected_false_alarms_per_week"] <= same["expected_false_alarms_per_week"]
    # Stricter on-delay: k = n = run length + 1 cannot be met by any burst.
    strict = preview({"on_k": max(man.alert_rule.on_n, 6) + 1, "on_n": max(man.alert_rule.on_n, 6) + 1})
    assert strict["would_open_count"] == 0 and strict["rule"]["warning"] == w


def test_preview_default_range_is_the_last_30_days_of_stored_scores(svc: Service):
    man = svc.manifest()
    w = man.thresholds.warning
    scores, _ = burst_scores(w, man.alert_rule.on_n, man.alert_rule.off_m)
    add_scores(svc, A, scores, start=T0 - timedelta(days=40))  # older than the default range
    add_scores(svc, A, [0.2 * w] * 20)
    r = svc.client.post(f"/v1/assets/{A}/threshold/preview", json={"warning": w}, headers=svc.h("operator")).json()
    assert r["windows"] == 20 and r["would_open_count"] == 0
    wide = {"warning": w, "since": (T0 - timedelta(days=41)).isoformat(), "until": (T0 + timedelta(days=1)).isoformat()}
    r = svc.client.post(f"/v1/assets/{A}/threshold/preview", json=wide, headers=svc.h("operator")).json()
    assert r["windows"] == len(scores) + 20 and r["would_open_count"] == 3


def test_preview_by_budget_uses_the_calibration_scores(svc: Service):
    man = svc.manifest()
    model_dir = svc.app.state.registry.get(man.model_id).path
    cal_scores = load_calibration(model_dir, man)
    cal = CalibrationSet(
        series=[np.asarray(s.score, float) for s in cal_scores.assets.values()],
        span_s=man.thresholds.calibration.span_s,
        window_period_s=man.window_period_s,
    )
    rule = AlertRule(man.thresholds.warning, man.thresholds.critical, man.alert_rule.on_k, man.alert_rule.on_n, man.alert_rule.off_m, man.alert_rule.deadband_frac)
    budget = 2.0
    reference = threshold_for_budget(cal, rule, budget)  # the trainer's own conversion
    add_scores(svc, A, [0.1] * 10)
    r = svc.client.post(f"/v1/assets/{A}/threshold/preview", json={"false_alarms_per_week": budget}, headers=svc.h("operator"))
    assert r.status_code == 200, r.text
    p = r.json()
    assert p["rule"]["warning"] == pytest.approx(reference.threshold)
    assert p["by_budget"]["method"] == reference.method
    assert p["expected_false_alarms_per_week"] <= budget + 1e-9
    # A tighter budget never lowers the threshold.
    tight = svc.client.post(f"/v1/assets/{A}/threshold/preview", json={"false_alarms_per_week": budget / 8}, headers=svc.h("operator")).json()
    assert tight["rule"]["warning"] >= p["rule"]["warning"]


BAD_BODIES = [
    ({"warning": 1.0, "false_alarms_per_week": 1.0}, "not both"),
    ({"critical": 2.0}, "critical needs warning"),
    ({"warning": 2.0, "critical": 1.0}, "must be >= warning"),
    ({"warning": -1.0}, "greater than 0"),
    ({"on_k": 5, "on_n": 3}, "on_k <= on_n"),
    ({"warning": 1.0, "since": "2026-10-13T00:00:00"}, "time zone"),
    ({"warning": 1.0, "since": "2026-10-14T00:00:00Z", "until": "2026-10-13T00:00:00Z"}, "until must be after since"),
]


def test_preview_refuses_bad_bodies_with_reasons(svc: Service):
    for body, words in BAD_BODIES:
        r = svc.client.post(f"/v1/assets/{A}/threshold/preview", json=body, headers=svc.h("operator"))
        assert r.status_code == 422, (body, r.text)
        assert words in r.json()["error"]["message"], (body, r.json())


def test_put_versions_history_rollback_and_audit(svc: Service):
    man = svc.manifest()
    w = man.thresholds.warning
    c, ho = svc.client, svc.h("operator")
    missing = c.put(f"/v1/assets/{A}/threshold", json={"warning": 2 * w}, headers=ho)
    assert missing.status_code == 422 and missing.json()["error"]["field"] == "body.reason"
    nothing = c.put(f"/v1/assets/{A}/threshold", json={"reason": "just because"}, headers=ho)
    assert nothing.status_code == 422 and "nothing to change" in nothing.json()["error"]["message"]

    v2 = c.put(f"/v1/assets/{A}/threshold", json={"warning": 2 * w, "critical": 5 * w, "reason": "too many false alarms at night", **SHORT}, headers=ho)
    assert v2.status_code == 200, v2.text
    assert (v2.json()["version"], v2.json()["origin"], v2.json()["created_by"]) == (2, "manual", "operator-tester")
    v3 = c.put(f"/v1/assets/{A}/threshold", json={"on_k": 1, "on_n": 1, "off_m": 2, "reason": "react faster to a rising trend", **SHORT}, headers=ho).json()
    assert (v3["version"], v3["warning"], v3["critical"], v3["on_k"], v3["off_m"]) == (3, 2 * w, 5 * w, 1, 2)
    v4 = c.put(f"/v1/assets/{A}/threshold", json={"false_alarms_per_week": 1.0, "reason": "one a week is fine", **SHORT}, headers=ho).json()
    assert (v4["version"], v4["origin"], v4["budget_per_week"], v4["on_k"]) == (4, "budget", 1.0, 1)
    back = c.put(f"/v1/assets/{A}/threshold", json={"rollback_to": 2, "reason": "budget level was too low"}, headers=ho).json()
    assert (back["version"], back["origin"], back["warning"], back["critical"], back["on_k"]) == (
        5, "rollback", 2 * w, 5 * w, man.alert_rule.on_k,
    )
    assert c.get(f"/v1/assets/{A}/threshold", headers=svc.h("maintenance")).json()["version"] == 5

    r = c.put(f"/v1/assets/{A}/threshold", json={"rollback_to": 42, "reason": "typo"}, headers=ho)
    assert r.status_code == 404 and r.json()["error"]["field"] == "body.rollback_to"
    r = c.put(f"/v1/assets/{A}/threshold", json={"rollback_to": 1, "warning": 3.0, "reason": "mixed"}, headers=ho)
    assert r.status_code == 422 and "drop warning" in r.json()["error"]["message"]

    hist = c.get(f"/v1/assets/{A}/threshold/history", headers=svc.h("maintenance")).json()["items"]
    assert [(v["version"], v["origin"]) for v in hist] == [(5, "rollback"), (4, "budget"), (3, "manual"), (2, "manual"), (1, "calibrated")]
    assert [v["reason"] for v in hist[:2]] == ["budget level was too low", "one a week is fine"]
    assert all(v["created_at"].endswith("Z") for v in hist)
    with svc.db.session() as s:
        audit = list(s.scalars(select(AuditLog).where(AuditLog.action == "threshold.set").order_by(AuditLog.id)))
    assert [(a.actor, a.details["version"], a.details["origin"]) for a in audit] == [
        ("operator-tester", 2, "manual"), ("operator-tester", 3, "manual"), ("operator-tester", 4, "budget"), ("operator-tester", 5, "rollback"),
    ]
    assert audit[-1].details["rollback_to"] == 2 and audit[0].details["reason"] == "too many false alarms at night"


def test_threshold_roles(svc: Service):
    c = svc.client
    body = {"warning": 1.0, "reason": "testing roles end to end", **SHORT}
    assert c.get(f"/v1/assets/{A}/threshold").status_code == 401
    assert c.get(f"/v1/assets/{A}/threshold", headers=svc.h("machine")).status_code == 403
    assert c.get(f"/v1/assets/{A}/threshold/history", headers=svc.h("maintenance")).status_code == 200
    assert c.post(f"/v1/assets/{A}/threshold/preview", json={"warning": 1.0}, headers=svc.h("maintenance")).status_code == 403
    assert c.put(f"/v1/assets/{A}/threshold", json=body, headers=svc.h("maintenance")).status_code == 403
    assert c.put(f"/v1/assets/{A}/threshold", json=body, headers=svc.h("machine")).status_code == 403
    assert c.get(f"/v1/assets/{A}/threshold", headers=svc.h("maintenance")).json()["version"] == 1  # nothing changed
    assert c.put(f"/v1/assets/{A}/threshold", json=body, headers=svc.h("admin")).status_code == 200


def test_parallel_changes_get_consecutive_versions(svc: Service):
    from concurrent.futures import ThreadPoolExecutor

    w = svc.manifest().thresholds.warning

    def put(i: int) -> tuple[int, int]:
        r = svc.client.put(f"/v1/assets/{A}/threshold", json={"warning": (2 + i) * w, "reason": f"parallel change number {i}", **SHORT}, headers=svc.h("operator"))
        return r.status_code, r.json().get("version", 0)

    with ThreadPoolExecutor(max_workers=4) as pool:
        results = list(pool.map(put, range(4)))
    assert [code for code, _ in results] == [200] * 4
    assert sorted(v for _, v in results) == [2, 3, 4, 5]
    hist = svc.client.get(f"/v1/assets/{A}/threshold/history", headers=svc.h("maintenance")).json()["items"]
    assert [v["version"] for v in hist] == [5, 4, 3, 2, 1]


def test_a_change_that_misses_a_confirmed_fault_or_rests_on_little_history_needs_a_named_confirmation(svc: Service):
    """service/retune_risk.py: missing a confirmed fault or a preview under 7 asset-days needs a
    confirmation naming each risk and a reason of 15+ characters; the audit log flags it."""
    man = svc.manifest()
    w = man.thresholds.warning
    c, ho = svc.client, svc.h("operator")
    scores, spans = burst_scores(w, man.alert_rule.on_n, man.alert_rule.off_m)
    ends = add_scores(svc, A, scores)
    cf = add_alert(svc, A, ends[spans[1][0]], returned_at=ends[spans[1][1] + 2])  # the 3 w burst
    c.post(f"/v1/alerts/{cf}/close", json={"outcome": "confirmed_fault"}, headers=svc.h("maintenance"))

    risk = c.post(f"/v1/assets/{A}/threshold/preview", json={"warning": 4 * w}, headers=ho).json()["risk"]
    assert risk["needs_confirmation"] == ["missed_confirmed_faults", "short_history"]
    assert risk["missed_confirmed_faults"] == [cf] and risk["big_change"] and risk["warning_factor"] == pytest.approx(4.0)
    assert risk["history_days"] == pytest.approx(len(scores) * man.window_period_s / 86400)
    assert any(f"#{cf}" in s for s in risk["statements"]) and any("4.0x the level in force" in s for s in risk["statements"])

    body = {"warning": 4 * w, "reason": "fewer alerts from this pump at night please"}
    for extra, field in [
        ({}, "body.confirm_missed"),
        ({"confirm_missed": [cf + 100]}, "body.confirm_missed"),  # naming another alert is no confirmation
        ({"confirm_missed": [cf]}, "body.confirm_short_history"),
        ({"confirm_missed": [cf], "confirm_short_history": True, "reason": "night alerts"}, "body.reason"),  # 12 characters
    ]:
        r = c.put(f"/v1/assets/{A}/threshold", json={**body, **extra}, headers=ho)
        assert r.status_code == 422 and r.json()["error"]["field"] == field, (extra, r.text)
        assert r.json()["error"]["details"]["missed_confirmed_faults"] == [cf]
    assert c.get(f"/v1/assets/{A}/threshold", headers=ho).json()["version"] == 1  # nothing applied
    ok = c.put(f"/v1/assets/{A}/threshold", json={**body, "confirm_missed": [cf], "confirm_short_history": True}, headers=ho)
    assert ok.status_code == 200, ok.text
    with svc.db.session() as s:
        audit = s.scalars(select(AuditLog).where(AuditLog.action == "threshold.set").order_by(AuditLog.id.desc())).first()
    assert audit.details["flagged"] is True and audit.details["accepted_risks"] == ["missed_confirmed_faults", "short_history"]
    assert audit.details["missed_confirmed_faults"] == [cf]

    # A week and more of stored windows and a level that still meets the fault: one click.
    b = "pump-04"
    add_asset(svc, b)
    week = int(7.5 * 86400 / man.window_period_s)
    long_ends = add_scores(svc, b, [0.2 * w] * week + scores)
    cf_b = add_alert(svc, b, long_ends[week + spans[1][0]], returned_at=long_ends[week + spans[1][1] + 2])
    c.post(f"/v1/alerts/{cf_b}/close", json={"outcome": "confirmed_fault"}, headers=svc.h("maintenance"))
    plain = c.put(f"/v1/assets/{b}/threshold", json={"warning": 1.3 * w, "reason": "a bit higher"}, headers=ho)
    assert plain.status_code == 200, plain.text
    with svc.db.session() as s:
        audit = s.scalars(select(AuditLog).where(AuditLog.target == f"asset:{b}", AuditLog.action == "threshold.set")).first()
    assert audit.details["flagged"] is False and audit.details["accepted_risks"] == []
