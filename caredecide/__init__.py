"""caredecide: when to start a treatment, solved as a Markov decision process.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice. Demo models and cohort data are synthetic.

The names below are the notebook API; they are imported on first use so that the
command line starts quickly::

    import caredecide as cd
    model = cd.load_model("model.toml")
    compiled = cd.compile_model(model)
    result = cd.solve(compiled, cd.Objective.from_settings(model.settings))
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version
from typing import Any

try:
    __version__ = version("caredecide")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"

_LAZY = {
    "load_model": "caredecide.modelfile",
    "save_model": "caredecide.modelfile",
    "validate_model": "caredecide.modelfile",
    "compile_model": "caredecide.compile",
    "Objective": "caredecide.objective",
    "solve": "caredecide.solvers",
    "solve_batch": "caredecide.batch",
    "evaluate_policy": "caredecide.evaluate",
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'caredecide' has no attribute {name!r}")
