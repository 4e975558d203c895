"""The cautions shown on every page, in CLI output, reports and the README.

The research-use caution stays on every output. The note that demo data are synthetic
is added only when the model in use is one of the bundled demo models
(:func:`is_bundled_model`): a user's own model is not called synthetic.
"""

from __future__ import annotations

from pathlib import Path

CAUTION_SHORT = (
    "RESEARCH USE ONLY - not a substitute for clinical judgment, local guidelines or "
    "licensed practice."
)

CAUTION_LONG = (
    "caredecide is a research-use-only decision aid. Its results come from a model and the "
    "estimates put into it; they are not a substitute for clinical judgment, local guidelines "
    "or licensed practice, and must not be used to make decisions about individual patients."
)

DEMO_NOTE = "Demo data are synthetic."
DEMO_NOTE_LONG = (
    "The bundled models and cohort data are synthetic: no real patients, places or people."
)


def _bundled_folder() -> Path | None:
    from importlib.util import find_spec

    spec = find_spec("synthetic_cohort")
    if spec is None or spec.origin is None:
        return None
    return Path(spec.origin).resolve().parent


def is_bundled_model(source: object) -> bool:
    """True when ``source`` (a path, or an app source such as ``"template:..."``) is one of
    the bundled demo models or templates."""
    if source is None:
        return False
    text = str(source)
    if text.startswith("template:"):
        return True
    if text.startswith("upload:") or text.startswith("<"):
        return False
    folder = _bundled_folder()
    try:
        return folder is not None and Path(text).resolve().is_relative_to(folder)
    except (OSError, ValueError):
        return False


def caution_short(source: object = None) -> str:
    """The one-line caution, with the demo-data note when ``source`` is bundled."""
    return f"{CAUTION_SHORT} {DEMO_NOTE}" if is_bundled_model(source) else CAUTION_SHORT


def caution_long(source: object = None) -> str:
    """The long caution, with the demo-data note when ``source`` is bundled."""
    return f"{CAUTION_LONG} {DEMO_NOTE_LONG}" if is_bundled_model(source) else CAUTION_LONG
