"""Ingest throughput: readings/s through HTTP on loopback into a real `kilter serve`
process (readings stored, windows formed from stored readings, scored, stored, alert rule
run), with several concurrent clients posting realistic batches, beside the in-process
floor measured in the same run on the same data: the same windows scored straight
through ONNX Runtime (service.scoring.OnnxScorer, one thread, as the service) and the same
rows (readings and window scores) inserted with the sqlite3 module, one transaction per
batch, in one process.

Each client posts its assets' hourly batches in time order (by default one client per asset,
as each machine posts its own), a connection per post (as a machine sending a batch now and
then does; `--keep-alive` keeps one per client). The
clients' set-up and the JSON encoding of their bodies are done before the clock starts, as
the floor's window cutting is: what is timed is the service's work plus the loopback round
trips. Both paths write JSON with the service's serialiser (service.db.session.json_text).
The service is measured with one worker and with one per core (`serve --workers`); on
SQLite the workers share the one writer, and each request scores its windows before it
takes the write lock (service/ingest.py). The paths take turns (`--rounds`), and each
path's best round is compared, since the machine may be shared.

Goals (issue 3): HTTP ingest >= 0.5x the floor; p99 request latency <= 4x p50.
Bounded: a fixed amount of demo data, loopback only, every server is stopped at the end.

    python bench/ingest.py [--assets 6] [--hours 24] [--batch 60] [--clients N] [--workers 1,2] [--rounds 3] [--keep-alive]
"""
from __future__ import annotations

import argparse
import http.client
import json
import math
import os
import sqlite3
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
from service.demo import kilter_argv, free_port, stop, wait_ready  # noqa: E402
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
    env = {**os.environ, "KILTER_DATABASE_URL": db_url, "KILTER_MODEL_DIR": str(model_dir.parent.parent),
           "KILTER_AUTH_FAIL_LIMIT": "0", "KILTER_RETENTION_DAYS": "0"}
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    log = open(tmp / "serve.log", "wb")
    proc = subprocess.Popen(kilter_argv("serve", "--port", str(port), "--workers", str(workers), "--log-level", "warning"),
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
        headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json",
                   "Connection": "keep-alive" if keep_alive else "close"}
        # A lean client (the standard library's): the clients share the machine's cores with
        # the server, and what is measured is the server's work. Each post opens its own
        # connection, as a machine sending a batch every few minutes does; the service's
        # workers then share the posts (a kept-alive connection stays with one worker).
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
    p.add_argument("--clients", type=int, default=None, help="concurrent clients (default: one per asset, as each machine posts its own)")
    p.add_argument("--workers", default=f"1,{os.cpu_count() or 1}",
                   help="comma-separated `serve --workers` counts to measure (default: 1 and one per core)")
    p.add_argument("--keep-alive", action="store_true", help="each client keeps one connection (it then stays with one worker)")
    p.add_argument("--rounds", type=int, default=3, help="turns each path takes; the best of each is compared")
    args = p.parse_args()
    args.clients = args.clients or args.assets
    worker_counts = sorted({int(w) for w in str(args.workers).split(",") if w.strip()})

    channels, batches, demo = make_batches(args.assets, args.hours, args.batch)
    floors: list[dict] = []
    https: dict[int, list[dict]] = {w: [] for w in worker_counts}
    with tempfile.TemporaryDirectory(prefix="kilter-bench-") as tmp_s:
        tmp = Path(tmp_s)
        # The machine may be shared: the paths take turns, `--rounds` times, each on a fresh
        # database, and each path's best round is compared (per-round ratios printed too).
        for i in range(args.rounds):
            floors.append(floor_run(args.model, channels, batches, tmp / f"floor{i}.db"))
            for w in worker_counts:
                round_dir = tmp / f"http{i}-w{w}"
                round_dir.mkdir()
                https[w].append(http_run(args.model, batches, args.clients, w, round_dir, keep_alive=args.keep_alive))
    floor = min(floors, key=lambda f: f["seconds"])
    floor_rate = floor["readings"] / floor["seconds"]
    print(f"ingest bench: {args.assets} assets x {args.hours:g} h of one-minute readings = {floor['readings']} readings in "
          f"{len(batches)} batches of {args.batch}; model {args.model.parent.name}/{args.model.name}; "
          f"HTTP: {args.clients} clients ({'kept-alive connections' if args.keep_alive else 'a connection per post'}), "
          f"SQLite WAL; cores {os.cpu_count()}; best of {args.rounds} rounds per path")
    print()
    print("| path | readings/s | windows/s | HTTP / floor | p50 ms | p99 ms | p99 / p50 |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    print(f"| floor: ORT + sqlite3, one transaction per batch | {floor_rate:,.0f} | {floor['windows'] / floor['seconds']:,.1f} | 1.00 | | | |")
    verdicts = []
    for w in worker_counts:
        http = min(https[w], key=lambda h: h["seconds"])
        lat = http["latencies"]
        p50, p99 = pct(lat, 0.50), pct(lat, 0.99)
        rate = http["readings"] / http["seconds"]
        ratio, tail = rate / floor_rate, p99 / p50
        verdicts.append((w, ratio, tail))
        print(f"| HTTP: kilter serve --workers {w} | {rate:,.0f} | {http['windows'] / http['seconds']:,.1f} | {ratio:.2f} | "
              f"{p50 * 1000:.1f} | {p99 * 1000:.1f} | {tail:.2f} |")
        if http["windows"] != floor["windows"]:
            print(f"note: HTTP scored {http['windows']} windows, the floor {floor['windows']}")
    print()
    for w in worker_counts:
        rounds = ", ".join(f"{(h['readings'] / h['seconds']) / (f['readings'] / f['seconds']):.2f}" for f, h in zip(floors, https[w]))
        print(f"--workers {w}: HTTP / floor in each round: {rounds}")
    for w, ratio, tail in verdicts:
        print(f"--workers {w}: goal HTTP >= {GOAL_RATIO}x floor {'met' if ratio >= GOAL_RATIO else 'MISSED'} ({ratio:.2f}); "
              f"goal p99 <= {GOAL_TAIL:g}x p50 {'met' if tail <= GOAL_TAIL else 'MISSED'} ({tail:.2f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
