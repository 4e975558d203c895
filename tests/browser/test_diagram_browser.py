"""The state-transition diagram in a real headless Chromium: drawn by the Vega-Lite
renderer bundled with Streamlit from our own layout, with no request outside the app; a
click on a move's dot opens the cell that defines it. Screenshots kept in
test-artifacts/diagram/."""

from __future__ import annotations

from urllib.parse import urlparse

import pytest

from tests.browser.test_app_browser import TIMEOUT_MS, _check_view, _wait_until_done

pytestmark = pytest.mark.browser

DOTS = "[data-testid='stVegaLiteChart'] g.mark-symbol path[aria-label*='move: {name};']"


def _record_outside(page) -> list[str]:
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
    return outside


def test_clicking_a_move_opens_its_cell_offline(app_url, page, artifacts):
    folder = artifacts / "diagram"
    folder.mkdir(exist_ok=True)
    outside = _record_outside(page)
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    page.get_by_role("tab", name="Transitions").click()
    chart = page.locator("[data-testid='stVegaLiteChart'] svg.marks").last
    chart.wait_for(timeout=TIMEOUT_MS)
    # Every state is a bubble with its name; every move of the first action has a dot.
    names = page.locator("[data-testid='stVegaLiteChart'] g.mark-text text")
    assert names.filter(has_text="Stage 3").count() >= 1
    dot = page.locator(DOTS.format(name="stage_2 -> stage_3")).first
    dot.wait_for(timeout=TIMEOUT_MS)
    assert page.get_by_text("rates.wait.stage_2.stage_3").count() == 0
    chart.scroll_into_view_if_needed()
    page.screenshot(path=str(folder / "model-transitions-diagram.png"), full_page=True)
    dot.click()
    page.get_by_text("rates.wait.stage_2.stage_3").first.wait_for(timeout=TIMEOUT_MS)
    _wait_until_done(page)
    _check_view(page)
    # The cell's table path, its full expression and the one-cell editor on it.
    body = page.locator("[data-testid='stMarkdownContainer']").filter(
        has_text="is defined by the cell"
    )
    assert "row stage_2, column stage_3" in body.first.inner_text()
    code = page.locator("[data-testid='stCode']").filter(has_text="p_progress_2").first
    code.wait_for(timeout=TIMEOUT_MS)
    assert page.get_by_label("Edit the cell rates.wait.stage_2.stage_3").count() == 1
    drawn = page.locator("[data-testid='stVegaLiteChart']").last
    drawn.scroll_into_view_if_needed()
    page.screenshot(path=str(folder / "model-transitions-diagram-clicked.png"), full_page=True)
    drawn.screenshot(path=str(folder / "diagram-clicked.png"))
    assert outside == [], outside
