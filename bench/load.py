"""A bounded load run on loopback: `kilter serve --workers 2` on SQLite and on
PostgreSQL, several clients posting readings (scored, stored, alert rule) and reading the
alert list for a fixed duration each. Prints throughput, p50/p99 latency and errors per
engine, side by side in one run.

    .venv/bin/python bench/load.py [--clients 6] [--duration 20] [--pg-url URL]

Without --pg-url the private test server of tests/pg_server.py is started (Debian's
postgresql, 127.0.0.1) and stopped again if this run started it; with neither, only SQLite
runs. Every server binds 127.0.0.1 and is stopped at the end.
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import httpx

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "tests"))

from service.db.keys import create_key  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.session import Database  # noqa: E402
from service.manifest import Manifest  # noqa: E402
from service.settings import BUNDLED_MODELS  # noqa: E402

KILTER = str(Path(sys.executable).with_name("kilter"))
BATCH = 60  # readings per post: one hour at one a minute
READ_EVERY = 5  # every 5th request of a client is GET /v1/alerts


@dataclass
class Tally:
    post_s: list[float] = field(default_factory=list)
    get_s: list[float] = field(default_factory=list)
    errors: int = 0
    readings: int = 0
    windows: int = 0


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def prepare(url: str) -> dict[str, str]:
    db = Database(url)
    try:
        upgrade(db.engine)
        with db.transaction() as s:
            return {r: create_key(s, name=f"load-{r}", role=r)[0] for r in ("machine", "maintenance")}
    finally:
        db.dispose()


def start_server(url: str, workdir: Path) -> tuple[subprocess.Popen[bytes], str]:
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("KILTER_")}
    env.update(KILTER_DATABASE_URL=url, KILTER_MODEL_DIR=str(BUNDLED_MODELS), KILTER_RETENTION_DAYS="0",
               KILTER_AUTO_UPGRADE="false", CI="1")
    log = open(workdir / f"serve-{port}.log", "wb")
    proc = subprocess.Popen([KILTER, "serve", "--host", "127.0.0.1", "--port", str(port), "--workers", "2", "--log-level", "warning"],
                            env=env, cwd=workdir, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"serve exited: {(workdir / f'serve-{port}.log').read_text()[-2000:]}")
        try:
            if httpx.get(f"{base}/readyz", timeout=1).status_code == 200:
                return proc, base
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    stop_server(proc)
    raise SystemExit("serve did not become ready in 120 s")


def stop_server(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=10)


def client_loop(base: str, keys: dict[str, str], asset: str, m: Manifest, start_s: int, until: float, tally: Tally) -> None:
    period = int(m.sample_period_s)
    post_h = {"Authorization": f"Bearer {keys['machine']}"}
    get_h = {"Authorization": f"Bearer {keys['maintenance']}"}
    i = 0
    with httpx.Client(timeout=30) as c:
        while time.monotonic() < until:
            i += 1
            t0 = time.perf_counter()
            try:
                if i % READ_EVERY == 0:
                    r = c.get(f"{base}/v1/alerts?limit=50", headers=get_h)
                    (tally.get_s if r.status_code == 200 else []).append(time.perf_counter() - t0)
                else:
                    n0 = (i - 1 - (i - 1) // READ_EVERY) * BATCH
                    body = {"readings": [{"ts": start_s + (n0 + k) * period,
                                          "values": {ch.name: round(ctr + 0.1 * sc * (((n0 + k) * 7) % 5 - 2), 4)
                                                     for ch, ctr, sc in zip(m.channels, m.scaler.center, m.scaler.scale)}}
                                         for k in range(BATCH)]}
                    r = c.post(f"{base}/v1/assets/{asset}/readings", json=body, headers=post_h)
                    if r.status_code == 200:
                        tally.post_s.append(time.perf_counter() - t0)
                        tally.readings += r.json()["accepted"]
                        tally.windows += r.json()["windows_scored"]
                if r.status_code != 200:
                    tally.errors += 1
            except httpx.HTTPError:
                tally.errors += 1


def run_engine(name: str, url: str, clients: int, duration_s: float, workdir: Path) -> dict[str, object]:
    m = Manifest.model_validate_json((BUNDLED_MODELS / "booster-pumps" / "1" / "manifest.json").read_text())
    keys = prepare(url)
    proc, base = start_server(url, workdir)
    try:
        step = int(m.sample_period_s) * m.stride
        # Far enough back that a whole run of posts stays in the past.
        start = int(time.time()) - 400 * 3600
        start -= start % step
        tallies = [Tally() for _ in range(clients)]
        until = time.monotonic() + duration_s
        threads = [threading.Thread(target=client_loop, args=(base, keys, f"load-{name}-{i:02d}", m, start, until, tallies[i]))
                   for i in range(clients)]
        t0 = time.perf_counter()
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=duration_s + 60)
        wall = time.perf_counter() - t0
    finally:
        stop_server(proc)
    posts = [x for t in tallies for x in t.post_s]
    gets = [x for t in tallies for x in t.get_s]

    def pct(xs: list[float], q: float) -> float:
        if not xs:
            return float("nan")
        xs = sorted(xs)
        return 1000 * xs[min(len(xs) - 1, int(round(q * (len(xs) - 1))))]

    return {
        "engine": name, "clients": clients, "seconds": wall,
        "requests": len(posts) + len(gets) + sum(t.errors for t in tallies),
        "req_per_s": (len(posts) + len(gets)) / wall,
        "readings_per_s": sum(t.readings for t in tallies) / wall,
        "windows": sum(t.windows for t in tallies),
        "post_p50": pct(posts, 0.5), "post_p99": pct(posts, 0.99),
        "get_p50": pct(gets, 0.5), "get_p99": pct(gets, 0.99),
        "errors": sum(t.errors for t in tallies),
        "mean_post_ms": 1000 * statistics.fmean(posts) if posts else float("nan"),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--clients", type=int, default=6)
    ap.add_argument("--duration", type=float, default=20.0, help="seconds of load per engine")
    ap.add_argument("--pg-url", default=None, help="a PostgreSQL URL to use instead of the private test server")
    ap.add_argument("--sqlite-only", action="store_true")
    args = ap.parse_args()
    t_start = time.perf_counter()
    workdir = Path(tempfile.mkdtemp(prefix="kilter-load-"))
    results = [run_engine("sqlite", f"sqlite:///{workdir / 'load.db'}", args.clients, args.duration, workdir)]

    if not args.sqlite_only:
        started_pg = False
        pg_url = args.pg_url
        schema_url = None
        if pg_url is None:
            import pg_server

            if pg_server.available():
                started_pg = not pg_server._accepting()
                pg_url = pg_server.start()
        if pg_url is not None:
            import pg_server

            schema_url = pg_server.schema_url(pg_url, f"load-{workdir}") if args.pg_url is None else pg_url
            try:
                results.append(run_engine("postgresql", schema_url, args.clients, args.duration, workdir))
            finally:
                if args.pg_url is None:
                    pg_server.drop_schema(schema_url)
                    if started_pg:
                        pg_server.stop()
        else:
            print("PostgreSQL not installed: SQLite only (make system-deps installs it)", file=sys.stderr)

    print(f"\nload: {args.clients} clients, {args.duration:.0f} s per engine, `serve --workers 2` on 127.0.0.1, "
          f"bundled model; posts of {BATCH} readings, every {READ_EVERY}th request GET /v1/alerts\n")
    head = f"{'engine':11s} {'req/s':>7s} {'readings/s':>11s} {'windows':>8s} {'POST p50':>9s} {'POST p99':>9s} {'GET p50':>8s} {'GET p99':>8s} {'errors':>7s}"
    print(head)
    for r in results:
        print(f"{r['engine']:11s} {r['req_per_s']:7.1f} {r['readings_per_s']:11.0f} {r['windows']:8d} {r['post_p50']:7.1f}ms "
              f"{r['post_p99']:7.1f}ms {r['get_p50']:6.1f}ms {r['get_p99']:6.1f}ms {r['errors']:7d}")
    if len(results) == 2:
        a, b = results
        print(f"\npostgresql / sqlite: throughput {b['req_per_s'] / a['req_per_s']:.2f}x, POST p50 {b['post_p50'] / a['post_p50']:.2f}x, "
              f"POST p99 {b['post_p99'] / a['post_p99']:.2f}x")
    print(f"whole run {time.perf_counter() - t_start:.0f} s")
    shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
