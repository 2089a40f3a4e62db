"""`kilter demo` (what `make demo` runs): the bundled model on a fresh SQLite file,
served by a real `kilter serve` process on 127.0.0.1, demo keys for every role, a demo
day with faults replayed through HTTP (the same code as `kilter replay`), the alerts it
opened, then serving until Ctrl-C. With DEMO_EXIT=1 it stops the server and exits 0 after
printing.

The demo day is the invented pump fleet of training.demo_data (numpy only, no torch),
generated so that it ends at the current minute: the service refuses readings from the
future, and the assets stay "normal"/"alerting" rather than "silent" after the replay.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import httpx

from service.settings import BUNDLED_MODELS

DEMO_ROLES = ("machine", "maintenance", "operator", "admin")
READY_TIMEOUT_S = 90.0
CLI = "import sys; from service.cli import main; sys.exit(main(sys.argv[1:]))"


class DemoError(RuntimeError):
    pass


def kilter_argv(*args: str) -> list[str]:
    """Run the `kilter` command with this interpreter (works without the console script)."""
    return [sys.executable, "-c", CLI, *args]


def free_port(preferred: int | None = None) -> int:
    """`preferred` when it can be bound on 127.0.0.1, else any free port."""
    if preferred is not None:
        with socket.socket() as s:
            try:
                s.bind(("127.0.0.1", preferred))
                return preferred
            except OSError:
                pass
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_ready(url: str, proc: subprocess.Popen[bytes] | None = None, timeout_s: float = READY_TIMEOUT_S) -> None:
    """Poll `url`/readyz until it answers 200; DemoError if the process dies or time runs out."""
    deadline = time.monotonic() + timeout_s
    last = "no answer"
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise DemoError(f"the service exited with status {proc.returncode} before it was ready")
        try:
            r = httpx.get(f"{url}/readyz", timeout=2.0)
            if r.status_code == 200:
                return
            last = f"HTTP {r.status_code}: {r.text[:200]}"
        except httpx.TransportError as e:
            last = type(e).__name__
        time.sleep(0.2)
    raise DemoError(f"the service at {url} was not ready after {timeout_s:.0f} s ({last})")


def stop(proc: subprocess.Popen[bytes], timeout_s: float = 15.0) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def _create_key(env: dict[str, str], role: str) -> str:
    out = subprocess.run(
        kilter_argv("keys", "create", "--role", role, "--name", f"demo-{role}"),
        env=env, capture_output=True, text=True, check=False,
    )
    if out.returncode != 0:
        raise DemoError(f"keys create --role {role} failed: {out.stderr.strip()}")
    return out.stdout.strip()


def run_demo(*, folder: Path, port: int | None = None) -> int:
    from training import demo_data  # numpy only

    from service.replay import AssetSeries, replay

    if not any(BUNDLED_MODELS.glob("*/*/manifest.json")):
        raise DemoError(f"no bundled model under {BUNDLED_MODELS}: run `make model` first")
    folder = Path(folder)
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    db_path = folder / "kilter.db"
    port = free_port(port if port is not None else 8000)
    url = f"http://127.0.0.1:{port}"
    env = {
        **os.environ,
        "KILTER_DATABASE_URL": f"sqlite:///{db_path.resolve()}",
        "KILTER_MODEL_DIR": str(os.environ.get("KILTER_MODEL_DIR", BUNDLED_MODELS)),
    }
    log_path = folder / "serve.log"
    with open(log_path, "wb") as log:
        proc = subprocess.Popen(
            kilter_argv("serve", "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning"),
            env=env, stdout=log, stderr=subprocess.STDOUT,
        )
    try:
        try:
            wait_ready(url, proc)
        except DemoError as e:
            raise DemoError(f"{e}; its log:\n{log_path.read_text(errors='replace')[-3000:]}") from e
        keys = {role: _create_key(env, role) for role in DEMO_ROLES}

        now_s = time.time()
        start_s = demo_data.recent_start(1.0, now_s)
        day = demo_data.demo_day(start=start_s)
        print(f"demo day {_iso(day.start_s)} .. {_iso(day.start_s + 86400)} for {', '.join(day.assets)}; faults:", file=sys.stderr)
        for ev in day.events:
            print(f"  {ev.asset:8s} {ev.kind:16s} {_iso(ev.start_s)} .. {_iso(ev.end_s)}", file=sys.stderr)
        series = {a: AssetSeries(day.times_s[a], day.values[a]) for a in day.assets}
        summary = replay(url=url, key=keys["machine"], channels=day.channels, series=series, batch=60)
        print(summary.line())

        r = httpx.get(f"{url}/v1/alerts", params={"limit": 100}, headers={"Authorization": f"Bearer {keys['maintenance']}"}, timeout=10)
        if r.status_code != 200:
            raise DemoError(f"listing alerts failed: HTTP {r.status_code} {r.text[:200]}")
        alerts = sorted(r.json()["items"], key=lambda a: a["opened_at"])
        print(f"\nalerts opened ({len(alerts)}):")
        print(f"  {'id':>3}  {'asset':8s} {'severity':8s} {'opened':20s} {'returned':20s} {'peak':>8}  top channel")
        for a in alerts:
            top = a["top_channels"][0] if a.get("top_channels") else {"channel": "-", "share": 0.0}
            print(f"  {a['id']:>3}  {a['asset_id']:8s} {a['severity']:8s} {a['opened_at']:20s} {str(a.get('returned_at') or '-'):20s} "
                  f"{a['peak_score']:8.3f}  {top['channel']} ({top['share']:.0%})")
        print(f"\ndashboard: {url}/   API docs: {url}/docs   database: {db_path}")
        print("keys (shown once; sign in to the dashboard with a person's key):")
        for role, key in keys.items():
            print(f"  {role:12s} {key}")
        print("The tool is advisory: not a safety system; it does not replace protective trips, interlocks or inspections.")
        sys.stdout.flush()
        if os.environ.get("DEMO_EXIT") == "1":
            return 0
        print("serving until Ctrl-C ...", file=sys.stderr)
        try:
            proc.wait()
        except KeyboardInterrupt:
            print("stopping", file=sys.stderr)
        return 0
    finally:
        stop(proc)


def _iso(ts_s: float) -> str:
    return datetime.fromtimestamp(ts_s, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
