"""How cost grows with stored work, measured side by side in one run (SQLite files):

  * ingest: latency of one readings POST (scored, stored, alert rule) for an asset with a
    long history in a database holding 10 M readings, vs the same posts on an empty one;
  * alert list: GET /v1/alerts (first page, one asset's page, a page deep behind a cursor)
    with 100 k alerts stored vs 100.

Goal: each big/small ratio <= 1.5 (the right indexes, no full scans). The big rows are
bulk-loaded straight into the migrated schema with sqlite3 (not through the API) to keep
the run short; requests go through the real app (create_app under TestClient, real SQLite
file, the bundled ONNX model). Prints a table and the wall time of the whole run.

    .venv/bin/python bench/growth.py [--readings 10000000] [--alerts 100000] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import shutil
import sqlite3
import statistics
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from fastapi.testclient import TestClient  # noqa: E402

from service.app import create_app  # noqa: E402
from service.db.keys import create_key  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.session import Database  # noqa: E402
from service.manifest import Manifest  # noqa: E402
from service.settings import BUNDLED_MODELS, Settings  # noqa: E402

MODEL = BUNDLED_MODELS / "booster-pumps" / "1"
GOAL = 1.5
HISTORY_ASSETS = 100  # the 10 M readings are spread over this many assets
BATCH = 60  # readings per timed post (one hour at 1/min)
POSTS = 24  # timed posts per database
REPEATS = 40  # timed alert-list requests per query and database


def manifest() -> Manifest:
    return Manifest.model_validate_json((MODEL / "manifest.json").read_text())


def fresh_db(path: Path) -> tuple[str, dict[str, str]]:
    url = f"sqlite:///{path}"
    db = Database(url)
    try:
        upgrade(db.engine)
        with db.transaction() as s:
            keys = {role: create_key(s, name=f"bench-{role}", role=role)[0] for role in ("machine", "maintenance")}
    finally:
        db.dispose()
    return url, keys


def centre_values(m: Manifest, i: int) -> dict[str, float]:
    return {c.name: round(ctr + 0.05 * sc * ((i * 7919) % 11 - 5), 4) for c, ctr, sc in zip(m.channels, m.scaler.center, m.scaler.scale)}


def bulk_readings(path: Path, m: Manifest, total: int, end_s: int) -> None:
    """`total` one-minute readings over HISTORY_ASSETS assets, ending at `end_s`, in bulk."""
    per_asset = total // HISTORY_ASSETS
    period = int(m.sample_period_s)
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA journal_mode=OFF")
    conn.execute("PRAGMA synchronous=OFF")
    conn.execute("PRAGMA cache_size=-200000")
    created = datetime.now(timezone.utc).replace(tzinfo=None).isoformat(sep=" ")
    # A few distinct JSON texts reused: the row size is realistic, the Python cost small.
    texts = [json.dumps(centre_values(m, i)) for i in range(97)]
    for a in range(HISTORY_ASSETS):
        asset = f"hist-{a:03d}"
        conn.execute(
            "INSERT INTO assets (asset_id, model_id, created_at, last_reading_at) VALUES (?, ?, ?, ?)",
            (asset, "booster-pumps", created, datetime.fromtimestamp(end_s, timezone.utc).replace(tzinfo=None).isoformat(sep=" ")),
        )
        start = end_s - (per_asset - 1) * period
        conn.executemany(
            "INSERT INTO readings (asset_id, ts_ms, \"values\", received_at) VALUES (?, ?, ?, ?)",
            ((asset, (start + i * period) * 1000, texts[i % 97], created) for i in range(per_asset)),
        )
        conn.commit()
    conn.execute("ANALYZE")
    conn.commit()
    conn.execute("PRAGMA journal_mode=WAL")
    conn.close()


def bulk_alerts(path: Path, total: int, assets: int = 50) -> None:
    """`total` closed alerts (plus one event each) spread over `assets` assets, one per hour each."""
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA synchronous=OFF")
    created = datetime.now(timezone.utc).replace(tzinfo=None)
    for a in range(assets):
        conn.execute("INSERT OR IGNORE INTO assets (asset_id, model_id, created_at) VALUES (?, ?, ?)", (f"al-{a:02d}", "booster-pumps", created.isoformat(sep=" ")))
    rows = []
    for i in range(total):
        opened = (created - timedelta(hours=total - i)).isoformat(sep=" ")
        rows.append((f"al-{i % assets:02d}", "warning", "closed", "returned", None, opened, opened, opened, 9.0, opened,
                     json.dumps([{"channel": "flow_m3h", "share": 0.6}]), "booster-pumps", "1", "false_alarm"))
    conn.executemany(
        "INSERT INTO alerts (asset_id, severity, state, condition, active_key, opened_at, last_seen_at, returned_at, peak_score,"
        " peak_at, top_channels, model_id, model_version, outcome) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        rows,
    )
    conn.execute("ANALYZE")
    conn.commit()
    conn.close()


def app_for(url: str) -> TestClient:
    settings = Settings(_env_file=None, database_url=url, model_dir=BUNDLED_MODELS, retention_days=0, auth_fail_limit=0)
    return TestClient(create_app(settings))


def ingest_latency(cases: dict[str, tuple[str, dict[str, str]]], m: Manifest, asset: str, start_s: int) -> dict[str, list[float]]:
    """The same posts against each database, alternating between them post by post, so a
    change in machine load during the run hits every case alike."""
    period = int(m.sample_period_s)
    lat: dict[str, list[float]] = {name: [] for name in cases}
    clients = {name: app_for(url) for name, (url, _) in cases.items()}
    for c in clients.values():
        c.__enter__()
    try:
        n_warm = 3  # not timed: the asset's windows and rule state exist before timing starts
        for p in range(n_warm + POSTS):
            body = {"readings": [{"ts": start_s + (p * BATCH + i) * period, "values": centre_values(m, p * BATCH + i)} for i in range(BATCH)]}
            for name, client in clients.items():
                headers = {"Authorization": f"Bearer {cases[name][1]['machine']}"}
                t0 = time.perf_counter()
                r = client.post(f"/v1/assets/{asset}/readings", json=body, headers=headers)
                dt = time.perf_counter() - t0
                if r.status_code != 200:
                    raise SystemExit(f"ingest failed: {r.status_code} {r.text[:300]}")
                if p >= n_warm:
                    lat[name].append(dt)
    finally:
        for c in clients.values():
            c.__exit__(None, None, None)
    return lat


def alert_latency(cases: dict[str, tuple[str, dict[str, str]]]) -> dict[str, dict[str, list[float]]]:
    """The same alert-list requests against each database, alternating request by request."""
    clients = {name: app_for(url) for name, (url, _) in cases.items()}
    for c in clients.values():
        c.__enter__()
    try:
        def get(name: str, path: str) -> dict:
            r = clients[name].get(path, headers={"Authorization": f"Bearer {cases[name][1]['maintenance']}"})
            if r.status_code != 200:
                raise SystemExit(f"{path}: {r.status_code} {r.text[:300]}")
            return r.json()

        queries: dict[str, dict[str, str]] = {}
        for name in clients:
            cursor = get(name, "/v1/alerts?limit=50")["next_cursor"]  # 100 alerts make two pages: time the second
            queries[name] = {"first page": "/v1/alerts?limit=50", "one asset": "/v1/alerts?limit=50&asset_id=al-07",
                             "2nd page (cursor)": f"/v1/alerts?limit=50&cursor={cursor}"}
            for q in queries[name].values():
                get(name, q)  # warm
        out: dict[str, dict[str, list[float]]] = {name: {q: [] for q in queries[name]} for name in clients}
        for _ in range(REPEATS):
            for name in clients:
                for label, path in queries[name].items():
                    t0 = time.perf_counter()
                    get(name, path)
                    out[name][label].append(time.perf_counter() - t0)
        return out
    finally:
        for c in clients.values():
            c.__exit__(None, None, None)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--readings", type=int, default=10_000_000)
    ap.add_argument("--alerts", type=int, default=100_000)
    ap.add_argument("--keep", type=Path, default=None, help="keep the databases in this folder")
    args = ap.parse_args()
    t_start = time.perf_counter()
    m = manifest()
    tmp = Path(tempfile.mkdtemp(prefix="kilter-growth-"))
    try:
        now_s = int(time.time())
        step = int(m.sample_period_s) * m.stride
        hist_end = now_s - 3 * 86400
        hist_end -= hist_end % step

        small_url, small_keys = fresh_db(tmp / "empty.db")
        big_url, big_keys = fresh_db(tmp / "big.db")
        t0 = time.perf_counter()
        bulk_readings(tmp / "big.db", m, args.readings, hist_end)
        load_readings_s = time.perf_counter() - t0
        size_gb = (tmp / "big.db").stat().st_size / 1e9

        # The same posts: continuing hist-042's history on the big database, a new asset on the empty one.
        lat = ingest_latency({"small": (small_url, small_keys), "big": (big_url, big_keys)}, m, "hist-042", hist_end + int(m.sample_period_s))
        small_lat, big_lat = lat["small"], lat["big"]

        few_url, few_keys = fresh_db(tmp / "alerts-few.db")
        many_url, many_keys = fresh_db(tmp / "alerts-many.db")
        t0 = time.perf_counter()
        bulk_alerts(tmp / "alerts-few.db", 100)
        bulk_alerts(tmp / "alerts-many.db", args.alerts)
        load_alerts_s = time.perf_counter() - t0
        alert_lat = alert_latency({"few": (few_url, few_keys), "many": (many_url, many_keys)})
        few, many = alert_lat["few"], alert_lat["many"]

        def ms(x: list[float], q: float = 0.5) -> float:
            return 1000 * (statistics.median(x) if q == 0.5 else sorted(x)[int(q * (len(x) - 1))])

        print(f"\nbulk load: {args.readings:,} readings in {load_readings_s:.0f} s ({size_gb:.2f} GB file); "
              f"{args.alerts:,} + 100 alerts in {load_alerts_s:.0f} s\n")
        rows = [(f"ingest POST {BATCH} readings, p50 ms (0 vs {args.readings / 1e6:g} M)", ms(small_lat), ms(big_lat)),
                (f"ingest POST {BATCH} readings, p90 ms", ms(small_lat, 0.9), ms(big_lat, 0.9))]
        for name in few:
            rows.append((f"GET /v1/alerts {name}, p50 ms (100 vs {args.alerts // 1000} k)", ms(few[name]), ms(many[name])))
        width = max(len(name) for name, _, _ in rows)
        print(f"{'measure':{width}s} {'small':>10s} {'big':>10s} {'ratio':>7s} {'goal':>6s}")
        worst = 0.0
        for name, a, b in rows:
            ratio = b / a
            worst = max(worst, ratio) if "p50" in name else worst
            print(f"{name:{width}s} {a:10.2f} {b:10.2f} {ratio:7.2f} {'<=' + str(GOAL):>6s} {'ok' if ratio <= GOAL else 'OVER'}")
        print(f"\nworst p50 ratio {worst:.2f} (goal <= {GOAL}); whole run {time.perf_counter() - t_start:.0f} s")
    finally:
        if args.keep:
            args.keep.mkdir(parents=True, exist_ok=True)
            for f in tmp.glob("*.db"):
                shutil.move(str(f), args.keep / f.name)
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
