"""The HTML report in a real headless Chromium: it renders from file:// alone, with every
section, the cautions and the inline charts. Skips only when chromium is absent outside CI
(see tests/browser/conftest.py); with CI=true it fails instead."""

from __future__ import annotations

from pathlib import Path

import pytest

from caredecide.modelfile import load_model
from caredecide.report import build_report
from caredecide.report.sections import SECTION_TITLES

BASE = Path(__file__).parents[1] / "data" / "broken_models" / "base_small.toml"


@pytest.fixture(scope="module")
def report_file(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("browser-report") / "report.html"
    build_report(BASE, out, draws=30, seed=2)
    return out


def test_report_renders_offline_with_every_section(report_file, page, artifacts):
    requests: list[str] = []

    def route(request_route):
        url = request_route.request.url
        requests.append(url)
        if url.startswith("file://"):
            request_route.continue_()
        else:
            request_route.abort()

    page.route("**/*", route)
    errors: list[str] = []
    page.on("pageerror", lambda error: errors.append(str(error)))
    page.goto(report_file.as_uri())
    page.wait_for_load_state("load")

    assert requests, "the browser made no request at all"
    assert all(url.startswith("file://") for url in requests), requests
    assert not errors
    header = page.locator("header.top")
    assert "RESEARCH USE ONLY" in header.inner_text()
    caution = page.locator("#cautions .caution")
    assert caution.is_visible()
    assert "not a substitute for clinical judgment" in caution.inner_text()
    for sid, title in SECTION_TITLES.items():
        heading = page.locator(f"section#{sid} > h2")
        assert heading.inner_text() == title
    assert page.locator("section#policy figure.chart svg").count() == 2
    # The decision tornado and the value-level tornado, then one transition sensitivity
    # matrix per action.
    n_actions = len(load_model(BASE).actions)
    assert page.locator("section#sensitivity figure.chart svg").count() == 2 + n_actions
    # The plane of the draws, the treatment's share of draws by state and age band, the
    # acceptability curves and the map of the best schedule over the draws.
    assert page.locator("section#uncertainty figure.chart svg").count() == 4
    notes = page.locator("section#uncertainty .note").all_inner_texts()
    assert any(text.startswith("EVPPI not computed") for text in notes)
    statuses = page.locator("section#verification table.checks tbody tr td:nth-child(2)")
    assert set(statuses.all_inner_texts()) == {"pass", "not applicable"}
    assert "30 parameter draws" in page.locator("section#uncertainty").inner_text()
    page.screenshot(path=str(artifacts / "report.png"), full_page=False)
