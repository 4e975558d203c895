"""caredecide: when to start a treatment, solved as a Markov decision process.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice. Demo models and cohort data are synthetic.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("caredecide")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
