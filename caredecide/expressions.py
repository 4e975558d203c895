"""The restricted expression language of model files.

A model file gives transition probabilities, costs and QALY weights as expressions:
a number, a parameter name, arithmetic on parameters, conversion functions and
comparisons, or the keyword ``rest`` ("whatever probability remains in this row").
The grammar (lowest binding first)::

    expression := "rest" | or_test
    or_test    := and_test ("or" and_test)*
    and_test   := not_test ("and" not_test)*
    not_test   := "not" not_test | comparison
    comparison := sum [("<" | "<=" | ">" | ">=" | "==" | "!=") sum]   # never chained
    sum        := product (("+" | "-") product)*
    product    := unary (("*" | "/") unary)*
    unary      := ("-" | "+") unary | power
    power      := atom ["**" unary]                                   # right-associative
    atom       := number | name | function "(" expression ("," expression)* ")"
                | "(" expression ")"

Text is read once by a small tokenizer and a precedence-climbing parser of our own
(nothing of Python's ``eval``/``exec``/``compile`` is used) into a postfix program:
the syntax tree flattened in evaluation order. :meth:`Expression.evaluate` runs that
program with numpy, so one call evaluates every parameter draw and every cycle at
once under numpy broadcasting, e.g. ``(D, 1)`` parameters with a ``(1, T)`` ``age``
give ``(D, T)``. Running the program needs no recursion, so long sums are safe;
nesting (parentheses, calls, unary signs, powers) is limited to :data:`MAX_DEPTH`
and text to :data:`MAX_LENGTH` characters.

Arithmetic edge cases follow numpy and are *not* raised mid-batch: division by zero
gives ``inf`` (or ``nan`` for ``0/0``), ``log`` of zero gives ``-inf`` and of a
negative number ``nan``, a negative base to a fractional power gives ``nan``. The
caller validates the results (a probability must lie in [0, 1], ...) and reports the
offending draw. Comparisons and logical operators give 1.0 (true) or 0.0 (false);
any ``nan`` operand gives ``nan`` so that a bad value is never hidden. The
conversion functions (``rate_behind``, ``with_rr``, ...) are the exception: they
call :mod:`caredecide.conversions`, which checks its inputs (a probability in [0, 1],
a positive period, ...), and an out-of-range input raises :class:`ExpressionError`
naming the place, the function and the first offending value.
"""

from __future__ import annotations

import difflib
import itertools
import keyword
import math
import re
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType, ModuleType
from typing import NamedTuple

import numpy as np

from caredecide.errors import ExpressionError, ModelError
from caredecide.limits import MAX_EXPRESSION_DEPTH, MAX_EXPRESSION_LENGTH

__all__ = [
    "FUNCTIONS",
    "FUNCTION_SIGNATURES",
    "MAX_DEPTH",
    "MAX_LENGTH",
    "RESERVED_NAMES",
    "REST_KEYWORD",
    "SETTING_NAMES",
    "Expression",
    "FunctionSpec",
    "did_you_mean",
    "parse_expression",
]

REST_KEYWORD = "rest"
"""The keyword meaning "whatever probability remains in this row"."""

SETTING_NAMES = frozenset(
    {"cycle_years", "start_age", "discount_costs", "discount_outcomes", "willingness_to_pay"}
)
"""Settings readable in expressions, by their ``[settings]`` key: cycle length (years),
age at the model start (years), annual discount rates of costs and of outcomes, and the
willingness to pay per QALY."""

RESERVED_NAMES = frozenset({"age", "cycle", "years", "background"}) | SETTING_NAMES
"""Variables the model supplies at evaluation: age at cycle start (years), 0-based cycle
index, years since model start, background mortality probability per cycle at that age,
and the settings of :data:`SETTING_NAMES`."""

MAX_LENGTH = MAX_EXPRESSION_LENGTH

MAX_DEPTH = MAX_EXPRESSION_DEPTH


# --- functions -------------------------------------------------------------------------


def _conversions() -> ModuleType:
    # Imported on first use so that parsing never depends on the conversion module.
    from caredecide import conversions

    return conversions


def _rate_behind(p: np.ndarray, years: np.ndarray) -> np.ndarray:
    return _conversions().rate_behind(p, years)


def _chance_within(rate: np.ndarray, years: np.ndarray) -> np.ndarray:
    return _conversions().chance_within(rate, years)


def _per_cycle(p: np.ndarray, over_years: np.ndarray, cycle_years: np.ndarray) -> np.ndarray:
    return _conversions().chance_for_period(p, over_years, cycle_years)


def _with_relative_risk(p: np.ndarray, rr: np.ndarray) -> np.ndarray:
    return _conversions().with_relative_risk(p, rr)


def _times_relative_risk(p: np.ndarray, rr: np.ndarray) -> np.ndarray:
    return _conversions().times_relative_risk(p, rr)


def _with_hazard_ratio(p: np.ndarray, hazard_ratio: np.ndarray) -> np.ndarray:
    return _conversions().with_hazard_ratio(p, hazard_ratio)


def _with_odds_ratio(p: np.ndarray, odds_ratio: np.ndarray) -> np.ndarray:
    return _conversions().with_odds_ratio(p, odds_ratio)


def _rate_behind_survival(survival: np.ndarray, years: np.ndarray) -> np.ndarray:
    return _conversions().rate_behind_survival(survival, years)


def _rate_behind_median(median_years: np.ndarray) -> np.ndarray:
    return _conversions().rate_behind_median(median_years)


def _clip(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    # np.clip with array bounds is fine, but min/max keeps nan in x visible.
    return np.minimum(np.maximum(x, lo), hi)


def _truth(result: np.ndarray, *operands: np.ndarray) -> np.ndarray:
    """1.0/0.0 from a boolean ``result``, ``nan`` wherever an operand is ``nan``."""
    value = np.asarray(result, dtype=np.float64)
    missing = np.zeros((), dtype=bool)
    for operand in operands:
        missing = missing | np.isnan(operand)
    return np.where(missing, np.nan, value)


def _when(condition: np.ndarray, if_true: np.ndarray, if_false: np.ndarray) -> np.ndarray:
    chosen = np.where(condition != 0, if_true, if_false)
    return np.where(np.isnan(condition), np.nan, chosen)


class FunctionSpec(NamedTuple):
    """A function callable from expressions: unpacks as ``(function, arity)``."""

    function: Callable[..., np.ndarray]
    arity: int


FUNCTIONS: Mapping[str, FunctionSpec] = MappingProxyType(
    {
        "rate_behind": FunctionSpec(_rate_behind, 2),
        "chance_within": FunctionSpec(_chance_within, 2),
        "per_cycle": FunctionSpec(_per_cycle, 2),
        "with_rr": FunctionSpec(_with_relative_risk, 2),
        "times_rr": FunctionSpec(_times_relative_risk, 2),
        "with_hr": FunctionSpec(_with_hazard_ratio, 2),
        "with_or": FunctionSpec(_with_odds_ratio, 2),
        "rate_behind_survival": FunctionSpec(_rate_behind_survival, 2),
        "rate_behind_median": FunctionSpec(_rate_behind_median, 1),
        "min": FunctionSpec(np.minimum, 2),
        "max": FunctionSpec(np.maximum, 2),
        "exp": FunctionSpec(np.exp, 1),
        "log": FunctionSpec(np.log, 1),
        "clip": FunctionSpec(_clip, 3),
        "when": FunctionSpec(_when, 3),
    }
)
"""Allowed functions: name -> ``(callable, arity)``; arity counts the written arguments."""

FUNCTION_SIGNATURES: Mapping[str, str] = MappingProxyType(
    {
        "rate_behind": "rate_behind(p, years)",
        "chance_within": "chance_within(rate, years)",
        "per_cycle": "per_cycle(p, over_years)",
        "with_rr": "with_rr(p, relative_risk)",
        "times_rr": "times_rr(p, relative_risk)",
        "with_hr": "with_hr(p, hazard_ratio)",
        "with_or": "with_or(p, odds_ratio)",
        "rate_behind_survival": "rate_behind_survival(survival, years)",
        "rate_behind_median": "rate_behind_median(median_years)",
        "min": "min(a, b)",
        "max": "max(a, b)",
        "exp": "exp(x)",
        "log": "log(x)",
        "clip": "clip(x, lo, hi)",
        "when": "when(condition, if_true, if_false)",
    }
)
"""How each function is written, for error messages and documentation."""

# Functions that also read variables from the evaluation context, appended after the
# written arguments: per_cycle rescales a probability to the model's cycle length.
_CONTEXT_VARIABLES: Mapping[str, tuple[str, ...]] = MappingProxyType(
    {"per_cycle": ("cycle_years",)}
)

_BINARY: Mapping[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = MappingProxyType(
    {
        "+": np.add,
        "-": np.subtract,
        "*": np.multiply,
        "/": np.divide,
        "**": np.power,
        "<": lambda a, b: _truth(np.less(a, b), a, b),
        "<=": lambda a, b: _truth(np.less_equal(a, b), a, b),
        ">": lambda a, b: _truth(np.greater(a, b), a, b),
        ">=": lambda a, b: _truth(np.greater_equal(a, b), a, b),
        "==": lambda a, b: _truth(np.equal(a, b), a, b),
        "!=": lambda a, b: _truth(np.not_equal(a, b), a, b),
        "and": lambda a, b: _truth((a != 0) & (b != 0), a, b),
        "or": lambda a, b: _truth((a != 0) | (b != 0), a, b),
    }
)
_UNARY: Mapping[str, Callable[[np.ndarray], np.ndarray]] = MappingProxyType(
    {"-": np.negative, "+": np.positive, "not": lambda a: _truth(a == 0, a)}
)

# --- errors ----------------------------------------------------------------------------


def _error(
    where: str, text: str, problem: str, *, position: int | None = None, expected: str = ""
) -> ExpressionError:
    """An ExpressionError naming the place, the text, the position and what was expected.

    ``position`` is a 0-based index into ``text``; the message shows it 1-based.
    """
    shown = text if len(text) <= 120 else text[:117] + "..."
    parts = [f"{where}: " if where else "", f"expression {shown!r}"]
    if position is not None:
        parts.append(f" at character {position + 1}")
    parts.append(f": {problem}")
    if expected:
        parts.append(f"; expected {expected}")
    error = ExpressionError("".join(parts))
    error.where = where  # type: ignore[attr-defined]
    error.text = text  # type: ignore[attr-defined]
    error.position = position  # type: ignore[attr-defined]
    return error


_ARRAY_INDEX = re.compile(r" at index \([0-9, ]*\)")


def did_you_mean(name: str, candidates: Collection[str]) -> str:
    """`` (did you mean a, b?)`` listing up to three close candidates, or ``""``."""
    close = difflib.get_close_matches(name, sorted(candidates), n=3, cutoff=0.6)
    return f" (did you mean {', '.join(close)}?)" if close else ""


# --- tokenizer -------------------------------------------------------------------------

_NUMBER = re.compile(r"(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")  # ASCII digits only
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_OPERATORS = ("**", "<=", ">=", "==", "!=", "+", "-", "*", "/", "<", ">", "(", ")", ",")
_OPERATOR = re.compile("|".join(re.escape(op) for op in _OPERATORS))  # first listed wins
_WORD_OPERATORS = frozenset({"and", "or", "not"})

# Characters that are not part of the language, with the reason users most need.
_FORBIDDEN_CHARACTERS = {
    ".": "attribute access with '.' is not allowed",
    "[": "subscripts with '[' are not allowed",
    "]": "subscripts with ']' are not allowed",
    "{": "braces are not allowed",
    "}": "braces are not allowed",
    "=": "'=' is not allowed: keyword arguments (name=value) and assignments are not part "
    "of the language; compare with '=='",
    "^": "'^' is not an operator here; write powers as a ** b",
    "%": "'%' is not an operator here; write percentages as fractions (0.05)",
    ":": "':' is not allowed (no lambdas, slices or annotations)",
    ";": "';' is not allowed: one expression per value",
    "'": "string literals are not allowed",
    '"': "string literals are not allowed",
    "@": "'@' is not an operator here",
    "&": "'&' is not an operator here; use 'and'",
    "|": "'|' is not an operator here; use 'or'",
    "~": "'~' is not an operator here; use 'not'",
    "!": "'!' is not an operator here; use 'not' or '!='",
}

_FORBIDDEN_WORDS = {
    "lambda": "lambda functions are not allowed",
    "True": "booleans are not allowed; write 1 or 0, or a comparison",
    "False": "booleans are not allowed; write 1 or 0, or a comparison",
    "true": "booleans are not allowed; write 1 or 0, or a comparison",
    "false": "booleans are not allowed; write 1 or 0, or a comparison",
    "None": "None is not allowed; every expression must give a number",
    "if": "'if' is not allowed; write when(condition, if_true, if_false)",
    "else": "'else' is not allowed; write when(condition, if_true, if_false)",
}


class _Token(NamedTuple):
    kind: str  # "number", "name", "op" or "end"
    text: str
    position: int


def _tokenize(text: str, where: str) -> list[_Token]:
    tokens: list[_Token] = []
    i, n = 0, len(text)
    while i < n:
        char = text[i]
        if char.isspace():
            i += 1
            continue
        number = _NUMBER.match(text, i)
        if number:
            tokens.append(_Token("number", number.group(), i))
            i = number.end()
            continue
        name = _NAME.match(text, i)
        if name:
            word = name.group()
            if word in _FORBIDDEN_WORDS:
                raise _error(where, text, _FORBIDDEN_WORDS[word], position=i)
            if keyword.iskeyword(word) and word not in _WORD_OPERATORS:
                raise _error(
                    where, text, f"{word!r} is a reserved word and not allowed", position=i
                )
            kind = "op" if word in _WORD_OPERATORS else "name"
            tokens.append(_Token(kind, word, i))
            i = name.end()
            continue
        operator = _OPERATOR.match(text, i)
        if operator:
            tokens.append(_Token("op", operator.group(), i))
            i = operator.end()
            continue
        problem = _FORBIDDEN_CHARACTERS.get(char, f"character {char!r} is not allowed")
        raise _error(where, text, problem, position=i)
    tokens.append(_Token("end", "", n))
    return tokens


# --- parser ----------------------------------------------------------------------------

# Binding powers, low to high (see the grammar in the module docstring).
_INFIX_POWER = {
    "or": 1,
    "and": 2,
    "<": 4, "<=": 4, ">": 4, ">=": 4, "==": 4, "!=": 4,
    "+": 5, "-": 5,
    "*": 6, "/": 6,
    "**": 8,
}  # fmt: skip
_NOT_OPERAND_POWER = 3
_UNARY_OPERAND_POWER = 7
_COMPARISON_POWER = 4

_EXPECTED_OPERAND = "a number, a parameter name, a function call, '(' or a sign"
_EXPECTED_OPERATOR = "an operator (+ - * / ** < <= > >= == != and or), ')' or the end"

# Program instructions: ("const", float) ("load", name) ("unary", op) ("binary", op)
# ("call", name, n_inputs) with n_inputs = written arguments + context variables;
# run in order on a value stack.
_Instruction = tuple


class _Parser:
    def __init__(self, text: str, where: str):
        self.text = text
        self.where = where
        self.tokens = _tokenize(text, where)
        self.index = 0
        self.program: list[_Instruction] = []
        self.names: set[str] = set()
        self.functions: set[str] = set()

    def error(self, token: _Token, problem: str, expected: str = "") -> ExpressionError:
        return _error(self.where, self.text, problem, position=token.position, expected=expected)

    def peek(self) -> _Token:
        return self.tokens[self.index]

    def advance(self) -> _Token:
        token = self.tokens[self.index]
        self.index += 1
        return token

    def parse(self) -> list[_Instruction]:
        first = self.peek()
        if first.kind == "end":
            raise self.error(first, "the expression is empty", _EXPECTED_OPERAND)
        self.expression(0, 1)
        last = self.peek()
        if last.kind != "end":
            problem = f"unexpected {_describe(last)}"
            if last.text == ")":
                problem = "')' has no matching '('"
            raise self.error(last, problem, _EXPECTED_OPERATOR)
        return self.program

    def expression(self, min_power: int, depth: int) -> None:
        """Parse operators binding tighter than ``min_power``, emitting postfix code."""
        if depth > MAX_DEPTH:
            raise self.error(
                self.peek(),
                f"the expression is nested more than {MAX_DEPTH} levels deep",
                "a simpler expression (split it into named parameters)",
            )
        self.operand(depth)
        while True:
            token = self.peek()
            power = _INFIX_POWER.get(token.text) if token.kind == "op" else None
            if power is None or power <= min_power:
                return
            self.advance()
            if token.text == "**":  # right-associative; the exponent may carry a sign
                self.expression(_UNARY_OPERAND_POWER, depth + 1)
            else:
                self.expression(power, depth + 1)
            self.program.append(("binary", token.text))
            if power == _COMPARISON_POWER:
                following = self.peek()
                if _INFIX_POWER.get(following.text) == _COMPARISON_POWER:
                    raise self.error(
                        following,
                        "comparisons cannot be chained",
                        "one comparison; combine two with 'and', e.g. (a < b) and (b < c)",
                    )

    def operand(self, depth: int) -> None:
        token = self.advance()
        if token.kind == "number":
            value = float(token.text)
            if not math.isfinite(value):
                raise self.error(token, f"the number {token.text} is too large", "a finite number")
            self.program.append(("const", value))
        elif token.kind == "name":
            if self.peek().text == "(":
                self.call(token, depth)
            elif token.text == REST_KEYWORD:
                raise self.error(
                    token,
                    f"{REST_KEYWORD!r} cannot be part of a larger expression",
                    f"{REST_KEYWORD!r} alone as the whole value (the probability left in the row)",
                )
            else:
                self.names.add(token.text)
                self.program.append(("load", token.text))
        elif token.text in ("-", "+"):
            self.expression(_UNARY_OPERAND_POWER - 1, depth + 1)
            self.program.append(("unary", token.text))
        elif token.text == "not":
            self.expression(_NOT_OPERAND_POWER - 1, depth + 1)
            self.program.append(("unary", "not"))
        elif token.text == "(":
            self.expression(0, depth + 1)
            self.expect(")", opened=token)
        else:
            raise self.error(token, f"unexpected {_describe(token)}", _EXPECTED_OPERAND)

    def call(self, name: _Token, depth: int) -> None:
        spec = FUNCTIONS.get(name.text)
        if spec is None:
            from caredecide.upgrade import RENAMED_FUNCTIONS

            known = ", ".join(sorted(FUNCTIONS))
            renamed = RENAMED_FUNCTIONS.get(name.text)
            hint = (
                f" ({name.text} was renamed {renamed} in model file format 2; "
                "`caredecide check --upgrade FILE` rewrites a format-1 file)"
                if renamed
                else did_you_mean(name.text, FUNCTIONS)
            )
            raise self.error(name, f"unknown function {name.text!r}{hint}", f"one of {known}")
        opened = self.advance()  # "("
        n_arguments = 0
        if self.peek().text != ")":
            while True:
                self.expression(0, depth + 1)
                n_arguments += 1
                if self.peek().text != ",":
                    break
                self.advance()
        self.expect(")", opened=opened, in_call=True)
        if n_arguments != spec.arity:
            raise self.error(
                name,
                f"{name.text} takes {spec.arity} argument{'s' if spec.arity != 1 else ''}, "
                f"got {n_arguments}",
                FUNCTION_SIGNATURES[name.text],
            )
        for variable in _CONTEXT_VARIABLES.get(name.text, ()):
            self.names.add(variable)
            self.program.append(("load", variable))
        self.functions.add(name.text)
        n_inputs = n_arguments + len(_CONTEXT_VARIABLES.get(name.text, ()))
        self.program.append(("call", name.text, n_inputs))

    def expect(self, text: str, *, opened: _Token, in_call: bool = False) -> None:
        token = self.peek()
        if token.text == text:
            self.advance()
            return
        expected = "an operator, ',' or ')'" if in_call else "an operator or ')'"
        problem = f"unexpected {_describe(token)}"
        if token.kind == "end":
            problem = f"'(' at character {opened.position + 1} is never closed"
        raise self.error(token, problem, expected)


def _describe(token: _Token) -> str:
    if token.kind == "end":
        return "end of the expression"
    if token.kind == "number":
        return f"number {token.text}"
    if token.kind == "name":
        return f"name {token.text!r}"
    return f"{token.text!r}"


# --- the expression object -------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Expression:
    """A parsed expression: immutable, hashable, equal to another when the source is equal.

    Build one with :func:`parse_expression`. ``source`` is the original text (a number
    from the model file is kept as ``repr(number)``) so a model saves back unchanged.
    """

    source: str
    names: frozenset[str]
    """Variables referenced (``per_cycle`` also references ``cycle_years``)."""
    functions: frozenset[str]
    """Functions called."""
    is_rest: bool
    """True for the keyword ``rest``: the caller fills the row's remaining probability."""
    _program: tuple[_Instruction, ...] = field(repr=False)
    where: str = field(default="", repr=False)
    """Table path given at parsing, used in evaluation errors."""

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Expression):
            return NotImplemented
        return self.source == other.source

    def __hash__(self) -> int:
        return hash(("Expression", self.source))

    @property
    def is_constant(self) -> bool:
        """True when the value needs no variable (a number or arithmetic on numbers)."""
        return not self.is_rest and not self.names

    @property
    def number(self) -> float | None:
        """The value when the whole expression is one number (e.g. ``-0.5``), else None.

        Lets a model file save a plain number back as a TOML number.
        """
        if not self.is_constant:
            return None
        try:
            return float(self.source)
        except ValueError:  # arithmetic on numbers, e.g. "1/3"
            return None

    def evaluate(self, variables: Mapping[str, np.ndarray | float]) -> np.ndarray:
        """Evaluate over arrays with numpy broadcasting.

        Parameters
        ----------
        variables : mapping of str to ndarray or float
            Values of every name in :attr:`names`, in the expression's own units (a
            probability per its stated period, a cost in currency units, ...). Arrays
            broadcast: ``(D, 1)`` parameter draws with a ``(1, T)`` ``age`` give
            ``(D, T)``. Extra entries are ignored.

        Returns
        -------
        numpy.ndarray
            float64 array of the broadcast shape of the inputs used (0-d for a
            constant). Division by zero, ``log`` of a non-positive number and the like
            give ``inf``/``nan`` (never an error mid-batch): the caller validates.

        Raises
        ------
        ExpressionError
            For ``rest`` (the caller computes it), a missing or non-numeric variable,
            or arrays whose shapes do not broadcast.
        """
        if self.is_rest:
            raise _error(
                self.where,
                self.source,
                f"{REST_KEYWORD!r} has no value of its own",
                expected="the caller to fill it with 1 minus the other probabilities in the row",
            )
        stack: list[np.ndarray] = []
        with np.errstate(all="ignore"):
            for instruction in self._program:
                opcode = instruction[0]
                if opcode == "const":
                    stack.append(np.asarray(instruction[1], dtype=np.float64))
                elif opcode == "load":
                    stack.append(self._variable(variables, instruction[1]))
                elif opcode == "unary":
                    stack.append(_UNARY[instruction[1]](stack.pop()))
                elif opcode == "binary":
                    right = stack.pop()
                    left = stack.pop()
                    stack.append(self._apply(instruction[1], _BINARY[instruction[1]], left, right))
                else:
                    n_inputs = instruction[2]
                    arguments = stack[-n_inputs:]
                    del stack[-n_inputs:]
                    function = FUNCTIONS[instruction[1]].function
                    stack.append(self._apply(instruction[1], function, *arguments))
        return np.asarray(stack.pop(), dtype=np.float64)

    def _variable(self, variables: Mapping[str, np.ndarray | float], name: str) -> np.ndarray:
        if name not in variables:
            supplied = " (the model supplies it)" if name in RESERVED_NAMES else ""
            raise _error(
                self.where,
                self.source,
                f"no value for variable {name!r}{supplied}{did_you_mean(name, variables)}",
                expected="a value for every name in the expression",
            )
        value = variables[name]
        try:
            array = np.asarray(value, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise _error(
                self.where,
                self.source,
                f"variable {name!r} is not numeric: {value!r}",
                expected="a number or an array of numbers",
            ) from exc
        return array

    def _apply(self, label: str, function: Callable[..., np.ndarray], *args: np.ndarray):
        try:
            return np.asarray(function(*args), dtype=np.float64)
        except ModelError as exc:  # a conversion function rejected an input value
            # The array index of the first bad value means nothing to a modeller (the
            # caller names the table path); keep the value and the rule.
            found = "; ".join(f"{p.where}: {_ARRAY_INDEX.sub('', p.message)}" for p in exc.problems)
            raise _error(
                self.where,
                self.source,
                f"{label} received an input outside its range ({found})",
                expected=f"inputs valid for {FUNCTION_SIGNATURES.get(label, label)}",
            ) from exc
        except ValueError as exc:  # shapes that do not broadcast
            shapes = ", ".join(str(np.shape(a)) for a in args)
            raise _error(
                self.where,
                self.source,
                f"{label!r} cannot combine inputs of shapes {shapes}: {exc}",
                expected="inputs that broadcast together",
            ) from exc

    def with_definitions(self, definitions: Mapping[str, Expression]) -> Expression:
        """This expression with every name defined in ``definitions`` replaced by its
        definition (named intermediate expressions, ``[derived]`` in a model file).

        Parameters
        ----------
        definitions : mapping of str to Expression
            Definitions that are themselves already expanded (no defined name left).

        Returns
        -------
        Expression
            Same ``source`` and ``where`` (messages show what the user wrote); ``names``
            and ``functions`` are those of the expanded program, so time dependence and
            the parameters used are seen through the definitions. ``self`` when no
            defined name is used.
        """
        used = self.names & definitions.keys()
        if not used:
            return self
        program: list[_Instruction] = []
        for instruction in self._program:
            if instruction[0] == "load" and instruction[1] in used:
                program.extend(definitions[instruction[1]]._program)
            else:
                program.append(instruction)
        names = set(self.names - used)
        functions = set(self.functions)
        for name in used:
            names |= definitions[name].names
            functions |= definitions[name].functions
        return Expression(
            self.source,
            frozenset(names),
            frozenset(functions),
            self.is_rest,
            tuple(program),
            self.where,
        )

    def check_names(
        self, known: Collection[str], *, where: str, include_reserved: bool = True
    ) -> None:
        """Raise ExpressionError listing every referenced name not in ``known``.

        Parameters
        ----------
        known : collection of str
            Names the model defines (parameters).
        where : str
            Table path for the message, e.g. ``"transitions.treat.stage_1.dead"``.
        include_reserved : bool
            Also accept :data:`RESERVED_NAMES` (the model supplies them).
        """
        allowed = set(known) | (RESERVED_NAMES if include_reserved else set())
        unknown = sorted(self.names - allowed)
        if not unknown:
            return
        listed = "; ".join(f"{name!r}{did_you_mean(name, allowed)}" for name in unknown)
        plural = "s" if len(unknown) > 1 else ""
        raise _error(
            where,
            self.source,
            f"unknown name{plural} {listed}",
            expected="parameter or [derived] names defined in the model or one of "
            + ", ".join(sorted(RESERVED_NAMES)),
        )


def parse_expression(
    text: str | float | int, *, where: str = "", allow_rest: bool = True
) -> Expression:
    """Parse an expression from a model file once, for repeated evaluation.

    Parameters
    ----------
    text : str, float or int
        Expression text, or a number as read from TOML (kept as ``repr(number)``).
        Booleans are rejected; numbers must be finite.
    where : str
        Table path for error messages, e.g. ``"transitions.treat.stage_1.dead"``.
    allow_rest : bool
        Whether the keyword ``rest`` may stand as the whole value (transition rows
        only; pass False for costs, QALY weights and parameters).

    Returns
    -------
    Expression

    Raises
    ------
    ExpressionError
        Naming ``where``, the text, the 0-based ``position`` (shown 1-based) and what
        was expected, for any construct outside the language.
    """
    if isinstance(text, bool) or not isinstance(text, str | int | float):
        raise _error(
            where,
            repr(text),
            f"a {type(text).__name__} is not an expression",
            expected="a number or expression text",
        )
    if not isinstance(text, str):
        if not math.isfinite(text):
            raise _error(where, repr(text), "the number is not finite", expected="a finite number")
        text = repr(text)
    if len(text) > MAX_LENGTH:
        raise _error(
            where,
            text,
            f"the expression is {len(text)} characters long, more than {MAX_LENGTH}",
            expected="a shorter expression (split it into named parameters)",
        )
    if text.strip() == REST_KEYWORD:
        if not allow_rest:
            raise _error(
                where,
                text,
                f"{REST_KEYWORD!r} is not allowed here",
                position=text.index(REST_KEYWORD),
                expected=f"a number or expression ({REST_KEYWORD!r} only completes a "
                "row of transition probabilities)",
            )
        return Expression(text, frozenset(), frozenset(), True, (), where)
    parser = _Parser(text, where)
    program = parser.parse()
    return Expression(
        text, frozenset(parser.names), frozenset(parser.functions), False, tuple(program), where
    )


def substitute_names(
    text: str | float | int, values: Mapping[str, float | str]
) -> str | float | int:
    """The expression with each variable in ``values`` replaced by its number or text.

    Used to give each expanded copy of a state its own attribute values and tunnel step
    (:mod:`caredecide.expand`): ``"c_care + on_treatment * c_drug"`` with
    ``{"on_treatment": 1}`` gives ``"c_care + 1.0 * c_drug"``. Numbers are written with
    ``repr`` (exact), negative ones in parentheses; text (a definition written in place of
    its name) always in parentheses. Names called as functions, numbers,
    ``rest`` and text that does not tokenize are left as they are (parsing reports them).

    Parameters
    ----------
    text : str, float or int
        Expression text, or a number (returned unchanged).
    values : mapping of str to float or str
        Variable name -> number, or expression text to put in its place.
    """
    if not isinstance(text, str) or not values:
        return text
    try:
        tokens = _tokenize(text, "")
    except ExpressionError:
        return text
    pieces: list[str] = []
    last = 0
    for token, following in itertools.pairwise(tokens):
        if token.kind != "name" or token.text not in values or following.text == "(":
            continue
        value = values[token.text]
        if isinstance(value, str):
            written = f"({value})"
        else:
            number = float(value)
            written = repr(number) if number >= 0 else f"({number!r})"
        pieces.append(text[last : token.position])
        pieces.append(written)
        last = token.position + len(token.text)
    pieces.append(text[last:])
    return "".join(pieces)
