"""The browser harness itself: it may skip only outside CI; in CI it must fail loudly."""

from __future__ import annotations

import pytest

from tests.browser import conftest


def test_missing_browser_skips_outside_ci(monkeypatch):
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match="chromium is missing"):
        conftest._unavailable("chromium is missing")


@pytest.mark.parametrize("value", ["true", "1", "TRUE"])
def test_missing_browser_fails_in_ci(monkeypatch, value):
    monkeypatch.setenv("CI", value)
    with pytest.raises(pytest.fail.Exception, match="cannot run in CI: chromium is missing"):
        conftest._unavailable("chromium is missing")


def test_free_port_is_bindable_on_loopback():
    import socket

    port = conftest._free_port()
    assert 1024 <= port <= 65535
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", port))
