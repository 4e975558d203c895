"""One checker for run options, in the manner of scikit-learn's ``check_scalar``.

A *run option* is a setting the caller passes to an analysis or a solver (a tolerance,
an iteration cap, a chunk size, a number of draws, a seed), as opposed to a value read
from a model file. Bad run options raise :class:`RunOptionError`, never
:class:`~caredecide.errors.ModelError`: the model file is not at fault. Every message
names the option, the offending value and the allowed range.
"""

from __future__ import annotations

import math
from numbers import Integral, Real
from typing import Any, Literal

from caredecide.errors import RunOptionError

__all__ = ["RunOptionError", "check_choice", "check_scalar"]

Boundaries = Literal["both", "left", "right", "neither"]


def _number(value: float) -> str:
    """``100,000,000`` for whole numbers, ``0.5`` otherwise."""
    return f"{int(value):,}" if float(value).is_integer() else f"{value:g}"


def _describe(target: type, min_val: float | None, max_val: float | None, closed: str) -> str:
    kind = "a whole number" if target is int else "a finite number"
    left = closed in ("both", "left")
    right = closed in ("both", "right")
    if min_val is not None and max_val is not None:
        low = "[" if left else "("
        high = "]" if right else ")"
        return f"{kind} in {low}{_number(min_val)}, {_number(max_val)}{high}"
    if min_val is not None:
        return f"{kind} {'>=' if left else '>'} {_number(min_val)}"
    if max_val is not None:
        return f"{kind} {'<=' if right else '<'} {_number(max_val)}"
    return kind


def check_scalar(
    value: Any,
    name: str,
    target_type: type[int] | type[float],
    *,
    min_val: float | None = None,
    max_val: float | None = None,
    include_boundaries: Boundaries = "both",
    allow_none: bool = False,
) -> Any:
    """Check one numeric run option and return it as ``target_type``.

    Parameters
    ----------
    value : object
        The option as given.
    name : str
        The option's name, used in the message (``"chunk_size"``, ``"tolerance"``).
    target_type : int or float
        ``int``: a whole number (Python or numpy integer); ``float``: any finite real
        number (integers accepted). ``bool`` is refused for both: ``True`` is not 1 here.
    min_val, max_val : float, optional
        Allowed range; ``include_boundaries`` says which ends are allowed.
    include_boundaries : {"both", "left", "right", "neither"}
    allow_none : bool
        Accept ``None`` (meaning "use the default") and return it unchanged.

    Returns
    -------
    int or float or None
        ``value`` converted to ``target_type``.

    Raises
    ------
    RunOptionError
        Naming the option, the value and the allowed range, e.g.
        ``chunk_size = 0 is not allowed; expected a whole number >= 1``.
    """
    if value is None and allow_none:
        return None

    def refused() -> RunOptionError:  # the message is built only when needed (hot path)
        expected = _describe(target_type, min_val, max_val, include_boundaries)
        if allow_none:
            expected += " (or None for the default)"
        return RunOptionError(name, value, expected)

    wanted = Integral if target_type is int else Real
    if isinstance(value, bool) or not isinstance(value, wanted):
        raise refused()
    number = int(value) if target_type is int else float(value)
    if target_type is float and not math.isfinite(number):
        raise refused()
    left = include_boundaries in ("both", "left")
    right = include_boundaries in ("both", "right")
    if min_val is not None and (number < min_val or (number == min_val and not left)):
        raise refused()
    if max_val is not None and (number > max_val or (number == max_val and not right)):
        raise refused()
    return number


def check_choice(value: Any, name: str, choices: tuple[str, ...]) -> str:
    """Check a run option that must be one of ``choices`` (e.g. a solver method).

    Raises
    ------
    RunOptionError
        Naming the option, the value and the allowed choices.
    """
    if not isinstance(value, str) or value not in choices:
        raise RunOptionError(name, value, f"one of {', '.join(repr(c) for c in choices)}")
    return value
