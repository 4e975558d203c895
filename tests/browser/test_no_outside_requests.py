"""The app makes no outside request (issue 14 item 7): every request the page makes is
routed here; any to a host other than the app's own is blocked and fails the test."""

from __future__ import annotations

from urllib.parse import urlparse

from tests.browser.test_app_browser import TIMEOUT_MS, _wait_until_done

LOCAL_HOSTS = {"127.0.0.1", "localhost", "::1", "[::1]"}


def test_no_view_requests_anything_outside_the_app(app_url, page):
    outside: list[str] = []

    def guard(route) -> None:
        url = route.request.url
        host = urlparse(url).hostname or ""
        if url.startswith(("data:", "blob:", "about:")) or host in LOCAL_HOSTS:
            route.continue_()
        else:
            outside.append(url)
            route.abort()

    page.context.route("**/*", guard)
    page.goto(app_url, timeout=TIMEOUT_MS)
    _wait_until_done(page, "Model")
    links = page.locator("[data-testid='stSidebarNav'] a")
    hrefs = [links.nth(i).get_attribute("href") for i in range(links.count())]
    assert len(hrefs) >= 3, hrefs
    for href in hrefs:
        page.goto(
            href if href.startswith("http") else f"{app_url}/{href.lstrip('/')}", timeout=TIMEOUT_MS
        )
        _wait_until_done(page)
        page.wait_for_timeout(500)  # late requests (fonts, icons) come after the script
    assert outside == [], f"outside requests attempted: {sorted(set(outside))}"
