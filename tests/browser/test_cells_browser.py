"""The transition sensitivity matrix in a real headless Chromium: one matrix per action,
drawn, a cell's detail shown; screenshots kept in test-artifacts/transition-cells/ (the CI
keeps test-artifacts/ as its artifact folder)."""

from __future__ import annotations

import pytest

from caredecide.modelfile import load_model
from caredecide.sensitivity import cell_sensitivity
from synthetic_cohort import demo_model_path
from tests.browser.test_app_browser import DONE, TIMEOUT_MS, _check_view, _wait_until_done

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
    # One matrix (tab) per action with transition cells of its own. The demo starts
    # treatment by a decision-time move, so only 'wait' has transition rows: one tab.
    frame = cell_sensitivity(load_model(demo_model_path())).to_frame()
    actions = list(dict.fromkeys(frame["action"]))
    assert actions == ["wait"]
    tabs = page.get_by_role("tab")
    assert [tabs.nth(i).inner_text().strip() for i in range(tabs.count())] == actions
    for i, action in enumerate(actions):
        tabs.nth(i).click()
        charts.nth(i).locator("canvas, svg").first.wait_for(timeout=TIMEOUT_MS)
        page.screenshot(path=str(folder / f"matrix-{action}.png"), full_page=True)
    assert page.get_by_text("Switch below 1").first.is_visible()  # the chosen cell's detail
    # Choosing another cell shows that cell's detail.
    other = str(frame["cell"].iloc[-1])
    page.get_by_test_id("stSelectbox").first.click()
    page.get_by_role("option", name=other, exact=True).click()
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)
    page.locator("strong", has_text=other).first.wait_for(timeout=TIMEOUT_MS)  # its detail
    page.screenshot(path=str(folder / "cell-detail.png"), full_page=True)
    _check_view(page)
