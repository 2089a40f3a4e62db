"""Two `kilter serve --workers 2` processes on one database behave as one service (issue 11):
a model reload served by one process is what every worker of both answers with from then
on, with exactly one new threshold version per asset; a dashboard session made on one
works on all and sign-out ends it on all; `/metrics` totals add up across workers and
do not jump between scrapes; a revoked key is refused everywhere at once.

On the PostgreSQL run of `make test` (KILTER_TEST_DATABASE_URL) the database is a schema of
the test server; otherwise one SQLite file. Every request opens a new connection, so the
kernel spreads them over each process's workers. `pytest -s` prints the timeline.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

import pg_server
import tiny_model
from readings_support import readings
from service_env import TEST_DATABASE_URL

from service.db.keys import create_key
from service.db.migrate import upgrade
from service.db.session import Database, make_engine
from service.demo import free_port, kilter_argv

MODEL = "test-pumps"
ASSETS = ("pump-01", "pump-02")
BUSY_ASSETS = ("pump-11", "pump-12", "pump-13", "pump-14")  # posted to without pause while the reload runs


class Timeline:
    def __init__(self) -> None:
        self.t0 = time.monotonic()
        self.lines: list[str] = []

    def __call__(self, text: str) -> None:
        line = f"{time.monotonic() - self.t0:7.2f} s  {text}"
        self.lines.append(line)
        print(line, flush=True)


class Serve:
    """`kilter serve --workers 2` on a free loopback port, in its own process group."""

    def __init__(self, name: str, env: dict[str, str], cwd: Path) -> None:
        self.name, self.env, self.cwd = name, env, cwd
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log = cwd / f"serve-{name}.log"
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        with open(self.log, "wb") as out:
            self.proc = subprocess.Popen(
                kilter_argv("serve", "--host", "127.0.0.1", "--port", str(self.port), "--workers", "2", "--log-level", "warning"),
                env=self.env, cwd=self.cwd, stdout=out, stderr=subprocess.STDOUT, start_new_session=True,
            )

    def wait_ready(self, timeout_s: float = 120.0) -> None:
        assert self.proc is not None
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"serve {self.name} exited: {self.log.read_text(errors='replace')[-2000:]}")
            try:
                if httpx.get(f"{self.url}/readyz", timeout=1.0).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        raise AssertionError(f"serve {self.name} not ready in {timeout_s} s: {self.log.read_text(errors='replace')[-2000:]}")

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        os.killpg(self.proc.pid, signal.SIGTERM)
        try:
            self.proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=10)


def call(method: str, url: str, **kw: Any) -> httpx.Response:
    """One request on a new connection (so consecutive calls land on different workers)."""
    return httpx.request(method, url, timeout=30.0, headers={"Connection": "close", **kw.pop("headers", {})}, **kw)


RETRIED: list[str] = []


def post_until_answered(url: str, key: str, asset: str, batch: list[dict[str, Any]]) -> httpx.Response:
    """POST a batch; a 503 (the model switched while a worker scored it) is retried, as clients do."""
    for _ in range(20):
        r = call("POST", f"{url}/v1/assets/{asset}/readings", json={"readings": batch}, headers={"Authorization": f"Bearer {key}"})
        if r.status_code != 503:
            return r
        RETRIED.append(r.json()["error"]["code"])
        time.sleep(0.05)
    return r


def worker_pids(serve: Serve) -> set[str]:
    """The pids of the worker processes that wrote metric files under this serve's folder."""
    folder = Path(serve.env["PROMETHEUS_MULTIPROC_DIR"])
    return {p.stem.rsplit("_", 1)[-1] for p in folder.glob("kilter-metrics-*/*.db")}


def requests_total(text: str, route: str, status: str) -> float:
    from prometheus_client.parser import text_string_to_metric_families

    total = 0.0
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == "kilter_http_requests_total" and s.labels.get("route") == route and s.labels.get("status") == status:
                total += s.value
    return total


def sign_in(form_from: Serve, post_to: Serve, key: str) -> str:
    """The sign-in form from one process, posted to the other; the session cookie set."""
    page = call("GET", f"{form_from.url}/signin")
    token = re.search(r'name="signin_token" value="([^"]+)"', page.text).group(1)
    r = call("POST", f"{post_to.url}/signin", data={"api_key": key, "signin_token": token, "next": "/alerts"},
             cookies={"kilter_signin": page.cookies["kilter_signin"]}, follow_redirects=False)
    assert r.status_code == 303, r.text
    return r.cookies["kilter_session"]


def dashboard(url: str, cookie: str) -> int:
    return call("GET", f"{url}/alerts", cookies={"kilter_session": cookie}, follow_redirects=False).status_code


@pytest.fixture
def cluster(tmp_path: Path) -> Iterator[tuple[str, Path, dict[str, str], dict[str, int], list[Serve]]]:
    url = pg_server.schema_url(TEST_DATABASE_URL, f"cluster-{tmp_path}") if TEST_DATABASE_URL else f"sqlite:///{tmp_path / 'cluster.db'}"
    model_dir = tmp_path / "models"
    tiny_model.build(model_dir, model_id=MODEL)
    db = Database(url)
    keys: dict[str, str] = {}
    ids: dict[str, int] = {}
    try:
        upgrade(db.engine)
        with db.transaction() as s:
            for role in ("machine", "maintenance", "operator", "admin"):
                keys[role], row = create_key(s, name=f"cluster-{role}", role=role)
                s.flush()
                ids[role] = row.id
    finally:
        db.dispose()
    env = {k: v for k, v in os.environ.items() if not k.startswith(("KILTER_", "PROMETHEUS_"))}
    env.update(KILTER_DATABASE_URL=url, KILTER_MODEL_DIR=str(model_dir), KILTER_RETENTION_DAYS="0",
               KILTER_AUTO_UPGRADE="false", CI="1")
    # Each serve makes its private metrics folder inside the one named here, so the test can
    # see which worker processes wrote figures.
    servers = [Serve(n, {**env, "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / f"metrics-{n}")}, tmp_path) for n in ("A", "B")]
    try:
        for s in servers:
            s.start()
        for s in servers:
            s.wait_ready()
        yield url, model_dir, keys, ids, servers
    finally:
        for s in servers:
            s.stop()
        if TEST_DATABASE_URL:
            pg_server.drop_schema(url)


def test_two_serve_processes_of_two_workers_behave_as_one_service(cluster) -> None:
    url, model_dir, keys, ids, (a, b) = cluster
    log = Timeline()
    engine = make_engine(url)
    try:
        def thresholds(asset: str) -> list[tuple[Any, ...]]:
            with engine.connect() as conn:
                return [tuple(r) for r in conn.exec_driver_sql(
                    "SELECT version, origin, warning, model_version, created_by FROM threshold_versions "
                    f"WHERE asset_id = '{asset}' ORDER BY version")]

        log(f"2 x `kilter serve --workers 2` ready on {a.url} (A) and {b.url} (B), database {url.split('?')[0].split('://')[0]}")
        # 1. Before the reload: batches over both processes, both assets.
        posted = 0
        step = 0
        before = []
        for i in range(8):
            server, asset = (a, b)[i % 2], ASSETS[(i // 2) % 2]
            r = post_until_answered(server.url, keys["machine"], asset, readings(range(step, step + 4)))
            assert r.status_code == 200, r.text
            before.append(r.json()["model_version"])
            posted += 1
            if asset == ASSETS[1]:
                step += 4
        log(f"8 batches before the reload answered model versions {before}")
        assert set(before) == {"1"}

        # 2. A new version on disk (both processes share the folder), reload through A only,
        # while four clients keep posting over both processes.
        for asset in BUSY_ASSETS:
            assert post_until_answered(b.url, keys["machine"], asset, readings(range(0, 4))).status_code == 200
        answers: list[tuple[float, float, int, str]] = []  # (sent, answered, status, model version)
        stop = threading.Event()

        def busy(n: int, asset: str) -> None:
            k = 4
            while not stop.is_set():
                t_sent = time.monotonic()
                r = post_until_answered((a, b)[(k + n) % 2].url, keys["machine"], asset, readings(range(k, k + 2)))
                answers.append((t_sent, time.monotonic(), r.status_code, r.json().get("model_version", "") if r.status_code == 200 else r.text))
                k += 2

        threads = [threading.Thread(target=busy, args=(n, asset), daemon=True) for n, asset in enumerate(BUSY_ASSETS)]
        for t in threads:
            t.start()
        time.sleep(1.0)
        tiny_model.build(model_dir, model_id=MODEL, version="2", warning=5.5)
        t_reload = time.monotonic()
        r = call("POST", f"{a.url}/v1/models/reload", headers={"Authorization": f"Bearer {keys['admin']}"})
        t_switched = time.monotonic()
        assert r.status_code == 200, r.text
        assert r.json()["changed"] == {MODEL: {"from": "1", "to": "2"}}
        log(f"POST /v1/models/reload on A (4 clients posting meanwhile): {r.json()['changed']}")
        time.sleep(1.5)
        stop.set()
        for t in threads:
            t.join(timeout=30)
        assert all(st == 200 for _, _, st, _ in answers), [x for x in answers if x[2] != 200][:3]
        early = [v for sent, done, _, v in answers if done < t_reload]
        during = [v for sent, done, _, v in answers if sent < t_switched and done >= t_reload]
        late = [v for sent, _, _, v in answers if sent >= t_switched]
        log(f"busy clients: {len(early)} answers before the reload ({''.join(early)}), {len(during)} in flight across it "
            f"({''.join(during)}), {len(late)} sent after it ({''.join(late)})")
        assert set(early) == {"1"} and late and set(late) == {"2"}
        posted += len(BUSY_ASSETS) + len(answers)
        after = []
        for i in range(24):
            server, asset = (b, a)[i % 2], ASSETS[(i // 2) % 2]
            r = post_until_answered(server.url, keys["machine"], asset, readings(range(step, step + 2)))
            assert r.status_code == 200, r.text
            after.append(r.json()["model_version"])
            posted += 1
            if asset == ASSETS[1]:
                step += 2
        log(f"24 batches after the reload (B first, alternating) answered model versions {''.join(after)} "
            f"(all clients so far: {len(RETRIED)} batch(es) retried after a 503 {sorted(set(RETRIED))})")
        assert after == ["2"] * 24
        models = {s.name: call("GET", f"{s.url}/v1/models", headers={"Authorization": f"Bearer {keys['admin']}"}).json()["items"][0]["version"]
                  for s in (a, b) for _ in range(3)}
        log(f"GET /v1/models on A and B (3 each): {models}")
        assert set(models.values()) == {"2"}
        for asset in ASSETS + BUSY_ASSETS:
            rows = thresholds(asset)
            log(f"{asset} threshold versions: {[(v, o, w, mv, by) for v, o, w, mv, by in rows]}")
            assert [(v, o, w, mv) for v, o, w, mv, _ in rows] == [(1, "calibrated", 4.0, "1"), (2, "calibrated", 5.5, "2")]
            assert rows[1][4] == "cluster-admin"

        # 3. Dashboard sessions: the form from A posted to B; 20 page loads over both.
        cookie = sign_in(a, b, keys["maintenance"])
        loads = [dashboard((a, b)[i % 2].url, cookie) for i in range(20)]
        log(f"signed in (form from A, posted to B); 20 page loads over A and B: {loads.count(200)} x 200")
        assert loads == [200] * 20
        page = call("GET", f"{b.url}/alerts", cookies={"kilter_session": cookie})
        csrf = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)
        out = call("POST", f"{a.url}/signout", data={"csrf_token": csrf}, cookies={"kilter_session": cookie}, follow_redirects=False)
        assert out.status_code == 303
        replay = [dashboard((a, b)[i % 2].url, cookie) for i in range(8)]
        log(f"signed out on A; the same cookie replayed 8 times over A and B: {replay}")
        assert replay == [303] * 8

        # 4. Revocation: an operator key and its session, revoked through B's admin API.
        op_cookie = sign_in(b, a, keys["operator"])
        op = {"Authorization": f"Bearer {keys['operator']}"}
        assert [call("GET", f"{s.url}/v1/assets", headers=op).status_code for s in (a, b, a, b)] == [200] * 4
        r = call("POST", f"{b.url}/v1/keys/{ids['operator']}/revoke", headers={"Authorization": f"Bearer {keys['admin']}"})
        assert r.status_code == 200, r.text
        api = [call("GET", f"{s.url}/v1/assets", headers=op).status_code for s in (a, b) * 4]
        pages = [dashboard(s.url, op_cookie) for s in (a, b) * 2]
        log(f"operator key revoked on B; its API calls over A and B: {api}; its dashboard session: {pages}")
        assert api == [401] * 8 and pages == [303] * 4

        # 5. Metrics: each process sums its workers; the sum over both is every post, scrape after scrape.
        route = "/v1/assets/{asset_id}/readings"
        scrapes = []
        for _ in range(4):
            per = {s.name: requests_total(call("GET", f"{s.url}/metrics").text, route, "200") for s in (a, b)}
            scrapes.append(per)
        log(f"successful readings posts: {posted}; /metrics per process, 4 scrapes: {scrapes}")
        assert all(sum(p.values()) == posted for p in scrapes)
        assert all(p == scrapes[0] for p in scrapes)
        assert all(v > 0 for v in scrapes[0].values())
        pids = {s.name: sorted(worker_pids(s)) for s in (a, b)}
        log(f"worker processes that counted (pids of the metric files): {pids}")
        assert all(len(p) == 2 for p in pids.values()), pids
    finally:
        engine.dispose()
