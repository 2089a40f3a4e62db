"""A catalogue of hand-written hostile inputs: each gets a clean 4xx with our error shape
and stores nothing. Text that is legal but hostile (SQL, HTML in notes and key names) is
stored verbatim as data and comes back escaped on the dashboard."""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from typing import Any

import pytest

import support
from inproc import App, start_app

START = support.aligned_start(hours_back=3)
GOOD = support.readings(START, 1)[0]["values"]


def reading(ts: Any = START, **values: Any) -> dict[str, Any]:
    return {"ts": ts, "values": {**GOOD, **values}}


def raw(body: str) -> bytes:
    return body.encode()


# (name, path, body bytes) — every one must be refused with 4xx and store nothing.
CATALOGUE: list[tuple[str, str, bytes]] = [
    ("float overflow literal", "/v1/assets/pump-01/readings", raw('{"readings": [{"ts": %d, "values": %s}]}' % (START, json.dumps(GOOD).replace(str(GOOD["flow_m3h"]), "1e400")))),
    ("400-digit integer value", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(flow_m3h=10**400)]}))),
    ("NaN literal", "/v1/assets/pump-01/readings", raw('{"readings": [{"ts": %d, "values": %s}]}' % (START, json.dumps(GOOD).replace(str(GOOD["flow_m3h"]), "NaN")))),
    ("-Infinity literal", "/v1/assets/pump-01/readings", raw('{"readings": [{"ts": %d, "values": %s}]}' % (START, json.dumps(GOOD).replace(str(GOOD["flow_m3h"]), "-Infinity")))),
    ("value as string", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(flow_m3h="12.5")]}))),
    ("value as bool", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(flow_m3h=True)]}))),
    ("epoch 1e20 s", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=1e20)]}))),
    ("epoch 10**30 s", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=10**30)]}))),
    ("negative epoch -1e18", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=-1e18)]}))),
    ("year 9999", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts="9999-12-31T23:59:59Z")]}))),
    ("year 10000", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts="10000-01-01T00:00:00Z")]}))),
    ("epoch of year 9999", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=253402300799)]}))),
    ("timestamp without offset", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts="2026-10-14T08:00:00")]}))),
    ("timestamp 'nan'", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts="nan")]}))),
    ("good reading then one far future", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(), reading(ts="9999-01-01T00:00:00Z")]}))),
    ("deep JSON (50 000 levels)", "/v1/assets/pump-01/readings", raw('{"readings": ' + "[" * 50_000 + "]" * 50_000 + "}")),
    ("deep JSON in values", "/v1/assets/pump-01/readings", raw('{"readings": [{"ts": %d, "values": {"flow_m3h": %s}}]}' % (START, "[" * 20_000 + "]" * 20_000))),
    ("10 MB body", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=START + 60 * i) for i in range(1)], "pad": "x" * 10_000_000}))),
    ("10 MB of readings", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading(ts=START - 60 * i) for i in range(40_000)]}))),
    ("not JSON", "/v1/assets/pump-01/readings", raw("readings=1&values=2")),
    ("truncated JSON", "/v1/assets/pump-01/readings", raw('{"readings": [{"ts": 1, "values": {')),
    ("invalid UTF-8", "/v1/assets/pump-01/readings", b'{"readings": [{"ts": 1, "values": {"\xff\xfe": 1}}]}'),
    ("NUL in channel name", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [{"ts": START, "values": {**GOOD, "flow\u0000m3h": 1.0}}]}))),
    ("unknown channel with HTML name", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [{"ts": START, "values": {**GOOD, "<script>x</script>": 1.0}}]}))),
    ("extra top-level field", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": [reading()], "drop": "table"}))),
    ("readings not a list", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": {"ts": START}}))),
    ("empty batch", "/v1/assets/pump-01/readings", raw(json.dumps({"readings": []}))),
    ("unicode asset id (umlaut)", "/v1/assets/p%C3%BCmpe-01/readings", raw(json.dumps({"readings": [reading()]}))),
    ("unicode asset id (CJK)", "/v1/assets/%E6%B3%B5-01/readings", raw(json.dumps({"readings": [reading()]}))),
    ("unicode asset id (emoji)", "/v1/assets/pump-%F0%9F%94%A5/readings", raw(json.dumps({"readings": [reading()]}))),
    ("asset id with right-to-left mark", "/v1/assets/pump%E2%80%8F01/readings", raw(json.dumps({"readings": [reading()]}))),
    ("asset id lookalike Cyrillic a", "/v1/assets/%D0%B0sset/readings", raw(json.dumps({"readings": [reading()]}))),
    ("SQL in asset id", "/v1/assets/x'%3B%20DROP%20TABLE%20readings%3B--/readings", raw(json.dumps({"readings": [reading()]}))),
    ("HTML in asset id", "/v1/assets/%3Cscript%3E/readings", raw(json.dumps({"readings": [reading()]}))),
    ("asset id of 65 characters", "/v1/assets/" + "a" * 65 + "/readings", raw(json.dumps({"readings": [reading()]}))),
    ("score: a window of 1e999 values", "/v1/score", raw(json.dumps({"windows": [[[1e308] * 6] * 6]}).replace("1e+308", "1e999"))),
    ("score: deep JSON", "/v1/score", raw('{"windows": ' + "[" * 50_000 + "]" * 50_000 + "}")),
]


@pytest.fixture(scope="module")
def shared_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[App]:
    """One app for the whole catalogue: nothing in it may store anything, and the counts prove it."""
    yield from start_app(tmp_path_factory.mktemp("nasty"))


@pytest.mark.parametrize("name,path,body", CATALOGUE, ids=[c[0] for c in CATALOGUE])
def test_nasty_input_is_refused_cleanly_and_stores_nothing(shared_app: App, name: str, path: str, body: bytes) -> None:
    app = shared_app
    before = app.counts()
    r = app.client.post(path, content=body, headers={**app.auth("machine"), "Content-Type": "application/json"})
    assert 400 <= r.status_code < 500, f"{name}: {r.status_code} {r.text[:300]}"
    err = r.json()["error"]
    assert err["code"] and err["message"], name
    assert len(r.content) < 20_000, f"{name}: the error echoes too much of the input"
    assert app.counts() == before, f"{name}: something was stored"


def test_over_the_cap_without_content_length_is_413_before_parsing(shared_app: App) -> None:
    """A chunked body (no Content-Length) over the cap is refused while it streams."""
    app = shared_app
    before = app.counts()

    def chunks():  # noqa: ANN202 - a generator body makes httpx send it chunked
        yield b'{"readings": ['
        for i in range(20_000):  # about 3.3 MB of valid JSON, over the 2 MB cap
            yield ("," if i else "").encode() + json.dumps(reading(ts=START - 60 * i)).encode()
        yield b"]}"

    r = app.client.post("/v1/assets/pump-01/readings", content=chunks(), headers={**app.auth("machine"), "Content-Type": "application/json"})
    assert r.status_code == 413, r.text[:300]
    assert app.counts() == before


HOSTILE_NOTES = (
    "'; DROP TABLE alerts; --",
    "x' OR '1'='1",
    "<script>alert('note')</script>",
    '"><img src=x onerror=alert(1)>',
    "{{ 7*7 }} {% raw %}",
    "\u202eevil\u202c ünïcödé 泵 🔥",
)


def _open_alert(app: App) -> int:
    rows = support.readings(support.aligned_start(hours_back=2), 40, episodes=((10, 20),))
    r = app.client.post("/v1/assets/pump-01/readings", json={"readings": rows}, headers=app.auth("machine"))
    assert r.status_code == 200 and r.json()["alerts_opened"] == 1, r.text
    return int(r.json()["opened_alert_ids"][0]) if "opened_alert_ids" in r.json() else int(
        app.client.get("/v1/alerts", headers=app.auth("maintenance")).json()["items"][0]["id"])


def _sign_in(app: App, key: str) -> None:
    page = app.client.get("/signin")
    token = re.search(r'name="signin_token" value="([^"]+)"', page.text)
    assert token, page.text[:500]
    r = app.client.post("/signin", data={"api_key": key, "signin_token": token.group(1), "next": "/alerts"}, follow_redirects=False)
    assert r.status_code == 303, r.text[:300]


def test_sql_and_html_in_notes_are_stored_verbatim_and_escaped_on_the_dashboard(app: App) -> None:
    from service.db.keys import create_key
    from service.db.session import Database

    db = Database(app.settings.database_url)
    try:
        with db.transaction() as s:
            hostile_key, _ = create_key(s, name='<b onmouseover="x()">ops</b>', role="maintenance")
    finally:
        db.dispose()
    alert_id = _open_alert(app)
    h = {"Authorization": f"Bearer {hostile_key}"}
    r = app.client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"note": HOSTILE_NOTES[0]}, headers=h)
    assert r.status_code == 200, r.text
    for note in HOSTILE_NOTES[1:]:
        r = app.client.post(f"/v1/alerts/{alert_id}/notes", json={"note": note}, headers=h)
        if r.status_code == 404:  # no separate note endpoint: close carries the last note
            break
        assert r.status_code in (200, 201), r.text
    r = app.client.post(f"/v1/alerts/{alert_id}/close", json={"outcome": "false_alarm", "note": HOSTILE_NOTES[2]}, headers=h)
    assert r.status_code == 200, r.text
    # Stored as data: every table is still there and the notes read back byte for byte.
    assert app.counts()["alerts"] == 1
    detail = app.client.get(f"/v1/alerts/{alert_id}", headers=app.auth("maintenance")).json()
    text_blob = json.dumps(detail, ensure_ascii=False)
    assert HOSTILE_NOTES[0] in text_blob and HOSTILE_NOTES[2] in text_blob

    web = pytest.importorskip("service.web.routes", reason="the dashboard is not part of this checkout")
    assert web is not None
    _sign_in(app, app.keys["maintenance"])
    for page_path in (f"/alerts/{alert_id}", "/alerts", "/assets"):
        page = app.client.get(page_path)
        assert page.status_code == 200, (page_path, page.text[:300])
        assert "<script>alert('note')</script>" not in page.text
        assert '<img src=x onerror=alert(1)>' not in page.text
        assert '<b onmouseover="x()">' not in page.text
    detail_page = app.client.get(f"/alerts/{alert_id}").text
    assert "&lt;script&gt;alert(" in detail_page, "the HTML note should be shown, escaped"
    assert "&lt;b onmouseover=" in detail_page, "the key name should be shown, escaped"


def test_keys_are_compared_in_constant_time() -> None:
    """The stored hash is looked up by value, then confirmed with hmac.compare_digest
    (a comparison whose time does not depend on where the strings differ: Python docs, hmac)."""
    import inspect

    from service.db import keys

    src = inspect.getsource(keys.find_key)
    assert "hmac.compare_digest(" in src
