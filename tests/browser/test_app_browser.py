"""End to end: ``caredecide app`` in a real headless Chromium, every view, no exception.

Screenshots of each view go to ``test-artifacts/``.
"""

from __future__ import annotations

import pytest

from caredecide.cautions import CAUTION_SHORT

pytestmark = pytest.mark.browser

# The model view is the default page, served at the app's root.
VIEWS = [("", "Model"), ("policy", "Policy"), ("convergence", "Convergence")]
DONE = "[data-testid='stApp'][data-test-script-state='notRunning']"
TIMEOUT_MS = 90_000


def _wait_until_done(page, title: str) -> None:
    """Wait for the view's title, then for the script to finish with nothing left loading."""
    page.get_by_role("heading", name=title, exact=True).first.wait_for(timeout=TIMEOUT_MS)
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)
    page.wait_for_function(
        "() => document.querySelectorAll(\"[data-testid='stSkeleton']\").length === 0",
        timeout=TIMEOUT_MS,
    )
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)


@pytest.mark.parametrize(("url_path", "title"), VIEWS)
def test_each_view_renders_without_exception(app_url, page, artifacts, url_path, title):
    page.goto(f"{app_url}/{url_path}", timeout=TIMEOUT_MS)
    _wait_until_done(page, title)
    if url_path:  # charts are drawn after the script: wait for the first canvas
        page.locator("[data-testid='stVegaLiteChart'] canvas, "
                     "[data-testid='stVegaLiteChart'] svg").first.wait_for(timeout=TIMEOUT_MS)
    page.screenshot(path=str(artifacts / f"app-{url_path or 'model'}.png"), full_page=True)
    assert page.locator("[data-testid='stException']").count() == 0
    assert page.get_by_text("Page not found").count() == 0
    assert page.get_by_text(CAUTION_SHORT, exact=False).first.is_visible()


def test_sidebar_navigation_reaches_every_view(app_url, page):
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    for url_path, title in VIEWS[1:]:
        page.locator(f"[data-testid='stSidebarNav'] a[href$='/{url_path}']").click()
        _wait_until_done(page, title)
        assert page.url.rstrip("/").endswith(url_path)
        assert page.locator("[data-testid='stException']").count() == 0
        assert page.get_by_text("Page not found").count() == 0


def test_upload_a_model_and_watch_value_iteration_converge(app_url, page, artifacts, tmp_path):
    from ui.templates import TEMPLATES

    model = tmp_path / "stationary_upload.toml"
    model.write_text(TEMPLATES["infinite-horizon"], encoding="utf-8")
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    page.get_by_text("Open another model").click()
    page.locator("[data-testid='stFileUploaderDropzoneInput']").set_input_files(str(model))
    page.get_by_text("stationary_upload.toml (upload)").first.wait_for(timeout=TIMEOUT_MS)
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)
    page.locator("[data-testid='stSidebarNav'] a[href$='/convergence']").click()
    _wait_until_done(page, "Convergence")
    page.get_by_text("Value iteration").first.wait_for(timeout=TIMEOUT_MS)
    page.locator("[data-testid='stVegaLiteChart']").first.wait_for(timeout=TIMEOUT_MS)
    page.screenshot(path=str(artifacts / "app-convergence-value-iteration.png"), full_page=True)
    assert page.locator("[data-testid='stException']").count() == 0


def test_an_edit_survives_a_page_reload(app_url, page, artifacts):
    """Edit the model text, reload the page (a new session): the autosaved draft comes back.

    Runs last: it leaves a draft (only the title differs) in this session's drafts folder.
    """
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    page.get_by_role("tab", name="Model file").click()
    editor = page.locator("[data-testid='stTextArea'] textarea").first
    text = editor.input_value()
    edited = text.replace('title = "', 'title = "Edited in the browser: ', 1)
    assert edited != text
    editor.fill(edited)
    editor.press("Control+Enter")  # commit the text area
    page.get_by_text("is valid (autosaved)").first.wait_for(timeout=TIMEOUT_MS)
    page.wait_for_selector(DONE, timeout=TIMEOUT_MS)

    page.reload(timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    page.get_by_text("Restored your autosaved draft").first.wait_for(timeout=TIMEOUT_MS)
    page.get_by_role("tab", name="Model file").click()
    restored = page.locator("[data-testid='stTextArea'] textarea").first.input_value()
    assert "Edited in the browser: " in restored
    page.screenshot(path=str(artifacts / "app-model-restored.png"), full_page=True)
    assert page.locator("[data-testid='stException']").count() == 0
