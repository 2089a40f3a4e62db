"""Helpers shared by the browser tests: where things are, the served app, screenshots, sign-in."""

from __future__ import annotations

import re
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
NO_CHROMIUM = "Debian's chromium is not installed at /usr/bin/chromium (apt-get install chromium)"
ROOT = Path(__file__).resolve().parents[2]
OUTPUT = ROOT / "test-output" / "browser"
BUNDLED = ROOT / "models"
# The pump with the demo day's cavitation fault and one quiet pump: a short replay.
REPLAY_ASSETS = ("pump-01", "pump-02")
DESKTOP = {"width": 1280, "height": 800}
TABLET = {"width": 820, "height": 1180}


@dataclass
class Served:
    url: str
    db_path: Path
    keys: dict[str, str]
    names: dict[str, str]
    log_path: Path
    replay_summary: str = ""
    extra: dict[str, Any] = field(default_factory=dict)

    def rows(self, sql: str, *params: Any) -> list[tuple[Any, ...]]:
        """Read the service's SQLite file directly, read-only, to see what a page stored."""
        conn = sqlite3.connect(f"file:{self.db_path}?mode=ro", uri=True, timeout=10)
        try:
            return [tuple(r) for r in conn.execute(sql, params).fetchall()]
        finally:
            conn.close()


class Shots:
    """Screenshots of one test under test-output/browser/<test name>/."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        for old in folder.glob("*.png"):
            old.unlink()
        self.n = 0

    def take(self, page: Any, label: str, *, full_page: bool = True) -> Path:
        self.n += 1
        size = page.viewport_size or DESKTOP
        path = self.folder / f"{self.n:02d}-{label}-{size['width']}x{size['height']}.png"
        page.screenshot(path=str(path), full_page=full_page)
        return path

    def both(self, page: Any, label: str) -> None:
        """At 1280x800 and at tablet width (neither may need sideways scrolling), then back."""
        for size in (DESKTOP, TABLET):
            page.set_viewport_size(size)
            overflow = page.evaluate("document.documentElement.scrollWidth - document.documentElement.clientWidth")
            assert overflow <= 0, f"{label} at {size['width']} px is {overflow} px too wide"
            clipped = page.evaluate("[...document.querySelectorAll('.table-wrap')].filter(w => w.scrollWidth > w.clientWidth).length")
            assert clipped == 0, f"{label} at {size['width']} px: {clipped} table(s) wider than the page"
            self.take(page, label)
        page.set_viewport_size(DESKTOP)


def sign_in(page: Any, served: Served, who: str) -> None:
    page.goto(served.url + "/")
    assert page.url.startswith(served.url + "/signin"), f"not sent to sign in first: {page.url}"
    page.get_by_label("API key").fill(served.keys[who])
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url(re.compile(r".*/alerts.*"))
    page.get_by_text(served.names[who]).first.wait_for()
