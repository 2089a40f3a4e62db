"""The issue's end-to-end scenario on the bundled model, through the real HTTP app.

A demo day of two pumps (training.demo_data, our invented scenario) in which pump-02
develops cavitation mid-morning is posted by a machine key in batches, as the machines
would. An alert must open during the labelled fault and none during the normal hours
before it (nor on the healthy pump), with a top channel the fault acts on. Maintenance
acknowledges and closes it as a confirmed fault; an operator previews a higher
threshold, sees the count change, applies a new one, and the history shows it. The alert
timeline is printed (run with -s to see it).
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pytest

from alerts_support import Service, running
from training.demo_data import demo_day

FAULTY = "pump-02"
HEALTHY = "pump-01"
BATCH = 60  # readings per post: an hour of one pump
# Cavitation in the demo scenario drops suction pressure, makes flow and discharge
# fluctuate and adds noisy vibration (training/demo_data.py); current and bearing
# temperature move only through the load.
CAVITATION_CHANNELS = {"suction_kpa", "vibration_mm_s", "flow_m3h", "discharge_kpa"}


@pytest.fixture(scope="module")
def day():
    return demo_day(assets=2)


@pytest.fixture()
def svc(tmp_path):
    with running(tmp_path) as s:
        yield s


def iso(ts_s: float) -> str:
    return datetime.fromtimestamp(ts_s, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def replay(svc: Service, day, asset: str) -> dict[str, int]:
    totals = {"accepted": 0, "duplicates": 0, "windows_scored": 0, "alerts_opened": 0}
    t, v = day.times_s[asset], day.values[asset]
    for i in range(0, len(t), BATCH):
        rows = [
            {"ts": iso(ts), "values": {c: (None if np.isnan(x) else float(x)) for c, x in zip(day.channels, row)}}
            for ts, row in zip(t[i : i + BATCH], v[i : i + BATCH])
        ]
        r = svc.client.post(f"/v1/assets/{asset}/readings", json={"readings": rows}, headers=svc.h("machine"))
        assert r.status_code == 200, r.text
        for k in totals:
            totals[k] += r.json()[k]
    return totals


def timeline(svc: Service, alert_ids: list[int]) -> list[str]:
    lines = []
    for alert_id in alert_ids:
        d = svc.client.get(f"/v1/alerts/{alert_id}", headers=svc.h("maintenance")).json()
        tops = ", ".join(f"{c['channel']} {c['share']:.0%}" for c in d["top_channels"])
        lines.append(
            f"alert {d['id']} {d['asset_id']} {d['severity']}: opened {d['opened_at']}, returned {d['returned_at']}, "
            f"peak {d['peak_score']:.3f} at {d['peak_at']} (threshold v{d['threshold']['version']} warning "
            f"{d['threshold']['warning']:.4f}, critical {d['threshold']['critical']:.4f}; model {d['model_id']}/{d['model_version']}); top: {tops}"
        )
        for e in d["history"]:
            extra = f" - {e['note']}" if e["note"] else ""
            said = (e["details"] or {}).get("outcome") or ((e["details"] or {}).get("severity") if e["kind"] in ("opened", "escalated") else None)
            detail = f" ({said})" if said else ""
            lines.append(f"    {e['at']}  {e['kind']:<12} by {e['actor']}{detail}{extra}")
    return lines


def test_demo_day_alert_is_worked_and_retuned(svc: Service, day):
    (fault,) = [e for e in day.events if e.asset == FAULTY]
    assert fault.kind == "cavitation"
    healthy = replay(svc, day, HEALTHY)
    faulty = replay(svc, day, FAULTY)
    assert healthy["accepted"] == len(day.times_s[HEALTHY]) and faulty["accepted"] == len(day.times_s[FAULTY])
    assert healthy["alerts_opened"] == 0

    listed = svc.client.get("/v1/alerts", params={"limit": 200}, headers=svc.h("maintenance")).json()["items"]
    assert {a["asset_id"] for a in listed} == {FAULTY}
    opened_s = sorted(datetime.fromisoformat(a["opened_at"].replace("Z", "+00:00")).timestamp() for a in listed)
    assert opened_s[0] >= fault.start_s, "an alert opened during the normal hours before the fault"
    during = [a for a in listed if fault.start_s <= datetime.fromisoformat(a["opened_at"].replace("Z", "+00:00")).timestamp() < fault.end_s]
    assert during, f"no alert opened during the fault {iso(fault.start_s)} .. {iso(fault.end_s)}"
    alert = min(during, key=lambda a: a["opened_at"])
    assert alert["top_channels"][0]["channel"] in CAVITATION_CHANNELS

    c = svc.client
    r = c.post(f"/v1/alerts/{alert['id']}/acknowledge", json={"note": "crew dispatched to pump-02"}, headers=svc.h("maintenance"))
    assert r.status_code == 200 and r.json()["state"] == "acknowledged"
    r = c.post(
        f"/v1/alerts/{alert['id']}/close",
        json={"outcome": "confirmed_fault", "note": "cavitation: suction strainer partly blocked, cleared"},
        headers=svc.h("maintenance"),
    )
    assert r.status_code == 200 and r.json()["outcome"] == "confirmed_fault"

    threshold = c.get(f"/v1/assets/{FAULTY}/threshold", headers=svc.h("maintenance")).json()
    assert threshold["version"] == 1 and threshold["origin"] == "calibrated"
    now = c.post(f"/v1/assets/{FAULTY}/threshold/preview", json={"warning": threshold["warning"]}, headers=svc.h("operator")).json()
    assert now["would_open_count"] == len(listed) and now["overlap_confirmed_fault"] >= 1
    higher = c.post(f"/v1/assets/{FAULTY}/threshold/preview", json={"warning": 2 * alert["peak_score"]}, headers=svc.h("operator")).json()
    assert higher["would_open_count"] == 0 < now["would_open_count"]
    assert higher["current_count"] == now["would_open_count"]
    assert higher["risk"]["missed_confirmed_faults"] == [alert["id"]] and higher["risk"]["big_change"]

    new_warning = round(min(threshold["warning"] * 3, alert["peak_score"] / 2), 6)
    applied = c.put(
        f"/v1/assets/{FAULTY}/threshold",
        # One demo day is less than the week a change should rest on: accepted by name (service/retune_risk.py).
        json={"warning": new_warning, "reason": "catch cavitation like today's, with fewer alerts from normal wobble",
              "confirm_short_history": True},
        headers=svc.h("operator"),
    )
    assert applied.status_code == 200, applied.text
    kept = c.post(f"/v1/assets/{FAULTY}/threshold/preview", json={}, headers=svc.h("operator")).json()
    assert kept["rule"]["warning"] == new_warning and kept["overlap_confirmed_fault"] >= 1  # the fault is still caught
    history = c.get(f"/v1/assets/{FAULTY}/threshold/history", headers=svc.h("maintenance")).json()["items"]
    assert [(v["version"], v["origin"], v["created_by"]) for v in history] == [
        (2, "manual", "operator-tester"),
        (1, "calibrated", threshold["created_by"]),
    ]
    assert history[0]["warning"] == new_warning and history[0]["reason"].startswith("catch cavitation")

    lines = [
        f"fault (labelled): {FAULTY} {fault.kind} {iso(fault.start_s)} .. {iso(fault.end_s)}",
        f"replayed: {healthy['accepted'] + faulty['accepted']} readings, "
        f"{healthy['windows_scored'] + faulty['windows_scored']} windows scored, {faulty['alerts_opened']} alert(s) opened",
        *timeline(svc, [a["id"] for a in sorted(listed, key=lambda a: a["opened_at"])]),
        f"preview warning {threshold['warning']:.4f} -> {now['would_open_count']} alert(s); "
        f"{2 * alert['peak_score']:.3f} -> {higher['would_open_count']}; applied v2 warning {new_warning} "
        f"-> {kept['would_open_count']} (confirmed-fault overlaps {kept['overlap_confirmed_fault']})",
    ]
    print("\n" + "\n".join(lines))
