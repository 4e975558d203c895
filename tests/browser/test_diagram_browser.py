"""The state-transition diagram in a real headless Chromium: drawn by the Graphviz renderer
bundled with Streamlit, with no request outside the app; screenshot kept in
test-artifacts/diagram/."""

from __future__ import annotations

from urllib.parse import urlparse

import pytest

from tests.browser.test_app_browser import TIMEOUT_MS, _check_view, _wait_until_done

pytestmark = pytest.mark.browser


def test_the_bubble_diagram_renders_offline(app_url, page, artifacts):
    folder = artifacts / "diagram"
    folder.mkdir(exist_ok=True)
    outside: list[str] = []
    page.on(
        "request",
        lambda request: (
            outside.append(request.url)
            if urlparse(request.url).hostname not in ("127.0.0.1", "localhost", None)
            and not request.url.startswith(("data:", "blob:"))
            else None
        ),
    )
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    page.get_by_role("tab", name="Transitions").click()
    graph = page.locator("[data-testid='stGraphVizChart'] svg").first
    graph.wait_for(timeout=TIMEOUT_MS)
    assert graph.locator("g.node").count() >= 7  # the demo's states
    assert graph.locator("g.edge").count() >= 7
    _check_view(page)
    graph.scroll_into_view_if_needed()
    page.screenshot(path=str(folder / "model-transitions-diagram.png"), full_page=True)
    assert outside == [], outside
