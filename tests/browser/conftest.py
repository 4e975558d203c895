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


class AppServer:
    """``caredecide app`` (demo model) started headless on a free 127.0.0.1 port.

    ``home`` is its ``CAREDECIDE_HOME`` (drafts folder); a second server started on the same
    home is a restart of the app as far as autosaved drafts are concerned.
    """

    def __init__(self, home: Path) -> None:
        self.home = home
        self.port = _free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        executable = shutil.which("caredecide")
        command = (
            [executable]
            if executable
            else [sys.executable, "-c", "from caredecide.cli import main; main()"]
        )
        self._log = open(home / f"app-{self.port}.log", "w+b")  # closed in stop()
        self._process = subprocess.Popen(
            [*command, "app", "--port", str(self.port), "--headless", "--quiet"],
            env={**os.environ, "CAREDECIDE_HOME": str(home)},
            stdout=self._log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        deadline = time.monotonic() + STARTUP_SECONDS
        while not _healthy(self.url):
            if self._process.poll() is not None or time.monotonic() > deadline:
                self._log.seek(0)
                output = self._log.read().decode(errors="replace")[-3000:]
                self.stop()
                pytest.fail(f"caredecide app did not become healthy on {self.url}:\n{output}")
            time.sleep(0.3)

    def stop(self) -> None:
        """Stop the server and its streamlit child (the process group we started)."""
        if self._process.poll() is None:
            os.killpg(self._process.pid, signal.SIGTERM)
            try:
                self._process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(self._process.pid, signal.SIGKILL)
                self._process.wait(timeout=10)
        self._log.close()


@pytest.fixture(scope="session")
def app_url(tmp_path_factory) -> Iterator[str]:
    """Start ``caredecide app`` (demo model) headless on a free port; stop it afterwards."""
    server = AppServer(tmp_path_factory.mktemp("caredecide-home"))
    try:
        yield server.url
    finally:
        server.stop()


@pytest.fixture
def app_home(tmp_path) -> Path:
    """A fresh drafts home for tests that start (and restart) servers of their own."""
    home = tmp_path / "caredecide-home"
    home.mkdir()
    return home


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
    context = browser.new_context(viewport={"width": 1400, "height": 4200}, accept_downloads=True)
    page = context.new_page()
    try:
        yield page
    finally:
        context.close()


@pytest.fixture(scope="session")
def artifacts() -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS
