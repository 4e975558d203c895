"""Errors and warnings raised for bad model input.

Every message names *where* the problem is (file, table path such as
``actions.treat.transitions.mild.dead`` or ``parameters.p_progress``), the
offending value and what was expected, so a user can fix it without reading code.
"""

from __future__ import annotations

from dataclasses import dataclass, field


class CaredecideError(Exception):
    """Base class for every error caredecide raises on purpose."""


@dataclass
class Problem:
    """One validation finding.

    Parameters
    ----------
    where : str
        Dotted table path inside the model, e.g. ``"states.mild.qaly_weight"``.
    message : str
        What is wrong and what was expected, naming the offending value.
    file : str or None
        The file the finding concerns, when known.
    line : int or None
        1-based line number, when known (TOML syntax errors).
    """

    where: str
    message: str
    file: str | None = None
    line: int | None = None

    def __str__(self) -> str:
        place = self.file or "<model>"
        if self.line is not None:
            place += f", line {self.line}"
        if self.where:
            return f"{place}: {self.where}: {self.message}"
        return f"{place}: {self.message}"


class ModelError(CaredecideError, ValueError):
    """A model file or model object is invalid.

    Holds every :class:`Problem` found, so a user sees all errors at once.
    """

    def __init__(self, problems: list[Problem] | Problem | str, *, file: str | None = None):
        if isinstance(problems, str):
            problems = [Problem(where="", message=problems, file=file)]
        elif isinstance(problems, Problem):
            problems = [problems]
        for problem in problems:
            if problem.file is None:
                problem.file = file
        self.problems: list[Problem] = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class ExpressionError(CaredecideError, ValueError):
    """An expression in a model file cannot be parsed or evaluated."""


class DistributionError(CaredecideError, ValueError):
    """A parameter distribution is impossible (e.g. a beta with that mean and standard error)."""


class CompiledModelError(CaredecideError, ValueError):
    """A :class:`~caredecide.compiled.CompiledModel` breaks its own contract.

    Array shapes that disagree, a state with no allowed action, a start distribution or a
    transition row that does not sum to 1. Raised on construction; the message lists every
    finding.
    """


class RunOptionError(CaredecideError, ValueError):
    """A run option given by the caller (solver, batch or analysis setting) is not allowed.

    Distinct from :class:`ModelError`: the model file is not at fault. Built by
    :func:`caredecide.options.check_scalar` and :func:`caredecide.options.check_choice`.

    Attributes
    ----------
    name : str
        The option, e.g. ``"chunk_size"``.
    value : object
        The value given.
    expected : str
        The allowed range or choices, in words.
    """

    def __init__(self, name: str, value: object, expected: str):
        self.name = name
        self.value = value
        self.expected = expected
        super().__init__(f"{name} = {value!r} is not allowed; expected {expected}")


class ModelTooLargeError(CaredecideError, MemoryError):
    """The compiled arrays would not fit the memory budget; the message gives the estimate."""


@dataclass
class ModelWarningRecord:
    """A suspicious but allowed value (e.g. a QALY weight above 1)."""

    where: str
    message: str
    extra: dict = field(default_factory=dict)

    def __str__(self) -> str:
        return f"{self.where}: {self.message}"


class ModelWarning(UserWarning):
    """Warning category for suspicious model values."""
