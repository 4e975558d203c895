"""Real-browser fixtures: ``caredecide app`` on a free 127.0.0.1 port and Debian's chromium.

No browser is ever downloaded: Playwright drives ``/usr/bin/chromium``. The tests skip
only when chromium is absent outside CI; with ``CI=true`` they fail instead.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-dev-shm-usage",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-default-apps",
    "--disable-sync",
    "--no-first-run",
    "--metrics-recording-only",
    "--disable-gpu",
]
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
STARTUP_SECONDS = 90


def _in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("1", "true", "yes")


def _unavailable(reason: str) -> None:
    if _in_ci():
        pytest.fail(f"browser test cannot run in CI: {reason}")
    pytest.skip(reason)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _healthy(url: str) -> bool:
    try:
        with urllib.request.urlopen(f"{url}/_stcore/health", timeout=2) as response:
            return response.read().decode().strip() == "ok"
    except OSError:
        return False


@pytest.fixture(scope="session")
def chromium_path() -> str:
    if not Path(CHROMIUM).exists():
        _unavailable(f"{CHROMIUM} is missing (apt-get install -y chromium)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        _unavailable("python playwright is not installed")
    return CHROMIUM


@pytest.fixture(scope="session")
def app_url(tmp_path_factory) -> Iterator[str]:
    """Start ``caredecide app`` (demo model) headless on a free port; stop it afterwards."""
    port = _free_port()
    home = tmp_path_factory.mktemp("caredecide-home")
    env = {**os.environ, "CAREDECIDE_HOME": str(home)}
    executable = shutil.which("caredecide")
    command = ([executable] if executable
               else [sys.executable, "-c", "from caredecide.cli import main; main()"])
    log = open(home / "app.log", "w+b")  # closed in the finally below
    process = subprocess.Popen(
        [*command, "app", "--port", str(port), "--headless", "--quiet"],
        env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
    )
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + STARTUP_SECONDS
    while not _healthy(url):
        if process.poll() is not None or time.monotonic() > deadline:
            os.killpg(process.pid, signal.SIGTERM) if process.poll() is None else None
            log.seek(0)
            pytest.fail(f"caredecide app did not become healthy on {url}:\n"
                        + log.read().decode(errors="replace")[-3000:])
        time.sleep(0.3)
    try:
        yield url
    finally:
        # The app runs streamlit as a child: stop the whole session group we started.
        os.killpg(process.pid, signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout=10)
        log.close()


@pytest.fixture(scope="session")
def browser(chromium_path):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(
            executable_path=chromium_path, headless=True, args=CHROMIUM_ARGS
        )
        try:
            yield browser
        finally:
            browser.close()


@pytest.fixture
def page(browser):
    context = browser.new_context(viewport={"width": 1400, "height": 2600})
    page = context.new_page()
    try:
        yield page
    finally:
        context.close()


@pytest.fixture(scope="session")
def artifacts() -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS
