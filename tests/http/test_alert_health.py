"""GET /v1/alert-health over a stored alert history with a flood, a chattering asset, a
stale alert and worked alerts.

Benchmarks (ISA-18.2 / IEC 62682, EEMUA 191, as summarised in the trade press; common
practice): flood = more than 10 alarms in 10 minutes; chattering = 3 or more state
changes in a minute (scaled to the rule's cadence, service/alert_health.py); stale =
active over 24 hours.
"""

from __future__ import annotations

from datetime import timedelta

import pytest

from alerts_support import T0, Service, add_alert, add_asset, add_scores, running

M = timedelta(minutes=1)
H = timedelta(hours=1)
ASSETS = [f"pump-0{i}" for i in range(1, 7)]


@pytest.fixture()
def svc(tmp_path):
    with running(tmp_path) as s:
        for a in ASSETS:
            add_asset(s, a)
        yield s


def figures(resp) -> dict[str, dict]:
    assert resp.status_code == 200, resp.text
    return {f["name"]: f for f in resp.json()["figures"]}


def test_alert_health_figures_and_verdicts(svc: Service):
    man = svc.manifest()
    horizon = timedelta(seconds=max(60.0, 2 * (man.alert_rule.off_m + man.alert_rule.on_k) * man.window_period_s))
    day = T0 + 2 * 24 * H  # the period is the day from here
    # A flood: 11 alerts opened within one aligned 10-minute period, across the fleet.
    flood = [add_alert(svc, ASSETS[i % 6], day + 2 * H + i * 30 * timedelta(seconds=1), returned_at=day + 2 * H + 9 * M) for i in range(11)]
    # pump-06 chatters: open, return, open again well inside the scaled horizon, hours after the flood.
    add_alert(svc, "pump-06", day + 8 * H, returned_at=day + 8 * H + horizon / 4)
    add_alert(svc, "pump-06", day + 8 * H + horizon / 2, returned_at=day + 8 * H + horizon * 2)
    # pump-05: active since two days before the period and never closed -> stale at the end.
    stale = add_alert(svc, "pump-05", T0)
    # Worked alerts of the period: one false alarm, one confirmed fault.
    fa = add_alert(svc, "pump-04", day + 14 * H, returned_at=day + 15 * H)
    cf = add_alert(svc, "pump-03", day + 16 * H, returned_at=day + 17 * H)
    svc.client.post(f"/v1/alerts/{fa}/close", json={"outcome": "false_alarm"}, headers=svc.h("maintenance"))
    svc.client.post(f"/v1/alerts/{cf}/close", json={"outcome": "confirmed_fault"}, headers=svc.h("maintenance"))
    for a in ASSETS:  # the fleet was watched from the day before T0
        add_scores(svc, a, [0.01] * 3, start=T0 - 24 * H)

    params = {"since": day.isoformat(), "until": (day + 24 * H).isoformat()}
    r = svc.client.get("/v1/alert-health", params=params, headers=svc.h("maintenance"))
    f = figures(r)
    body = r.json()
    assert body["alerts_opened"] == 11 + 2 + 2 and body["assets"] == 6
    assert body["asset_days"] == pytest.approx(6.0)
    assert body["chatter_horizon_s"] == pytest.approx(horizon.total_seconds())
    assert f["alerts_per_asset_day"]["value"] == pytest.approx(15 / 6)
    assert f["alerts_per_asset_day"]["verdict"] == "within_target"
    assert f["share_of_periods_in_flood"]["detail"] == {"periods_in_flood": 1, "periods": 144}
    assert f["share_of_periods_in_flood"]["verdict"] == "within_target"  # 1 of 144 periods is under 1%
    assert "pump-06" in f["chattering_assets"]["detail"]["assets"]
    assert f["chattering_assets"]["verdict"] == "above_target"
    assert f["stale_alerts"]["detail"]["alert_ids"] == [stale] and f["stale_alerts"]["verdict"] == "within_target"
    assert f["false_alarm_share"]["value"] == pytest.approx(0.5)
    assert f["false_alarm_share"]["detail"] == {"closed": 2, "false_alarms": 1}
    assert "not a safety system" in body["caution"]
    # The flood's alerts, all in the 2nd hour, make up a flood only inside that hour's periods.
    hour = {"since": (day + 2 * H).isoformat(), "until": (day + 3 * H).isoformat()}
    f_hour = figures(svc.client.get("/v1/alert-health", params=hour, headers=svc.h("maintenance")))
    assert f_hour["share_of_periods_in_flood"]["value"] == pytest.approx(1 / 6)
    assert f_hour["share_of_periods_in_flood"]["verdict"] == "above_target"
    assert f_hour["alerts_per_10min_per_position"]["value"] == pytest.approx(11 / 6)
    assert f_hour["alerts_per_10min_per_position"]["verdict"] == "above_target"
    assert len(flood) == 11


def test_default_range_ends_at_the_fleets_newest_window(svc: Service):
    ends = add_scores(svc, "pump-02", [0.01] * 4, start=T0)
    r = svc.client.get("/v1/alert-health", headers=svc.h("maintenance"))
    assert r.status_code == 200
    until = ends[-1].replace(second=0, microsecond=0) + M
    assert r.json()["until"] == until.isoformat().replace("+00:00", "Z")
    assert r.json()["since"] == (until - 7 * 24 * H).isoformat().replace("+00:00", "Z")


def test_alert_health_input_and_roles(svc: Service):
    c = svc.client
    naive = c.get("/v1/alert-health", params={"since": "2026-10-13T00:00:00"}, headers=svc.h("maintenance"))
    assert naive.status_code == 422 and naive.json()["error"]["field"] == "query.since"
    backwards = c.get("/v1/alert-health", params={"since": "2026-10-14T00:00:00Z", "until": "2026-10-13T00:00:00Z"}, headers=svc.h("maintenance"))
    assert backwards.status_code == 422 and backwards.json()["error"]["field"] == "query.until"
    assert c.get("/v1/alert-health").status_code == 401
    assert c.get("/v1/alert-health", headers=svc.h("machine")).status_code == 403
