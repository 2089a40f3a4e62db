"""Helpers for the reliability tests: real `kilter serve` processes on 127.0.0.1, keys,
invented readings for the steerable tiny model, clients that retry, and database checks
that work on SQLite and PostgreSQL alike (through SQLAlchemy).

Every server here binds 127.0.0.1 on a free port and is stopped by the test that started it.
"""

from __future__ import annotations

import math
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import create_engine, text

TESTS = Path(__file__).resolve().parents[1]
REPO = TESTS.parent
sys.path.insert(0, str(TESTS / "http"))
sys.path.insert(0, str(TESTS))

import pg_server  # noqa: E402
import tiny_model  # noqa: E402

from service.alerting import AlertRule, count_alerts  # noqa: E402
from service.db.keys import create_key  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.session import Database  # noqa: E402

KILTER = str(Path(sys.executable).with_name("kilter"))
MODEL_ID = "test-pumps"
PERIOD_S = 60.0
WINDOW, STRIDE = 6, 2
RULE = AlertRule(warning=4.0, critical=25.0, on_k=2, on_n=3, off_m=2, deadband_frac=0.1)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def build_model(root: Path) -> Path:
    """The tiny real ONNX model (window 6, stride 2, 60 s grid): a reading k scales from the centre scores k^2."""
    tiny_model.build(root, model_id=MODEL_ID)
    return root


def prepare_database(url: str, keys: dict[str, str] | None = None) -> dict[str, str]:
    """Upgrade the schema and create one key per role; returns role -> key."""
    db = Database(url)
    try:
        upgrade(db.engine)
        out = {}
        with db.transaction() as s:
            for role in keys or {"machine": "m", "maintenance": "mt", "operator": "op", "admin": "ad"}:
                out[role], _ = create_key(s, name=f"reliability-{role}", role=role)
        return out
    finally:
        db.dispose()


def server_env(url: str, model_dir: Path, **extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("KILTER_")}
    env.update(
        KILTER_DATABASE_URL=url,
        KILTER_MODEL_DIR=str(model_dir),
        KILTER_RETENTION_DAYS="0",
        KILTER_AUTO_UPGRADE="false",  # the test upgrades once; replicas never race on DDL
        CI="1",
    )
    env.update(extra)
    return env


class Server:
    """`kilter serve` as a real process on 127.0.0.1:`port`."""

    def __init__(self, env: dict[str, str], cwd: Path, port: int | None = None, workers: int = 1) -> None:
        self.env, self.cwd, self.workers = env, cwd, workers
        self.port = port or free_port()
        self.proc: subprocess.Popen[bytes] | None = None
        self.log = cwd / f"serve-{self.port}.log"

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout_s: float = 90.0) -> Server:
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen(
                [KILTER, "serve", "--host", "127.0.0.1", "--port", str(self.port), "--workers", str(self.workers), "--log-level", "warning"],
                env=self.env, cwd=self.cwd, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
            )
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"serve exited with {self.proc.returncode}:\n{self.log.read_text(errors='replace')[-3000:]}")
            try:
                if httpx.get(f"{self.url}/readyz", timeout=1.0).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        self.stop()
        raise RuntimeError(f"serve did not become ready in {timeout_s} s:\n{self.log.read_text(errors='replace')[-3000:]}")

    def kill(self) -> None:
        """SIGKILL the whole process group (uvicorn's workers too): no shutdown code runs."""
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=30)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=10)


def readings(start_s: int, n: int, *, episodes: tuple[tuple[int, int], ...] = (), offset: float = 3.0) -> list[dict[str, Any]]:
    """`n` one-minute readings from `start_s` at the model's centre (score 0), except inside
    `episodes` ((first, count) reading positions) where every channel sits `offset` scales
    away (score offset^2: 9 by default, between warning 4 and critical 25)."""
    out = []
    for i in range(n):
        k = offset if any(a <= i < a + c for a, c in episodes) else 0.0
        # A small deterministic wobble keeps values distinct without moving the score much.
        wobble = 0.01 * ((i * 7) % 5)
        values = {ch: round(ctr + (k + wobble) * sc, 6) for ch, ctr, sc in zip(tiny_model.CHANNELS, tiny_model.CENTER, tiny_model.SCALE)}
        out.append({"ts": start_s + int(i * PERIOD_S), "values": values})
    return out


def aligned_start(hours_back: float) -> int:
    """A start time `hours_back` hours ago, on a stride boundary of the grid."""
    step = int(PERIOD_S * STRIDE)
    t = int(time.time() - hours_back * 3600)
    return t - t % step


@dataclass
class ClientLog:
    """What one retrying client saw."""

    attempts: int = 0
    acknowledged: list[list[int]] = field(default_factory=list)  # ts (epoch s) of each 2xx batch
    connection_errors: int = 0
    server_errors: int = 0
    client_errors: list[tuple[int, str]] = field(default_factory=list)
    windows_scored: int = 0
    alerts_opened: int = 0


def post_until_acknowledged(
    client: httpx.Client, url: str, key: str, asset: str, batch: list[dict[str, Any]], log: ClientLog, *, deadline: float
) -> bool:
    """POST one batch, retrying on connection errors, 5xx and 429 (idempotency makes that
    safe) until a 2xx, a 4xx (recorded), or the deadline. True when acknowledged."""
    delay = 0.05
    while time.monotonic() < deadline:
        log.attempts += 1
        try:
            r = client.post(f"{url}/v1/assets/{asset}/readings", json={"readings": batch}, headers={"Authorization": f"Bearer {key}"})
        except httpx.HTTPError:
            log.connection_errors += 1
            time.sleep(delay)
            delay = min(delay * 1.5, 0.5)
            continue
        if r.status_code < 300:
            body = r.json()
            log.acknowledged.append([int(x["ts"]) for x in batch])
            log.windows_scored += int(body["windows_scored"])
            log.alerts_opened += int(body["alerts_opened"])
            return True
        if r.status_code >= 500 or r.status_code == 429:
            log.server_errors += 1
            time.sleep(delay)
            continue
        log.client_errors.append((r.status_code, r.text[:300]))
        return False
    return False


def run_clients(targets: list[tuple[str, str, list[list[dict[str, Any]]]]], key: str, *, deadline: float,
                stop: threading.Event | None = None) -> list[ClientLog]:
    """One thread per (base URL, asset, batches): posts the batches in order, each until acknowledged.
    With `stop` set, a client stops after its current batch."""
    logs = [ClientLog() for _ in targets]

    def work(i: int) -> None:
        url, asset, batches = targets[i]
        with httpx.Client(timeout=30.0) as client:
            for batch in batches:
                if stop is not None and stop.is_set():
                    return
                if not post_until_acknowledged(client, url, key, asset, batch, logs[i], deadline=deadline):
                    return

    threads = [threading.Thread(target=work, args=(i,), daemon=True) for i in range(len(targets))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=max(1.0, deadline - time.monotonic() + 5))
    return logs


def batches_of(rows: list[dict[str, Any]], size: int) -> list[list[dict[str, Any]]]:
    return [rows[i : i + size] for i in range(0, len(rows), size)]


# --- checks on the stored rows (any engine) -------------------------------------------------


def query(url: str, sql: str, **params: Any) -> list[tuple[Any, ...]]:
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            return [tuple(r) for r in conn.execute(text(sql), params)]
    finally:
        engine.dispose()


def stored_readings(url: str) -> dict[tuple[str, int], int]:
    """(asset, ts_ms) -> how many rows hold it."""
    return {(a, int(t)): int(n) for a, t, n in query(url, "SELECT asset_id, ts_ms, COUNT(*) FROM readings GROUP BY asset_id, ts_ms")}


def windows_scored_twice(url: str) -> int:
    rows = query(url, "SELECT COUNT(*) FROM (SELECT 1 FROM window_scores GROUP BY asset_id, model_id, model_version, window_end_index HAVING COUNT(*) > 1) d")
    return int(rows[0][0])


def expected_window_ends(ts_s: list[int]) -> set[int]:
    """Window ends (grid indexes) an unbroken run of readings makes due: stride multiples from
    the first full window up to the newest reading."""
    idx = sorted(int(math.floor(t / PERIOD_S + 0.5)) for t in ts_s)
    first = idx[0] + WINDOW - 1
    first += (-first) % STRIDE
    return set(range(first, idx[-1] + 1, STRIDE))


def scores_in_order(url: str, asset: str) -> list[tuple[int, float]]:
    return [(int(e), float(s)) for e, s in query(
        url, "SELECT window_end_index, score FROM window_scores WHERE asset_id = :a ORDER BY window_end_index", a=asset)]


def alert_rows(url: str, asset: str) -> list[tuple[Any, ...]]:
    return query(url, "SELECT id, opened_at, returned_at, active_key FROM alerts WHERE asset_id = :a ORDER BY opened_at, id", a=asset)


def tiny_score(window: list[dict[str, float]]) -> float:
    """The tiny model's score, computed directly: mean squared scaled distance from the centre."""
    total = 0.0
    for values in window:
        for ch, ctr, sc in zip(tiny_model.CHANNELS, tiny_model.CENTER, tiny_model.SCALE):
            total += ((values[ch] - ctr) / sc) ** 2
    return total / (len(window) * len(tiny_model.CHANNELS))


def reference_alerts(url: str, asset: str) -> int:
    """How many alerts the alert rule opens over the asset's stored scores, replayed from scratch."""
    return count_alerts([s for _, s in scores_in_order(url, asset)], RULE)


def sqlite_integrity(path: Path) -> list[tuple[Any, ...]]:
    import sqlite3

    conn = sqlite3.connect(path)
    try:
        return conn.execute("PRAGMA integrity_check").fetchall()
    finally:
        conn.close()


def pg_base_url() -> Iterator[str]:
    """The test PostgreSQL server's URL (started if needed, stopped again if this started it)."""
    was_up = pg_server._accepting()
    url = pg_server.start()
    try:
        yield url
    finally:
        if not was_up:
            pg_server.stop()
