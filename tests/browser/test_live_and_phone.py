"""The dashboard's live list, the safe-retune confirmation and the phone layout, in real
Chromium against the session's `kilter serve` (conftest.py).

- A new alert (the demo day's impeller clog on pump-04, replayed while the page is open)
  appears in the open alert list without a reload, and "Updated hh:mm" moves.
- Apply of a level that would have missed a confirmed fault, previewed on one day of
  history, needs both risks confirmed by name and a real reason; the audit log flags it.
- At 390 CSS px the alert list keeps its key columns, chart text is at least 11 px, the
  caution sits beside Acknowledge, and what must scroll says so.
Screenshots in test-output/browser/<test>/.
"""

from __future__ import annotations

import json
import re
import time
from typing import Any

import httpx
import pytest

from browser_support import CHROMIUM, NO_CHROMIUM, Served, Shots, sign_in

pytestmark = [pytest.mark.browser, pytest.mark.skipif(not CHROMIUM.exists(), reason=NO_CHROMIUM)]
PHONE = {"width": 390, "height": 844}


def _api(served: Served, role: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {served.keys[role]}"}


def test_a_new_alert_appears_in_the_open_list_without_a_reload(page: Any, served: Served, shots: Shots) -> None:
    from service.replay import AssetSeries, replay
    from training import demo_data

    sign_in(page, served, "maintenance")
    page.evaluate("window.__sameDocument = 'kept'")  # gone if the page reloads
    assert re.fullmatch(r"\d\d:\d\d", page.locator("#live-updated").inner_text())
    before = {int(i) for (i,) in served.rows("SELECT id FROM alerts")}
    shots.take(page, "list-before")

    day = demo_data.demo_day(start=(time.time() // 60) * 60 - 86400.0)
    summary = replay(url=served.url, key=served.keys["machine"], channels=day.channels,
                     series={"pump-04": AssetSeries(day.times_s["pump-04"], day.values["pump-04"])}, batch=240, progress=False)
    new = sorted({int(i) for (i,) in served.rows("SELECT id FROM alerts")} - before)
    assert new, f"the clog on pump-04 opened no alert ({summary.line()})"

    row = page.locator(f'#alerts-table tr[data-alert-id="{new[0]}"]')
    row.wait_for(timeout=20_000)  # the page's poll runs every 2 s here
    assert page.evaluate("window.__sameDocument") == "kept", "the page reloaded"
    assert "pump-04" in row.inner_text() and "active" in row.inner_text() or "returned" in row.inner_text()
    unack = served.rows("SELECT COUNT(*) FROM alerts WHERE state = 'unacknowledged'")[0][0]
    page.wait_for_function(
        "n => document.querySelector('.tallies [data-state=unacknowledged]').textContent.trim() === String(n)", arg=unack
    )
    shots.take(page, "list-after")


def test_a_retune_that_misses_a_confirmed_fault_needs_a_named_confirmation(page: Any, served: Served, shots: Shots) -> None:
    # The demo day's strongest alert that is open or already confirmed as a fault (an earlier
    # test may have closed one, as a confirmed fault); none at all is a failure of the scenario.
    candidates = served.rows(
        "SELECT id, asset_id, peak_score, state FROM alerts WHERE asset_id IN ('pump-01', 'pump-02') "
        "AND (state != 'closed' OR outcome = 'confirmed_fault') ORDER BY peak_score DESC LIMIT 1"
    )
    assert candidates, "the demo day left no open or confirmed alert on pump-01/02 to retune against"
    alert_id, asset, peak, state = candidates[0]
    if state != "closed":  # people confirmed it as a fault
        r = httpx.post(f"{served.url}/v1/alerts/{alert_id}/close", json={"outcome": "confirmed_fault"}, headers=_api(served, "maintenance"), timeout=30)
        assert r.status_code == 200, r.text
    version = served.rows("SELECT MAX(version) FROM threshold_versions WHERE asset_id = ?", asset)[0][0]
    sign_in(page, served, "operator")
    page.goto(f"{served.url}/assets/{asset}/thresholds")
    page.get_by_label("Warning level").fill(str(round(peak * 2, 3)))
    page.get_by_role("button", name="Preview").click()
    page.locator("#preview-figures").wait_for()
    risks = page.locator("#risk-statements").inner_text()
    assert f"#{alert_id}" in risks and "would have raised no alert" in risks and "less than the 7.0 asset-days" in risks
    assert "the level in force" in page.locator("#change-note").inner_text()  # a large change is called out
    assert page.locator("#apply-caution").is_visible()
    assert "1e-" not in page.locator("#preview").inner_text() and "e+" not in page.locator("#preview").inner_text()
    shots.take(page, "risky-preview")

    apply = page.get_by_role("button", name=f"Apply anyway as v{version + 1}")
    page.get_by_label("Reason for the change").fill("quieter please, agreed with the shift")
    apply.click()  # the browser holds the form back: the confirmations are required
    assert page.evaluate("document.querySelector('#apply-form').checkValidity()") is False
    assert served.rows("SELECT MAX(version) FROM threshold_versions WHERE asset_id = ?", asset)[0][0] == version

    # Past the browser's checks (as a script would post), the server refuses and says what is missing.
    page.evaluate("document.querySelectorAll('#apply-form [required]').forEach(e => e.removeAttribute('required'))")
    with page.expect_response(re.compile(rf".*/assets/{asset}/thresholds$")) as info:
        apply.click()
    assert info.value.status == 422
    assert f"#{alert_id}" in page.locator("main").inner_text()
    shots.take(page, "risky-refused")

    page.goto(f"{served.url}/assets/{asset}/thresholds?by=level&warning={round(peak * 2, 3)}")
    page.get_by_label(re.compile(f"Alert #{alert_id}")).check()
    page.get_by_label(re.compile("less than the 7.0 asset-days")).check()
    page.get_by_label("Reason for the change").fill("quieter please, agreed with the shift")
    page.get_by_role("button", name=f"Apply anyway as v{version + 1}").click()
    page.get_by_text("New threshold version applied.").wait_for()
    (details,) = served.rows(
        "SELECT details FROM audit_log WHERE action = 'threshold.set' AND target = ? ORDER BY id DESC LIMIT 1", f"asset:{asset}"
    )[0]
    audit = json.loads(details)
    assert audit["flagged"] is True and audit["missed_confirmed_faults"] == [alert_id]
    assert audit["accepted_risks"] == ["missed_confirmed_faults", "short_history"]
    shots.take(page, "risky-applied")
    # Put the calibrated levels back for any test after this one.
    v1 = page.locator('#versions-table tr[data-version="1"]')
    v1.get_by_label("Reason").fill("back to the calibrated levels")
    v1.get_by_role("button", name="Back to v1").click()
    page.get_by_text("Rolled back").wait_for()


def _smallest_chart_text_px(page: Any) -> float:
    return page.evaluate(
        """() => Math.min(...[...document.querySelectorAll('svg.chart')].flatMap(svg => {
             const scale = svg.getBoundingClientRect().width / svg.viewBox.baseVal.width;
             return [...svg.querySelectorAll('text')].filter(t => t.textContent.trim())
               .map(t => parseFloat(getComputedStyle(t).fontSize) * scale);
           }))"""
    )


def test_phone_layout_keeps_key_columns_and_readable_charts(page: Any, served: Served, shots: Shots) -> None:
    sign_in(page, served, "maintenance")
    page.set_viewport_size(PHONE)
    page.goto(f"{served.url}/alerts")
    assert page.evaluate("document.documentElement.scrollWidth - document.documentElement.clientWidth") <= 0
    heads = page.locator("#alerts-table thead th")
    visible = [heads.nth(i).inner_text().strip().lower() for i in range(heads.count()) if heads.nth(i).is_visible()]
    # The key columns; the condition (active / returned) sits under the state on a phone.
    assert visible == ["alert", "asset", "severity", "state", "peak"], visible
    first = page.locator("#alerts-table tbody tr[data-alert-id]").first
    assert re.search(r"(active|returned)", first.locator("td.state-cell").inner_text())
    wrap_overflows = page.evaluate("(() => { const w = document.querySelector('.table-wrap'); return w.scrollWidth > w.clientWidth; })()")
    hint = page.locator(".table-wrap").first.locator("xpath=preceding-sibling::p[contains(@class, 'scroll-hint')]")
    assert hint.is_visible() == wrap_overflows  # a hint exactly when the table must scroll
    shots.take(page, "phone-alerts")

    alert_id = served.rows("SELECT id FROM alerts WHERE state != 'closed' ORDER BY id LIMIT 1")
    alert_id = alert_id[0][0] if alert_id else served.rows("SELECT id FROM alerts ORDER BY id LIMIT 1")[0][0]
    page.goto(f"{served.url}/alerts/{alert_id}")
    assert page.evaluate("document.documentElement.scrollWidth - document.documentElement.clientWidth") <= 0
    smallest = _smallest_chart_text_px(page)
    assert smallest >= 11, f"chart text drawn at {smallest:.1f} CSS px at 390 px width"
    assert page.locator(".chart-scroll + p.scroll-hint, p.scroll-hint.shown").first.is_visible()
    caution = page.locator("#work-caution")
    assert caution.is_visible() and "lock-out" in caution.inner_text()
    ack = page.get_by_role("button", name="Acknowledge")
    if ack.count():
        gap = ack.bounding_box()["y"] - caution.bounding_box()["y"]
        assert 0 < gap < 400, f"the caution is {gap:.0f} px from Acknowledge"
    shots.take(page, "phone-alert")
    page.set_viewport_size({"width": 1280, "height": 800})
    assert _smallest_chart_text_px(page) >= 11  # and on the desktop
