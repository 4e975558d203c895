"""Whether compiled loops (numba) are used: one switch for every module that has them.

Compiled loops are used when numba imports and ``CAREDECIDE_KERNELS`` is not ``numpy``
(the numpy path then runs instead; benchmarks time both in one process). The loops are
compiled on first use and cached on disk, so later processes load them.
"""

from __future__ import annotations

import os
from functools import cache

SWITCH = "CAREDECIDE_KERNELS"
"""Environment variable: ``numpy`` turns the compiled loops off."""


def available() -> bool:
    """True when the compiled loops can be used (read at every call)."""
    if os.environ.get(SWITCH, "").lower() == "numpy":
        return False
    return _numba_importable()


@cache
def _numba_importable() -> bool:
    try:
        import numba  # noqa: F401
    except ImportError:  # pragma: no cover - numba is a dependency of the package
        return False
    return True
