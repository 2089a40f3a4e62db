"""`/docs` on an isolated network (issue 9): Chromium with every request that leaves the
served origin blocked renders the API documentation from the package, lists the routes,
offers the bearer authorize control and runs a request with a key."""

from __future__ import annotations

from typing import Any

import pytest

from browser_support import CHROMIUM, NO_CHROMIUM, Served, Shots

pytestmark = [pytest.mark.browser, pytest.mark.skipif(not CHROMIUM.exists(), reason=NO_CHROMIUM)]


def test_docs_render_and_work_with_the_network_blocked(page: Any, served: Served, shots: Shots) -> None:
    blocked: list[str] = []

    def only_the_service(route: Any) -> None:
        url = route.request.url
        if url.startswith(served.url + "/"):
            route.continue_()
        else:
            blocked.append(url)
            route.abort("internetdisconnected")

    page.context.route("**/*", only_the_service)
    page.goto(served.url + "/docs")
    page.locator(".opblock").first.wait_for()
    paths = page.locator(".opblock-summary-path").all_inner_texts()
    paths = [p.replace("\u200b", "").strip() for p in paths]
    for expected in ("/v1/assets/{asset_id}/readings", "/v1/alerts", "/v1/assets/{asset_id}/threshold/preview", "/healthz"):
        assert expected in paths, f"{expected} not listed on /docs: {paths}"
    assert len(paths) >= 20, paths
    assert not blocked, f"/docs asked for outside resources: {blocked}"
    shots.take(page, "docs", full_page=False)

    # The bearer scheme gives the page its authorize control; a key entered there is sent.
    page.locator(".auth-wrapper .authorize").click()
    dialog = page.locator(".dialog-ux")
    dialog.get_by_text("Bearer").first.wait_for()
    dialog.locator("input").first.fill(served.keys["maintenance"])
    dialog.locator(".auth-btn-wrapper button.authorize").first.click()
    dialog.locator(".auth-btn-wrapper button.btn-done").first.click()

    block = page.locator("#operations-readings-list_assets_v1_assets_get")
    if block.count() == 0:  # operation ids are FastAPI's; find the block by its path instead
        block = page.locator(".opblock-get").filter(has=page.locator('.opblock-summary-path[data-path="/v1/assets"]'))
    block.locator(".opblock-summary").first.click()
    block.get_by_role("button", name="Try it out").click()
    block.get_by_role("button", name="Execute").click()
    status = block.locator(".live-responses-table .response .response-col_status").first
    status.wait_for()
    assert status.inner_text().strip() == "200", status.inner_text()
    block.get_by_text("pump-01").first.wait_for()  # the answer as the page shows it
    shots.take(page, "docs-try-it", full_page=False)
    assert not blocked, f"/docs asked for outside resources: {blocked}"
