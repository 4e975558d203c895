"""The model's warnings on every command, and ``--strict`` to make them errors.

Every analysis command loads its model through :func:`load_and_warn`: the model is
validated once, each warning (a QALY weight above 1, a one-off charge that can repeat,
an unused parameter, ...) is printed on stderr whatever ``--quiet`` says, and with
``--strict`` any warning stops the command with exit code 2 before any analysis runs.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from caredecide.cli.console import plain, stderr
from caredecide.compiled import CompiledModel
from caredecide.errors import CaredecideError, ModelWarningRecord
from caredecide.model import Model

__all__ = ["StrictOption", "WarningsAsErrors", "load_and_warn", "show_warnings"]

StrictOption = Annotated[
    bool,
    typer.Option(
        "--strict",
        help="Treat the model's warnings as errors: stop with exit code 2 before any analysis.",
    ),
]
"""The ``--strict`` option shared by every command that reads a model."""

SetOption = Annotated[
    list[str] | None,
    typer.Option(
        "--set",
        metavar="PATH=VALUE",
        help="Change one value of the model file for this run (repeatable), e.g. "
        "--set settings.discount_costs=0.06 or --set parameters.hr_treatment.value=0.6. "
        "The value is read as data (a number, true/false, text), never run.",
    ),
]
"""The ``--set`` option shared by every analysis command."""


def parse_sets(sets: list[str] | None) -> dict[str, Any]:
    """``--set`` texts as ``{path: value}`` (a later value for a path wins).

    Raises
    ------
    RunOptionError
        Naming ``--set``, the text and what was expected.
    """
    from caredecide.modelfile.overrides import parse_assignment

    return dict(parse_assignment(text) for text in sets or [])


class WarningsAsErrors(CaredecideError):
    """``--strict`` was given and the model has warnings (the message lists them)."""


def show_warnings(model: Model, warnings: list[ModelWarningRecord], *, strict: bool) -> None:
    """Print each warning on stderr; with ``strict``, raise :class:`WarningsAsErrors`.

    Parameters
    ----------
    model : Model
        The model the warnings concern (its file is named in every line).
    warnings : list of ModelWarningRecord
        From :func:`caredecide.modelfile.validate_model`.
    strict : bool
        The ``--strict`` option.
    """
    label = model.file_label
    if strict and warnings:
        listed = "\n".join(f"  {label}: {warning}" for warning in warnings)
        raise WarningsAsErrors(
            f"--strict: {label} has {len(warnings)} warning(s), treated as errors:\n{listed}\n"
            "expected a model without warnings (fix them, or run without --strict)"
        )
    for warning in warnings:
        stderr.print(f"[yellow]warning:[/] {plain(label)}: {plain(warning)}")


def load_and_warn(path: Path | str, *, strict: bool, sets: list[str] | None = None) -> Model:
    """Load and validate the model file at ``path``, show its warnings, honour ``strict``.

    See :func:`load_checked`, which also returns the compiled base case.
    """
    return load_checked(path, strict=strict, sets=sets)[0]


def load_checked(
    path: Path | str, *, strict: bool, sets: list[str] | None = None
) -> tuple[Model, CompiledModel]:
    """Load and validate the model file at ``path``, show its warnings, honour ``strict``.

    Raises
    ------
    ModelError
        For an invalid model (every problem listed).
    WarningsAsErrors
        With ``strict`` when the model has warnings.
    """
    from caredecide.modelfile import load_model, validate_and_compile
    from caredecide.modelfile.overrides import with_overrides

    overrides = parse_sets(sets)  # before reading: a malformed --set fails at once
    model = with_overrides(load_model(path, validate=False), overrides, validate=False)
    validated = validate_and_compile(model)  # compiles the base case once
    show_warnings(model, validated.warnings, strict=strict)
    return model, validated.compiled
