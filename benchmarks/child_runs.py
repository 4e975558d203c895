"""Run a benchmark's code in a fresh Python process and read the JSON line it prints.

A fresh process per run keeps caches, compiled loops and the memory of one run out of
the next; with ``checkout`` the child must report ``source`` (the file its caredecide
came from), checked to lie in that checkout (an older one for a baseline).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any


def run_child(code: str, what: str, checkout: Path | None = None) -> dict[str, Any]:
    """Run ``code`` with this interpreter; the last line of its output, parsed as JSON.

    Raises ``SystemExit`` naming ``what`` when the child fails, or when it imported
    caredecide from elsewhere than ``checkout``.
    """
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode:
        raise SystemExit(f"{what} failed:\n{done.stderr[-2000:]}")
    info = json.loads(done.stdout.strip().splitlines()[-1])
    if checkout is not None and not str(info["source"]).startswith(str(checkout)):
        raise SystemExit(f"{what} imported {info['source']}, not the checkout {checkout}")
    return info
