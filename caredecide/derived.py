"""Named intermediate expressions: the ``[derived]`` table of a model file.

A value used in many cells is written once and named::

    [derived]
    p_die_treated = "with_rr(p_die, rr_treatment)"
    c_first_year = "c_drug * 12 + c_monitoring"

Any expression (a transition, a rate, a cost, a QALY weight, another derived value)
may then use ``p_die_treated`` as if it were a parameter. A definition may use
parameters, the values the model supplies (``age``, ``cycle_years``, the settings ...)
and other derived values, in any order in the file, but never itself, directly or
through others.

Definitions are expanded into the expressions that use them once, when the model is
parsed (:meth:`caredecide.expressions.Expression.with_definitions`), so every later
step (time dependence, the parameters a cell depends on, evaluation over draws) sees
through them.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping

from caredecide.errors import ExpressionError, Problem
from caredecide.expressions import (
    FUNCTIONS,
    RESERVED_NAMES,
    Expression,
    did_you_mean,
    parse_expression,
)

__all__ = ["resolve_derived"]


def _message(error: ExpressionError, where: str) -> str:
    message = str(error)
    return message[len(where) + 2 :] if message.startswith(f"{where}: ") else message


def _name_problems(name: str, parameter_names: Collection[str]) -> list[str]:
    found = []
    if not (name.isascii() and name.isidentifier()):  # letters, digits, _ (no leading digit)
        found.append(f"name {name!r}; expected letters, digits and _ (not starting with a digit)")
    if name in RESERVED_NAMES:
        found.append(f"name {name!r} is reserved (the model supplies it); choose another name")
    if name in parameter_names:
        found.append(f"name {name!r} is also a parameter; a derived value needs a name of its own")
    if name in FUNCTIONS:
        found.append(f"name {name!r} is a function of the expression language; choose another")
    return found


def _cycle(graph: Mapping[str, set[str]], start: str) -> list[str] | None:
    """A path ``start -> ... -> start`` through ``graph`` if there is one (depth first)."""
    stack: list[tuple[str, list[str]]] = [(start, [start])]
    seen: set[str] = set()
    while stack:
        node, path = stack.pop()
        for following in sorted(graph.get(node, ())):
            if following == start:
                return [*path, start]
            if following not in seen:
                seen.add(following)
                stack.append((following, [*path, following]))
    return None


def resolve_derived(
    derived: Mapping[str, object], parameter_names: Collection[str]
) -> tuple[dict[str, Expression], list[Problem]]:
    """Parse, check and expand the ``[derived]`` definitions of a model.

    Parameters
    ----------
    derived : mapping of str to str or float
        ``Model.derived``: name -> expression text (or a number).
    parameter_names : collection of str
        The model's parameters and Dirichlet group members.

    Returns
    -------
    (dict of str to Expression, list of Problem)
        Every definition that is sound, expanded so that it refers to no derived name;
        and a problem per fault, at ``derived.<name>``: a bad name, a syntax error, an
        unknown name (with close matches), or a definition that refers back to itself
        (the loop is shown, e.g. ``a -> b -> a``).
    """
    problems: list[Problem] = []
    parsed: dict[str, Expression] = {}
    parameter_names = set(parameter_names)
    for name, text in derived.items():
        where = f"derived.{name}"
        messages = _name_problems(name, parameter_names)
        try:
            expression = parse_expression(text, where=where, allow_rest=False)  # type: ignore[arg-type]
        except ExpressionError as error:
            messages.append(_message(error, where))
        else:
            unknown = sorted(expression.names - parameter_names - set(derived) - RESERVED_NAMES)
            for missing in unknown:
                close = did_you_mean(missing, parameter_names | set(derived) | RESERVED_NAMES)
                messages.append(
                    f"{text!r} uses unknown name {missing!r}{close}; expected a parameter, "
                    "another [derived] name or a value the model supplies"
                )
        problems.extend(Problem(where, message) for message in messages)
        if not messages:
            parsed[name] = expression
    graph = {name: set(expression.names) & set(derived) for name, expression in parsed.items()}
    looping = set()
    for name in parsed:
        path = _cycle(graph, name)
        if path is not None:
            looping.add(name)
            problems.append(
                Problem(
                    f"derived.{name}",
                    f"is defined in terms of itself: {' -> '.join(path)}; expected definitions "
                    "that do not refer back to themselves",
                )
            )
    resolved: dict[str, Expression] = {}
    pending = {name for name in parsed if name not in looping}
    # Expand in dependency order: a definition once everything it uses is expanded.
    while pending:
        ready = sorted(n for n in pending if graph[n] <= resolved.keys())
        if not ready:  # depends on a faulty or looping definition (already reported)
            break
        for name in ready:
            resolved[name] = parsed[name].with_definitions(resolved)
            pending.discard(name)
    return resolved, problems
