"""Upgrading model files written for the previous file format.

Format 2 renamed four conversion functions of the expression language (the table
below). A file of format 1 still loads: its expressions are read with the new names
and :func:`previous_format_warning` says so. ``caredecide check --upgrade FILE``
rewrites the file itself with :func:`upgrade_text`, which edits the text in place, so
comments, layout and key order are kept; the result is read back and compared with the
original read through the renaming before anything is written.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from caredecide.errors import ModelError, ModelWarningRecord, Problem
from caredecide.model import FORMAT_VERSION

__all__ = [
    "PREVIOUS_FORMAT_VERSION",
    "RENAMED_FUNCTIONS",
    "Replacement",
    "previous_format_warning",
    "rename_functions",
    "renamed_data",
    "upgrade_text",
]

PREVIOUS_FORMAT_VERSION = 1
"""The format that :func:`upgrade_text` converts from (the current one is FORMAT_VERSION)."""

RENAMED_FUNCTIONS: Mapping[str, str] = {
    "prob_to_rate": "rate_behind",
    "rate_to_prob": "chance_within",
    "surv_to_rate": "rate_behind_survival",
    "median_to_rate": "rate_behind_median",
}
"""The upgrade table: expression function of format 1 -> its name in format 2."""

# An old name as a whole word followed by "(" (a call), so a parameter that merely
# contains the text (``my_prob_to_rate_estimate``) is never touched.
_OLD_CALL = re.compile(
    r"(?<![A-Za-z0-9_])(" + "|".join(map(re.escape, RENAMED_FUNCTIONS)) + r")(?=\s*\()"
)
_FORMAT_LINE = re.compile(r"^(?P<lead>\s*format\s*=\s*)(?P<version>\d+)", re.MULTILINE)


@dataclass(frozen=True)
class Replacement:
    """One renamed call in a file: 1-based line, the old and the new name."""

    line: int
    old: str
    new: str

    def __str__(self) -> str:
        return f"line {self.line}: {self.old} -> {self.new}"


def rename_functions(text: str) -> str:
    """``text`` with every call of a format-1 function renamed (anything else unchanged)."""
    return _OLD_CALL.sub(lambda m: RENAMED_FUNCTIONS[m.group(1)], text)


def renamed_data(data: Any) -> Any:
    """A copy of parsed TOML ``data`` with :func:`rename_functions` applied to every string."""
    if isinstance(data, str):
        return rename_functions(data)
    if isinstance(data, Mapping):
        return {key: renamed_data(value) for key, value in data.items()}
    if isinstance(data, list):
        return [renamed_data(value) for value in data]
    return data


def previous_format_warning() -> ModelWarningRecord:
    """The warning for a model read from a format-1 file, naming every renamed function."""
    renamed = ", ".join(f"{old} -> {new}" for old, new in RENAMED_FUNCTIONS.items())
    return ModelWarningRecord(
        "format",
        f"format = {PREVIOUS_FORMAT_VERSION} is the previous model file format; format "
        f"{FORMAT_VERSION} renamed these functions: {renamed}. The file was read with the "
        "new names; run `caredecide check --upgrade FILE` to rewrite it (comments are kept)",
        {"format": PREVIOUS_FORMAT_VERSION},
    )


def upgrade_text(text: str, *, file: str = "<text>") -> tuple[str, list[Replacement]]:
    """Rewrite a format-1 model file's text as format 2, keeping comments and layout.

    Parameters
    ----------
    text : str
        The whole file.
    file : str
        Name used in error messages.

    Returns
    -------
    (str, list of Replacement)
        The new text and every renamed call (line, old name, new name), in file order.

    Raises
    ------
    ModelError
        When the text is not TOML, has no top-level ``format``, is not of format
        ``PREVIOUS_FORMAT_VERSION``, or (a safeguard) when the rewritten text does not
        read back as the original with the renamed functions.
    """
    try:
        before = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise ModelError(
            Problem("", f"TOML syntax error: {error}; expected a model file to upgrade"), file=file
        ) from None
    version = before.get("format")
    if version == FORMAT_VERSION:
        raise ModelError(
            Problem("format", f"is already {FORMAT_VERSION}; nothing to upgrade"), file=file
        )
    if version != PREVIOUS_FORMAT_VERSION or isinstance(version, bool):
        raise ModelError(
            Problem(
                "format",
                f"is {version!r}; expected format = {PREVIOUS_FORMAT_VERSION} "
                f"(the format that --upgrade converts to {FORMAT_VERSION})",
            ),
            file=file,
        )
    replacements = [
        Replacement(text.count("\n", 0, m.start()) + 1, m.group(1), RENAMED_FUNCTIONS[m.group(1)])
        for m in _OLD_CALL.finditer(text)
    ]
    upgraded = rename_functions(text)
    # The top-level `format = 1` comes before the first [table] header.
    header = re.search(r"^\s*\[", upgraded, flags=re.MULTILINE)
    top = upgraded[: header.start()] if header else upgraded
    line = _FORMAT_LINE.search(top)
    if line is None:  # e.g. written as an inline table; refuse rather than guess
        raise ModelError(
            Problem("format", "could not find the line `format = 1` before the first table"),
            file=file,
        )
    upgraded = upgraded[: line.start("version")] + str(FORMAT_VERSION) + upgraded[line.end() :]
    expected = renamed_data(before) | {"format": FORMAT_VERSION}
    if tomllib.loads(upgraded) != expected:
        raise ModelError(
            Problem("", "the rewritten file does not read back as the original; left unchanged"),
            file=file,
        )
    return upgraded, replacements
