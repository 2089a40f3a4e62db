"""Browser tests: Playwright driving Debian's Chromium against a real `kilter serve`.

One server process per test session, on a free 127.0.0.1 port, with an SQLite file in a
temporary folder and the bundled model. Keys come from `kilter keys create`; a demo
day (training.demo_data, our own invented pump fleet) is replayed over HTTP with the
service's own replay code so the rule opens alerts. Each test gets a fresh browser
context (no shared cookies or storage) and writes screenshots to
test-output/browser/<test name>/.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from browser_support import BUNDLED, CHROMIUM, CHROMIUM_ARGS, DESKTOP, OUTPUT, REPLAY_ASSETS, Served, Shots  # noqa: E402


def _cli(*args: str) -> list[str]:
    from service.demo import kilter_argv

    return kilter_argv(*args)


@pytest.fixture(scope="session")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    from service.demo import free_port, stop, wait_ready
    from service.replay import AssetSeries, replay
    from training import demo_data

    if not any(BUNDLED.glob("*/*/manifest.json")):
        pytest.fail(f"the bundled model under {BUNDLED} is missing (make model)")
    folder = tmp_path_factory.mktemp("served")
    db_path = folder / "kilter.db"
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    env = {
        **os.environ,
        "KILTER_DATABASE_URL": f"sqlite:///{db_path}",
        "KILTER_MODEL_DIR": str(BUNDLED),
        "KILTER_RETENTION_DAYS": "0",
        "KILTER_DASHBOARD_REFRESH_S": "2",  # the live list's poll, short for the tests
        "CI": "1",  # no progress bars
    }
    log_path = folder / "serve.log"
    with open(log_path, "wb") as log:
        proc = subprocess.Popen(
            _cli("serve", "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning"),
            env=env, stdout=log, stderr=subprocess.STDOUT, cwd=folder,
        )
    try:
        try:
            wait_ready(url, proc)
        except Exception as e:
            pytest.fail(f"kilter serve did not come up: {e}\n{log_path.read_text(errors='replace')[-3000:]}")
        names = {"machine": "plc-gateway", "maintenance": "mira.tech", "operator": "oskar.ops"}
        makers = {
            who: subprocess.Popen(
                _cli("keys", "create", "--role", who, "--name", name),
                env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=folder,
            )
            for who, name in names.items()
        }
        keys = {}
        for who, p in makers.items():
            out, err = p.communicate(timeout=60)
            assert p.returncode == 0, f"keys create for {who} failed: {err}"
            assert re.fullmatch(r"kt_[A-Za-z0-9_\-]{20,}", out.strip()), f"keys create printed {out!r}, not a key alone on stdout"
            keys[who] = out.strip()

        start_s = (time.time() // 60) * 60 - 86400.0  # the day ends now: the service refuses future readings
        day = demo_data.demo_day(start=start_s)
        series = {a: AssetSeries(day.times_s[a], day.values[a]) for a in REPLAY_ASSETS}
        summary = replay(url=url, key=keys["machine"], channels=day.channels, series=series, batch=240, progress=False)
        served = Served(url, db_path, keys, names, log_path, summary.line())
        opened = served.rows("SELECT COUNT(*) FROM alerts")[0][0]
        assert opened >= 1, f"the demo day opened no alert ({summary.line()}); the browser scenarios need one"
        yield served
    finally:
        stop(proc)


# Module scope: the sync Playwright API keeps an event loop running in the main thread
# until it stops, which would break later tests that run their own loop (asyncio.run).
@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


@pytest.fixture
def shots(request: pytest.FixtureRequest) -> Shots:
    return Shots(OUTPUT / request.node.name)


@pytest.hookimpl(wrapper=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo[None]) -> Any:
    report = yield
    if report.when == "call":
        item.stash[_FAILED] = report.failed
    return report


_FAILED = pytest.StashKey[bool]()


@pytest.fixture
def page(browser: Any, request: pytest.FixtureRequest) -> Iterator[Any]:
    """A page in a fresh context; script errors fail the test, a failure leaves a screenshot."""
    context = browser.new_context(viewport=DESKTOP)
    context.set_default_timeout(15_000)
    pg = context.new_page()
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    try:
        yield pg
        assert not errors, f"the page raised script errors: {errors}"
    finally:
        if request.node.stash.get(_FAILED, False):
            folder = OUTPUT / request.node.name
            folder.mkdir(parents=True, exist_ok=True)
            pg.screenshot(path=str(folder / "failure.png"), full_page=True)
        context.close()


