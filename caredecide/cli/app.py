"""``caredecide app``: start the Streamlit app on this machine (127.0.0.1 only)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
import urllib.request
import webbrowser
from pathlib import Path
from typing import Annotated

import typer

from caredecide.cli.console import print_caution, stderr, user_errors
from caredecide.cli.model_warnings import StrictOption, show_warnings
from caredecide.guarded import check_nesting, read_limited_text
from caredecide.limits import MAX_MODEL_BYTES, MODEL_ENV


def app_script() -> Path:
    """Path of the app's entry file, ``ui/app.py``, wherever the package is installed.

    The package is located, not imported: the library never imports the app.
    """
    import importlib.util

    spec = importlib.util.find_spec("ui")
    if spec is None or spec.origin is None:
        raise FileNotFoundError("the app package 'ui' is not installed; reinstall caredecide")
    return Path(spec.origin).resolve().parent / "app.py"


def streamlit_command(model: Path, port: int) -> tuple[list[str], dict[str, str]]:
    """The command line and environment that start the app on ``127.0.0.1:port``.

    The model path travels in :data:`MODEL_ENV`; usage statistics are off and the
    server binds to the loopback address only. The server always runs headless: a
    non-headless first run would stop at an interactive onboarding prompt on the
    terminal; the browser is opened by :func:`open_browser_when_ready` instead.
    """
    command = [
        sys.executable,
        "-m",
        "streamlit",
        "run",
        str(app_script()),
        "--server.address=127.0.0.1",
        f"--server.port={port}",
        "--server.headless=true",
        "--server.maxUploadSize=1",
        "--browser.gatherUsageStats=false",
        "--server.fileWatcherType=none",
        "--client.toolbarMode=minimal",
    ]
    env = dict(os.environ)
    env[MODEL_ENV] = str(model.resolve())
    return command, env


def _default_model() -> Path:
    from synthetic_cohort import demo_model_path

    return Path(demo_model_path())


def run_app(
    model: Annotated[
        Path | None,
        typer.Argument(
            help="Model file to open (TOML). Default: the bundled synthetic demo model.",
            exists=True,
            dir_okay=False,
            readable=True,
        ),
    ] = None,
    port: Annotated[
        int, typer.Option("--port", min=1024, max=65535, help="Port on 127.0.0.1.")
    ] = 8501,
    headless: Annotated[
        bool, typer.Option("--headless/--open-browser", help="Do not open a browser window.")
    ] = False,
    quiet: Annotated[
        bool, typer.Option("--quiet", help="No start-up note on stderr (the caution stays).")
    ] = False,
    strict: StrictOption = False,
) -> None:
    """Start the app in a local browser (research use only).

    The working model is autosaved to $CAREDECIDE_HOME/drafts (default ~/.caredecide/drafts).
    """
    path = model if model is not None else _default_model()
    print_caution(path)  # names the demo data when the bundled model opens
    with user_errors():  # the app opens the file again; refuse a hostile one here first
        check_nesting(
            read_limited_text(path, MAX_MODEL_BYTES, what="a model file (.toml)"), file=str(path)
        )
    _show_model_warnings(path, strict)
    command, env = streamlit_command(path, port)
    if not headless:
        open_browser_when_ready(f"http://127.0.0.1:{port}")
    if not quiet:
        stderr.print(f"Starting the app on http://127.0.0.1:{port} with {path} (Ctrl+C stops it)")
    raise typer.Exit(code=_run_until_stopped(command, env))


def _show_model_warnings(path: Path, strict: bool) -> None:
    """Print the model's warnings before the app starts (``--strict``: refuse to start).

    An invalid model still opens: the app's Model view lists its problems for fixing.
    """
    from caredecide.errors import ModelError
    from caredecide.modelfile import load_model, validate_model

    with user_errors():
        try:
            model = load_model(path, validate=False)
            warnings = validate_model(model)
        except ModelError:
            return
        show_warnings(model, warnings, strict=strict)


def open_browser_when_ready(url: str, timeout_seconds: float = 60.0) -> threading.Thread:
    """Open ``url`` in the user's browser once the server answers its health check.

    Runs in a daemon thread so the server starts at once; gives up silently after
    ``timeout_seconds`` (the address is printed on stderr anyway).
    """

    def wait_then_open() -> None:
        deadline = time.monotonic() + timeout_seconds
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(f"{url}/_stcore/health", timeout=2) as reply:
                    if reply.status == 200:
                        webbrowser.open(url)
                        return
            except OSError:
                pass
            time.sleep(0.5)

    thread = threading.Thread(target=wait_then_open, name="open-browser", daemon=True)
    thread.start()
    return thread


def _run_until_stopped(command: list[str], env: dict[str, str]) -> int:
    """Run the server; a SIGTERM sent to this command is passed on, so no server is orphaned."""
    process = subprocess.Popen(command, env=env)
    previous = signal.signal(signal.SIGTERM, lambda signum, _frame: process.send_signal(signum))
    try:
        while True:
            try:
                return process.wait()
            except KeyboardInterrupt:  # Ctrl+C reaches the server too; wait for it to stop
                continue
    finally:
        signal.signal(signal.SIGTERM, previous)


def register(app: typer.Typer) -> None:
    """Add the ``app`` command to the root CLI."""
    app.command("app", no_args_is_help=False)(run_app)
