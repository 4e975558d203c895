"""SYNTHETIC demo data for caredecide: model files and a small life table.

Everything in this package is invented for demonstrations and tests: no real
patients, trials, places or products. Research use only.
"""

from __future__ import annotations

from pathlib import Path

MODELS_DIR = Path(__file__).resolve().parent / "models"
"""Folder of the synthetic demo model files (``*.toml``) and life table (``*.csv``)."""


def demo_model_path() -> Path:
    """Path of the synthetic progressive-condition demo model."""
    return MODELS_DIR / "demo_progressive.toml"
