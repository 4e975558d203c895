"""Overrides of model-file values by path: ``settings.discount_costs=0.06``.

A path names a field of the model file as its tables do: ``settings.discount_costs``,
``parameters.hr_treatment.value``, ``states.stage_2.cost`` (an entry of an array of
tables is named by its ``id``), ``transitions.treat.stage_1.dead``. A value is read as a
TOML value (``0.06``, ``"trapezoid"``, ``true``, ``[1, 2]``); a bare word that is not TOML
is taken as text (``trapezoid``). Values are data: never evaluated as code.

The model is written to its TOML tables (:func:`caredecide.modelfile.writer.dumps_model`),
the values are set, and the tables are read and validated again, so an override is
checked by every rule a model file is.
"""

from __future__ import annotations

import copy
import re
import tomllib
from collections.abc import Mapping
from typing import Any

import tomli_w

from caredecide.errors import Problem, RunOptionError
from caredecide.model import Model

_BARE_WORD = re.compile(r"^[A-Za-z_][A-Za-z0-9_.\-]*$")
_PATH = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z0-9_\-]+)+$")


def parse_value(text: str, *, where: str) -> Any:
    """A TOML value from text (``0.06``, ``"end"``, ``true``); a bare word stays text.

    Raises
    ------
    RunOptionError
        Naming ``where`` and the text when it is neither a TOML value nor a bare word.
    """
    try:
        return tomllib.loads(f"value = {text.strip()}")["value"]
    except tomllib.TOMLDecodeError:
        if _BARE_WORD.match(text.strip()):
            return text.strip()
        raise RunOptionError(
            where, text, "a number, true/false, quoted text or a [list] (TOML syntax)"
        ) from None


def parse_assignment(text: str, *, option: str = "--set") -> tuple[str, Any]:
    """``"PATH=VALUE"`` as ``(path, value)``.

    Raises
    ------
    RunOptionError
        Naming the option and the text when there is no ``=`` or the path is malformed.
    """
    path, sep, value = text.partition("=")
    path = path.strip()
    if not sep or not value.strip():
        raise RunOptionError(option, text, "PATH=VALUE, e.g. settings.discount_costs=0.06")
    if not _PATH.match(path):
        raise RunOptionError(
            option, text, "a dotted PATH such as parameters.hr_treatment.value before '='"
        )
    return path, parse_value(value, where=f"{option} {path}")


def _child(node: Any, key: str, done: str, path: str, value: Any) -> Any:
    """The entry ``key`` of a table, or of an array of tables by ``id``."""
    if isinstance(node, Mapping):
        if key in node:
            return node[key]
        choices = sorted(node)
    elif isinstance(node, list) and all(isinstance(e, Mapping) for e in node):
        for entry in node:
            if entry.get("id") == key:
                return entry
        choices = [str(e.get("id")) for e in node]
    else:
        choices = []
    where = done or "the model file"
    expected = f"one of {choices}" if choices else f"a path that stops at {done}"
    raise RunOptionError(
        f"--set {path}", value, f"{where} has no {key!r}; the next part of the path is {expected}"
    )


def set_in_tables(tables: dict[str, Any], path: str, value: Any) -> None:
    """Set ``path`` in the TOML tables of a model (in place).

    The last part of the path may name a field that is not written yet (a setting left
    at its default, e.g. ``settings.discount_costs``); every other part must exist.
    """
    parts = path.split(".")
    node: Any = tables
    for i, key in enumerate(parts[:-1]):
        node = _child(node, key, ".".join(parts[:i]), path, value)
    last = parts[-1]
    if isinstance(node, list):
        _child(node, last, ".".join(parts[:-1]), path, value)
    if not isinstance(node, dict):
        raise RunOptionError(
            f"--set {path}", value, f"a path to a field; {'.'.join(parts[:-1])} is a value"
        )
    node[last] = value


def with_overrides(model: Model, overrides: Mapping[str, Any], *, validate: bool = True) -> Model:
    """``model`` with each ``path = value`` of ``overrides`` set, read (and validated) again.

    ``validate=False`` only reads the tables back (the caller validates, e.g. with
    :func:`caredecide.modelfile.validate_and_compile`, which compiles once).

    Raises
    ------
    RunOptionError
        A path that names no field of the model file.
    ModelError
        A value the model file does not accept (the message names the table path).
    """
    if not overrides:
        return model
    from caredecide.modelfile.reader import loads_model
    from caredecide.modelfile.writer import dumps_model

    tables = tomllib.loads(dumps_model(model))
    tables.pop("scenarios", None)  # a scenario's model has no scenarios of its own
    for path, value in overrides.items():
        set_in_tables(tables, path, value)
    base_dir = model.source_path.parent if model.source_path is not None else None
    return loads_model(
        tomli_w.dumps(tables), file=model.file_label, base_dir=base_dir, validate=validate
    )


def scenario_problems(model: Model) -> list[Problem]:
    """One problem per path of a named scenario that names no field of the model file."""
    if not model.scenarios:
        return []
    from caredecide.modelfile.writer import dumps_model

    tables = tomllib.loads(dumps_model(model))
    problems = []
    for name, scenario in model.scenarios.items():
        for path, value in scenario.overrides.items():
            try:
                set_in_tables(copy.deepcopy(tables), path, value)
            except RunOptionError as error:
                problems.append(Problem(f"scenarios.{name}.{path}", error.expected))
    return problems
