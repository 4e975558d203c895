"""The transition sensitivity matrix in a real headless Chromium: one matrix per action,
drawn, a cell's detail shown; screenshots kept in test-artifacts/transition-cells/ (the CI
keeps test-artifacts/ as its artifact folder)."""

from __future__ import annotations

import pytest

from tests.browser.test_app_browser import TIMEOUT_MS, _check_view, _wait_until_done

pytestmark = pytest.mark.browser

SCREENSHOTS = "transition-cells"
"""Sub-folder of test-artifacts/ for this test's screenshots."""


def test_transition_matrix_shows_in_a_real_browser(app_url, page, artifacts):
    folder = artifacts / SCREENSHOTS
    folder.mkdir(exist_ok=True)
    page.goto(f"{app_url}/transition-cells", timeout=TIMEOUT_MS)
    _wait_until_done(page, "Transition sensitivity matrix")
    _check_view(page)
    charts = page.locator("[data-testid='stVegaLiteChart']")
    charts.first.locator("canvas, svg").first.wait_for(timeout=TIMEOUT_MS)
    tabs = page.get_by_role("tab")
    assert tabs.count() >= 2  # the demo's two actions: one matrix each
    page.screenshot(path=str(folder / "matrix-first-action.png"), full_page=True)
    tabs.nth(1).click()
    charts.nth(1).locator("canvas, svg").first.wait_for(timeout=TIMEOUT_MS)
    page.screenshot(path=str(folder / "matrix-second-action.png"), full_page=True)
    assert page.get_by_text("Switch below 1").first.is_visible()  # the chosen cell's detail
    _check_view(page)
