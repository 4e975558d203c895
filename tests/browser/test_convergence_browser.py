"""The convergence view in a real headless Chromium: step through sweeps of every method;
one screenshot per method kept in test-artifacts/convergence/ (the CI artifact folder)."""

from __future__ import annotations

import pytest

from caredecide.analysis import analyse_convergence
from caredecide.modelfile import load_model
from synthetic_cohort import demo_model_path
from tests.browser.test_app_browser import DONE, TIMEOUT_MS, _check_view, _wait_until_done

pytestmark = pytest.mark.browser

SCREENSHOTS = "convergence"
"""Sub-folder of test-artifacts/ for this test's screenshots."""


def _settle(page) -> None:
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)
    page.wait_for_function(
        "() => document.querySelectorAll(\"[data-testid='stSkeleton']\").length === 0",
        timeout=TIMEOUT_MS,
    )
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)
    page.locator("[data-testid='stVegaLiteChart']").first.locator("canvas, svg").first.wait_for(
        timeout=TIMEOUT_MS
    )


def _forward(page, times: int) -> None:
    for _ in range(times):
        page.get_by_role("button", name="Next sweep ▶").click()
        _settle(page)


def test_step_through_the_sweeps_of_every_method(app_url, page, artifacts):
    folder = artifacts / SCREENSHOTS
    folder.mkdir(exist_ok=True)
    page.goto(f"{app_url}/convergence", timeout=TIMEOUT_MS)
    _wait_until_done(page, "Convergence")
    _settle(page)
    _check_view(page)

    # The demo model has a finite horizon: backward induction, cycle by cycle from the end.
    cycles = analyse_convergence(load_model(demo_model_path()), "backward_induction").sweeps
    page.get_by_text(f"After sweep 1 of {cycles}").first.wait_for(timeout=TIMEOUT_MS)
    _forward(page, 2)
    page.get_by_text(f"After sweep 3 of {cycles}").first.wait_for(timeout=TIMEOUT_MS)
    assert page.get_by_text("Stopping bound").count() == 0
    page.screenshot(path=str(folder / "backward-induction.png"), full_page=True)

    page.get_by_text("Two-state example (Puterman 1994, section 3.1)").first.click()
    _settle(page)
    shots = {
        "Value iteration": ("value-iteration.png", 162),
        "Policy iteration": ("policy-iteration.png", 2),
        "Modified policy iteration": ("modified-policy-iteration.png", 3),
    }
    for label, (name, sweeps) in shots.items():
        page.get_by_text(label, exact=True).first.click()
        _settle(page)
        page.get_by_role("button", name="◀ Previous sweep").click()  # at most sweep 1 already
        _settle(page)
        page.get_by_text(f"After sweep 1 of {sweeps}").first.wait_for(timeout=TIMEOUT_MS)
        _forward(page, 1)
        page.get_by_text(f"After sweep 2 of {sweeps}").first.wait_for(timeout=TIMEOUT_MS)
        assert page.get_by_text("All three methods reach the same policy.").first.is_visible()
        _check_view(page)
        page.screenshot(path=str(folder / name), full_page=True)
    assert page.locator("[data-testid='stException']").count() == 0
