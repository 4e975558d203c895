"""Policy-region maps and "what would change it" in a real headless Chromium.

Each map has one panel per decision state (three on the demo) and a visible base point;
no chart is clipped by its container (legends are below the plot, labels unlimited).
Screenshots are kept in test-artifacts/policy-regions/ (the CI keeps test-artifacts/ as
its artifact folder); the test prints where.
"""

from __future__ import annotations

import pytest

from caredecide.decision_charts import PANEL_HEIGHT
from tests.browser.test_app_browser import TIMEOUT_MS, _check_view, _wait_until_done

pytestmark = pytest.mark.browser

SCREENSHOTS = "policy-regions"
"""Sub-folder of test-artifacts/ for this test's screenshots."""

CLIPPED = """(element) => {
    const inner = element.querySelector('canvas, svg');
    const box = element.getBoundingClientRect();
    const drawn = inner.getBoundingClientRect();
    return {
        overflowX: element.scrollWidth - element.clientWidth,
        overflowY: element.scrollHeight - element.clientHeight,
        right: drawn.right - box.right,
        height: drawn.height,
        width: drawn.width,
    };
}"""


def _charts_drawn(page, count: int):
    charts = page.locator("[data-testid='stVegaLiteChart']")
    charts.nth(count - 1).locator("canvas, svg").first.wait_for(timeout=TIMEOUT_MS)
    assert charts.count() == count
    return charts


def test_policy_region_maps_in_a_real_browser(app_url, page, artifacts):
    folder = artifacts / SCREENSHOTS
    folder.mkdir(exist_ok=True)
    page.goto(f"{app_url}/policy-regions", timeout=TIMEOUT_MS)
    _wait_until_done(page, "Policy regions")
    _check_view(page)
    charts = _charts_drawn(page, 2)
    for i in range(2):
        geometry = charts.nth(i).evaluate(CLIPPED)
        # Nothing cut: the drawing fits its container in both directions.
        assert geometry["overflowX"] <= 1 and geometry["overflowY"] <= 1, geometry
        assert geometry["right"] <= 1, geometry
        # Three state panels stacked, each PANEL_HEIGHT tall, plus the legend below.
        assert geometry["height"] >= 3 * PANEL_HEIGHT, geometry
    path = folder / "policy-regions.png"
    page.screenshot(path=str(path), full_page=True)
    print(f"screenshot kept: {path}")
    assert page.get_by_text("Two estimates").first.is_visible()


def test_what_would_change_page_in_a_real_browser(app_url, page, artifacts):
    folder = artifacts / SCREENSHOTS
    folder.mkdir(exist_ok=True)
    page.goto(f"{app_url}/what-would-change", timeout=TIMEOUT_MS)
    _wait_until_done(page, "What would change the recommendation")
    _check_view(page)
    assert page.get_by_text("Recommended:").count() >= 3  # one per decision state
    assert page.get_by_text("under its distribution").count() >= 1
    path = folder / "what-would-change.png"
    page.screenshot(path=str(path), full_page=True)
    print(f"screenshot kept: {path}")


def test_decision_tornado_in_a_real_browser(app_url, page, artifacts):
    folder = artifacts / SCREENSHOTS
    folder.mkdir(exist_ok=True)
    page.goto(f"{app_url}/sensitivity", timeout=TIMEOUT_MS)
    _wait_until_done(page, "Sensitivity")
    _check_view(page)
    heading = page.get_by_role("heading", name="Decision tornado: which estimate would change")
    assert heading.first.is_visible()
    charts = page.locator("[data-testid='stVegaLiteChart']")
    charts.first.locator("canvas, svg").first.wait_for(timeout=TIMEOUT_MS)
    geometry = charts.first.evaluate(CLIPPED)
    assert geometry["overflowX"] <= 1 and geometry["overflowY"] <= 1, geometry
    # The decision tornado comes before the value-level tornado.
    value_view = page.get_by_role("heading", name="Value-level tornado (second view)").first
    assert heading.first.bounding_box()["y"] < value_view.bounding_box()["y"]
    path = folder / "decision-tornado.png"
    page.screenshot(path=str(path), full_page=True)
    print(f"screenshot kept: {path}")
