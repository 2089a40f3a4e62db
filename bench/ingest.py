"""Ingest throughput: readings/s through HTTP on loopback into a real `echowatch serve`
process (readings stored, windows formed from stored readings, scored, stored, alert rule
run), with several concurrent clients posting realistic batches, beside the in-process
floor measured in the same run on the same data: the same windows scored straight
through ONNX Runtime (service.scoring.OnnxScorer) and the same rows (readings and window
scores) inserted with the sqlite3 module, one transaction per batch.

The HTTP clients' own set-up (one keep-alive connection each) and the JSON encoding of their
bodies are done before the clock starts, as the floor's window cutting is: what is timed is
the service's work plus the loopback round trips, not the load generator's start-up. Both
paths write JSON with the service's serialiser (service.db.session.json_text).

Goals (issue 3): HTTP ingest >= 0.5x the floor; p99 request latency <= 4x p50.
Bounded: a fixed amount of demo data, loopback only, the server is stopped at the end.

    python bench/ingest.py [--assets 6] [--hours 24] [--batch 60] [--clients 4] [--workers 1] [--keep-alive]
"""

from __future__ import annotations

import argparse
import http.client
import json
import math
import os
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service import grid as G  # noqa: E402
from service.db.keys import create_key  # noqa: E402
from service.db.session import Database, json_text  # noqa: E402
from service.demo import echowatch_argv, free_port, stop, wait_ready  # noqa: E402
from service.manifest import load_manifest  # noqa: E402
from service.scoring import OnnxScorer  # noqa: E402
from service.settings import BUNDLED_MODELS  # noqa: E402

GOAL_RATIO = 0.5

GOAL_TAIL = 4.0


def make_batches(assets: int, hours: float, batch: int) -> tuple[list[str], list[tuple[str, list[dict]]], dict]:
    """Demo readings ending now, cut into per-asset batches ordered by time across assets."""
    from training import demo_data

    start = (time.time() // 60) * 60 - hours * 3600
    demo = demo_data.generate(assets=assets, days=hours / 24, start=start, fault_plan=[], outages=False)
    batches = []
    for a in demo.assets:
        t, v = demo.times_s[a], demo.values[a]
        for i in range(0, len(t), batch):
            rows = [{"ts": float(ts), "values": {c: (None if math.isnan(x) else float(x)) for c, x in zip(demo.channels, row)}}
                    for ts, row in zip(t[i : i + batch], v[i : i + batch])]
            batches.append((float(t[i]), a, rows))
    batches.sort(key=lambda b: (b[0], b[1]))
    return list(demo.channels), [(a, rows) for _, a, rows in batches], demo


def floor_run(model_dir: Path, channels: list[str], batches: list[tuple[str, list[dict]]], db_path: Path) -> dict:
    """The same windows scored straight through ONNX Runtime and the same rows inserted with
    sqlite3, one transaction per batch. Window cutting is done before the clock starts."""
    m = load_manifest(model_dir)
    scorer = OnnxScorer(model_dir, threads=1)
    period, w, s, f = m.sample_period_s, m.window, m.stride, m.gap_policy.max_fill_steps
    per_asset: dict[str, list[tuple[float, list[float]]]] = {}
    work = []
    for asset, rows in batches:
        hist = per_asset.setdefault(asset, [])
        prev_max = G.grid_index(hist[-1][0], period) if hist else None
        hist.extend((r["ts"], [np.nan if r["values"][c] is None else r["values"][c] for c in channels]) for r in rows)
        ts = np.array([h[0] for h in hist])
        vals = np.array([h[1] for h in hist])
        g = G.align(ts, vals, period)
        g = G.Grid(g.start, G.fill_gaps(g.values, f))
        ends = G.window_ends(g, w, s)
        if prev_max is not None:
            ends = ends[ends > prev_max]
        windows = G.cut_windows(g, ends, w) if len(ends) else np.empty((0, w, len(channels)), np.float32)
        work.append((asset, rows, ends, windows))
    conn = sqlite3.connect(db_path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("CREATE TABLE readings (id INTEGER PRIMARY KEY, asset_id TEXT, ts_ms INTEGER, \"values\" TEXT, received_at TEXT, UNIQUE(asset_id, ts_ms))")
    conn.execute("CREATE TABLE window_scores (id INTEGER PRIMARY KEY, asset_id TEXT, model_id TEXT, model_version TEXT, window_end_index INTEGER,"
                 " window_end_ms INTEGER, score REAL, contributions TEXT, created_at TEXT, UNIQUE(asset_id, model_id, model_version, window_end_index))")
    n_windows = 0
    t0 = time.perf_counter()
    for asset, rows, ends, windows in work:
        result = scorer.score(windows) if len(windows) else None
        now = time.strftime("%Y-%m-%d %H:%M:%S")
        conn.execute("BEGIN")
        conn.executemany("INSERT INTO readings (asset_id, ts_ms, \"values\", received_at) VALUES (?, ?, ?, ?)",
                         [(asset, int(round(r["ts"] * 1000)), json_text(r["values"]), now) for r in rows])
        if result is not None:
            shares = result.contributions
            conn.executemany(
                "INSERT INTO window_scores (asset_id, model_id, model_version, window_end_index, window_end_ms, score, contributions, created_at)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                [(asset, m.model_id, m.version, int(e), int(round(e * period * 1000)), float(sc),
                  json_text({c: round(float(x), 6) for c, x in zip(channels, sh)}), now)
                 for e, sc, sh in zip(ends, result.score, shares)])
            n_windows += len(ends)
        conn.execute("COMMIT")
    seconds = time.perf_counter() - t0
    conn.close()
    return {"seconds": seconds, "readings": sum(len(r) for _, r in batches), "windows": n_windows}


def http_run(model_dir: Path, batches: list[tuple[str, list[dict]]], clients: int, workers: int, tmp: Path, keep_alive: bool = False) -> dict:
    db_url = f"sqlite:///{tmp / 'http.db'}"
    env = {**os.environ, "ECHOWATCH_DATABASE_URL": db_url, "ECHOWATCH_MODEL_DIR": str(model_dir.parent.parent),
           "ECHOWATCH_AUTH_FAIL_LIMIT": "0", "ECHOWATCH_RETENTION_DAYS": "0"}
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    log = open(tmp / "serve.log", "wb")
    proc = subprocess.Popen(echowatch_argv("serve", "--port", str(port), "--workers", str(workers), "--log-level", "warning"),
                                          env=env, stdout=log, stderr=log)
    try:
        wait_ready(url, proc, timeout_s=180)
        db = Database(db_url)
        with db.transaction() as s:
            key, _ = create_key(s, name="bench", role="machine")
        db.dispose()
        # Each client owns some assets and posts their batches in time order.
        assets = sorted({a for a, _ in batches})
        owner = {a: i % clients for i, a in enumerate(assets)}
        queues: list[list[tuple[str, list[dict]]]] = [[] for _ in range(clients)]
        for a, rows in batches:
            queues[owner[a]].append((a, rows))
        latencies: list[float] = []
        windows = [0]
        errors: list[str] = []
        lock = threading.Lock()

        # Client set-up and JSON encoding of the bodies
        # happen before the clock starts, as the floor's batches are prepared before its clock.
        bodies = [[(f"/v1/assets/{a}/readings", json.dumps({"readings": rows}).encode()) for a, rows in q] for q in queues]
        headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json", "Connection": "close"}
        # A lean client (the standard library's): the clients share the machine's cores with
        # the server, and what is measured is the server's work. Each post opens its own
        # connection, as a machine sending a batch every few minutes does; the service's
        # workers then share the posts (a kept-alive connection stays with one worker).
        if keep_alive:
            headers["Connection"] = "keep-alive"

        def client(q: list[tuple[str, bytes]]) -> None:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=60)
            try:
                for path, body in q:
                    t = time.perf_counter()
                    conn.request("POST", path, body=body, headers=headers)
                    r = conn.getresponse()
                    data = r.read()
                    if not keep_alive:
                        conn.close()
                    dt = time.perf_counter() - t
                    with lock:
                        if r.status != 200:
                            errors.append(f"{r.status} {data[:200]!r}")
                            continue
                        latencies.append(dt)
                        windows[0] += json.loads(data)["windows_scored"]
            finally:
                conn.close()

        threads = [threading.Thread(target=client, args=(q,)) for q in bodies]
        t0 = time.perf_counter()
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        seconds = time.perf_counter() - t0
    finally:
        stop(proc)
        log.close()
    if errors:
        raise SystemExit(f"{len(errors)} requests failed, first: {errors[0]}")
    return {"seconds": seconds, "readings": sum(len(r) for _, r in batches), "windows": windows[0], "latencies": latencies}


def pct(values: list[float], q: float) -> float:
    return float(np.quantile(np.asarray(values), q))


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--model", type=Path, default=BUNDLED_MODELS / "booster-pumps" / "1")
    p.add_argument("--assets", type=int, default=6)
    p.add_argument("--hours", type=float, default=24.0)
    p.add_argument("--batch", type=int, default=60, help="readings per request (60 = an hour of one-minute readings)")
    p.add_argument("--clients", type=int, default=4)
    p.add_argument("--workers", type=int, default=1, help="service worker processes (serve --workers)")
    p.add_argument("--keep-alive", action="store_true", help="each client keeps one connection (it then stays with one worker)")
    args = p.parse_args()

    channels, batches, demo = make_batches(args.assets, args.hours, args.batch)
    with tempfile.TemporaryDirectory(prefix="echowatch-bench-") as tmp_s:
        tmp = Path(tmp_s)
        # The machine may be shared: the floor is the best of three runs (fresh file each), which
        # makes the ratio below conservative.
        floor = min((floor_run(args.model, channels, batches, tmp / f"floor{i}.db") for i in range(3)), key=lambda f: f["seconds"])
        http = http_run(args.model, batches, args.clients, args.workers, tmp, keep_alive=args.keep_alive)

    lat = http["latencies"]
    p50, p99 = pct(lat, 0.50), pct(lat, 0.99)
    floor_rate = floor["readings"] / floor["seconds"]
    http_rate = http["readings"] / http["seconds"]
    ratio = http_rate / floor_rate
    tail = p99 / p50
    print(f"ingest bench: {args.assets} assets x {args.hours:g} h of one-minute readings = {http['readings']} readings in "
          f"{len(batches)} batches of {args.batch}; model {args.model.parent.name}/{args.model.name}; "
          f"HTTP: {args.clients} clients ({'kept-alive connections' if args.keep_alive else 'a connection per post'}), "
          f"{args.workers} worker(s), SQLite WAL; cores {os.cpu_count()}")
    print(f"{'path':34s} {'readings/s':>11s} {'windows/s':>10s} {'windows':>8s} {'seconds':>8s}")
    print(f"{'floor: ORT + sqlite3 (best of 3)':34s} {floor_rate:11.0f} {floor['windows'] / floor['seconds']:10.1f} {floor['windows']:8d} {floor['seconds']:8.2f}")
    print(f"{'HTTP: echowatch serve':34s} {http_rate:11.0f} {http['windows'] / http['seconds']:10.1f} {http['windows']:8d} {http['seconds']:8.2f}")
    print(f"request latency p50 {p50 * 1000:.1f} ms, p90 {pct(lat, 0.9) * 1000:.1f} ms, p99 {p99 * 1000:.1f} ms, "
          f"max {max(lat) * 1000:.1f} ms, mean {statistics.mean(lat) * 1000:.1f} ms over {len(lat)} requests")
    print(f"{'ratio':34s} {'measured':>11s} {'goal':>10s}  met")
    print(f"{'HTTP / floor readings/s':34s} {ratio:11.2f} {'>= ' + str(GOAL_RATIO):>10s}  {'yes' if ratio >= GOAL_RATIO else 'NO'}")
    print(f"{'p99 / p50 latency':34s} {tail:11.2f} {'<= ' + str(GOAL_TAIL):>10s}  {'yes' if tail <= GOAL_TAIL else 'NO'}")
    if http["windows"] != floor["windows"]:
        print(f"note: HTTP scored {http['windows']} windows, the floor {floor['windows']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
