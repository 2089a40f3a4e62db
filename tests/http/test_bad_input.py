"""Every bad-input case of POST readings: the status, the field it names, and that
nothing at all was stored (the batch's good readings included)."""

from __future__ import annotations

import json
import time

import pytest
from readings_support import counts, reading, readings


def assert_nothing_stored(env) -> None:
    assert counts(env) == {t: 0 for t in counts(env)}


def post_raw(env, asset: str, text: str, role: str = "machine"):
    headers = {**env.auth(role), "Content-Type": "application/json"}
    return env.client.post(f"/v1/assets/{asset}/readings", content=text.encode(), headers=headers)


def check(r, status: int, field: str | None, *words: str) -> None:
    assert r.status_code == status, r.text
    err = r.json()["error"]
    if field is not None:
        assert err["field"] == field
    for w in words:
        assert w in err["message"], err["message"]


def test_unknown_channel(env) -> None:
    batch = readings(range(5))
    batch[3]["values"]["speed_rpm"] = 1450.0
    check(env.post("pump-01", batch), 422, "body.readings[3].values.speed_rpm", "unknown channel 'speed_rpm'", "flow_m3h")
    assert_nothing_stored(env)


def test_missing_channel(env) -> None:
    batch = readings(range(5))
    del batch[2]["values"]["current_a"]
    check(env.post("pump-01", batch), 422, "body.readings[2].values.current_a", "missing channel 'current_a'", "null")
    assert_nothing_stored(env)


def test_null_means_missing_and_is_accepted(env) -> None:
    batch = readings(range(8))
    batch[4]["values"]["current_a"] = None
    r = env.post("pump-01", batch)
    assert r.status_code == 200 and r.json()["accepted"] == 8


@pytest.mark.parametrize("value", ['"12.5"', "true", "[1]", '{"v": 1}'])
def test_wrong_type(env, value: str) -> None:
    body = json.dumps({"readings": readings(range(3))}).replace('"current_a": 40.0', f'"current_a": {value}', 1)
    check(post_raw(env, "pump-01", body), 422, "body.readings[0].values.current_a", "number")
    assert_nothing_stored(env)


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity", "1e999"])
def test_nan_and_infinity_are_refused(env, literal: str) -> None:
    body = json.dumps({"readings": readings(range(3))}).replace('"bearing_temp_c": 45.0', f'"bearing_temp_c": {literal}', 2)
    check(post_raw(env, "pump-01", body), 422, "body.readings[0].values.bearing_temp_c", "finite", "null")
    assert_nothing_stored(env)


@pytest.mark.parametrize(
    ("ts", "words"),
    [
        ("yesterday", ("cannot be parsed", "ISO-8601")),
        ("2026-10-01T00:00:00", ("no UTC offset",)),
        ("2026-13-01T00:00:00Z", ("cannot be parsed",)),
        (None, ("timestamp",)),
        (True, ("timestamp",)),
    ],
)
def test_unparseable_timestamps(env, ts, words) -> None:
    batch = readings(range(4))
    batch[1]["ts"] = ts
    check(env.post("pump-01", batch), 422, "body.readings[1].ts", *words)
    assert_nothing_stored(env)


def test_timestamp_far_in_the_future(env) -> None:
    batch = readings(range(4))
    batch[2]["ts"] = time.time() + 3600
    check(env.post("pump-01", batch), 422, "body.readings[2].ts", "past the server clock", "300 s")
    assert_nothing_stored(env)
    # Within the tolerance (clock skew of a minute) is fine.
    ok = [reading(0, t0=int(time.time()) + 60, jitter_s=0)]
    assert env.post("pump-01", ok).status_code == 200


def test_same_timestamp_twice_with_different_values_in_one_batch(env) -> None:
    batch = readings(range(4)) + [reading(1, dev=2.0)]
    check(env.post("pump-01", batch), 422, "body.readings[4].ts", "readings[1]")
    assert_nothing_stored(env)


def test_a_limited_key_gets_the_same_403_for_unknown_and_other_assets(env) -> None:
    """Issue 9: 403 whether or not the asset exists, without listing the key's assets."""
    limited = env.add_key("machine", "gateway-1", assets=["pump-01"])
    env.post("pump-02", readings(range(4)))
    before = counts(env)
    unknown = env.post("pump-09", readings(range(4)), key=limited)
    other = env.post("pump-02", readings(range(4, 8)), key=limited)
    for r, asset in ((unknown, "pump-09"), (other, "pump-02")):
        check(r, 403, "path.asset_id", f"may not post readings for asset {asset!r}")
        assert "pump-01" not in r.text
    assert unknown.json()["error"]["message"].replace("pump-09", "X") == other.json()["error"]["message"].replace("pump-02", "X")
    assert counts(env) == before
    # Its own asset is created on first post.
    assert env.post("pump-01", readings(range(4)), key=limited).status_code == 200


def test_bad_asset_id(env) -> None:
    check(env.post("pump 01!", readings(range(2))), 422, "path.asset_id")
    long_id = "p" * 65
    check(env.post(long_id, readings(range(2))), 422, "path.asset_id")
    assert_nothing_stored(env)


def test_empty_batch_and_extra_fields(env) -> None:
    check(env.post("pump-01", []), 422, "body.readings", "at least one")
    batch = readings(range(2))
    batch[0]["quality"] = "good"
    check(env.post("pump-01", batch), 422, "body.readings[0].quality")
    assert_nothing_stored(env)


def test_batch_over_the_reading_limit_is_413(tmp_path, tiny_dir) -> None:
    from service_env import start_env

    gen = start_env(tmp_path, tiny_dir, max_batch_readings=10)
    env = next(gen)
    try:
        check(env.post("pump-01", readings(range(11))), 413, "body.readings", "at most 10")
        assert_nothing_stored(env)
        assert env.post("pump-01", readings(range(10))).status_code == 200
    finally:
        gen.close()


def test_body_over_the_byte_limit_is_413_before_parsing(tmp_path, tiny_dir) -> None:
    from service_env import start_env

    gen = start_env(tmp_path, tiny_dir, max_body_bytes=4096)
    env = next(gen)
    try:
        big = json.dumps({"readings": readings(range(40))})
        assert len(big) > 4096
        check(post_raw(env, "pump-01", big), 413, None, "4096-byte limit")
        # Not even parsed: broken JSON of that size is a 413 too, not a 422.
        check(post_raw(env, "pump-01", "{" * 5000), 413, None, "limit")
        assert_nothing_stored(env)
    finally:
        gen.close()


@pytest.mark.parametrize("asset", ["...", "%2E", "%2E%2E", ".%2E.."])
def test_asset_ids_of_dots_only_are_refused(env, asset: str) -> None:
    """'.' and '..' are path segments, not names (the dashboard would link to another page)."""
    r = env.client.post(f"/v1/assets/{asset}/readings", json={"readings": readings(range(2))}, headers=env.auth("machine"))
    check(r, 422, "path.asset_id", "not an asset id", "not a dot")
    assert_nothing_stored(env)


@pytest.mark.parametrize("ts", [0, 86400, "1970-01-01T00:00:05Z", "1999-12-31T23:59:59Z"])
def test_implausibly_old_timestamps_are_refused(env, ts) -> None:
    """Before 2000-01-01 is a clock that was never set, not a late reading (service/api/schemas.py)."""
    batch = readings(range(3))
    batch[1]["ts"] = ts
    check(env.post("pump-01", batch), 422, "body.readings[1].ts", "before 2000-01-01")
    assert_nothing_stored(env)


@pytest.mark.parametrize("content_type", ["text/plain", "application/x-www-form-urlencoded", "text/json"])
def test_a_body_not_declared_as_json_is_415(env, content_type: str) -> None:
    text = json.dumps({"readings": readings(range(2))})
    r = env.client.post("/v1/assets/pump-01/readings", content=text.encode(), headers={**env.auth("machine"), "Content-Type": content_type})
    check(r, 415, "header.content-type", "application/json", content_type)
    assert_nothing_stored(env)
    r = env.client.post("/v1/assets/pump-01/readings", content=text.encode(),
                        headers={**env.auth("machine"), "Content-Type": "application/json; charset=utf-8"})
    assert r.status_code == 200, r.text


@pytest.mark.parametrize("path", ["/v1/assets/pump-01/readings", "/v1/score", "/v1/assets/pump-01/threshold/preview"])
def test_a_chunked_body_over_the_byte_limit_is_413_on_every_route(tmp_path, tiny_dir, path: str) -> None:
    """No Content-Length to refuse up front: the cap is met while the route reads the body,
    whether the route parses it itself or FastAPI does."""
    from service_env import start_env

    gen = start_env(tmp_path, tiny_dir, max_body_bytes=4096)
    env = next(gen)
    try:
        def chunks():
            yield b'{"windows": ['
            for _ in range(100):
                yield b"[[1,2,3,4,5,6]]," * 10

        role = "operator" if "preview" in path else "machine"
        r = env.client.post(path, content=chunks(), headers={**env.auth(role), "Content-Type": "application/json"})
        check(r, 413, None, "4096-byte limit")
    finally:
        gen.close()
