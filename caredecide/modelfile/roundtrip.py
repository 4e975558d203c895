"""Write a changed model back into its file, keeping comments, key order and layout.

:func:`dumps_model` writes a model from scratch: comments and the author's layout would be
lost on every save. Here the edit is found as the difference between the file's model and
the changed model, both written by :func:`dumps_model` and read back as plain data (so two
spellings of the same value are not a change), and only the keys that differ are replaced
in the file's own document, read with ``tomlkit``, a TOML library made for round trips.
Untouched keys keep their text, comments stay where they were; new keys are appended to
their table.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from typing import Any

import tomlkit

from caredecide.model import Model


def updated_model_text(original_text: str, changed: Model, *, file: str = "<text>") -> str:
    """``original_text`` with the edits that turn its model into ``changed``.

    Parameters
    ----------
    original_text : str
        The model file as it is (comments, order and layout are kept).
    changed : Model
        The model to write (for example the original with estimated parameters added).
    file : str
        Name for messages.

    Returns
    -------
    str
        TOML text whose model is ``changed``; lines that did not change are unchanged.
    """
    from caredecide.modelfile.reader import loads_model
    from caredecide.modelfile.writer import dumps_model

    before = tomllib.loads(dumps_model(loads_model(original_text, file=file, validate=False)))
    after = tomllib.loads(dumps_model(changed))
    document = tomlkit.parse(original_text)
    _apply(document, before, after)
    return tomlkit.dumps(document)


def _is_table_list(value: object) -> bool:
    return isinstance(value, list) and bool(value) and all(isinstance(v, Mapping) for v in value)


def _apply(target: Any, before: Mapping[str, Any], after: Mapping[str, Any]) -> None:
    """Replace in ``target`` (a tomlkit container) what differs between the plain data
    ``before`` and ``after``; recurse into tables and equal-length lists of tables."""
    for key in [k for k in before if k not in after]:
        if key in target:
            del target[key]
    for key, new in after.items():
        old = before.get(key, _ABSENT)
        if old == new and key in target:
            continue
        present = key in target
        if present and isinstance(old, Mapping) and isinstance(new, Mapping):
            if isinstance(target[key], Mapping):
                _apply(target[key], old, new)
                continue
        if (
            present
            and _is_table_list(old)
            and _is_table_list(new)
            and len(old) == len(new)
            and isinstance(target[key], list)
            and len(target[key]) == len(new)
        ):
            for item, old_item, new_item in zip(target[key], old, new, strict=True):
                _apply(item, old_item, new_item)
            continue
        target[key] = new


_ABSENT = object()
