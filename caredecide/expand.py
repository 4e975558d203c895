"""Expand state attributes and tunnels into the flat state space, before compiling.

A model may declare attributes (``[attributes.on_treatment]`` with values ``untreated = 0``
and ``treated = 1``) and tunnels (``[tunnels.years_on_treatment]`` with ``length = 2``), and
let a state vary by them (``attributes = ["on_treatment"]``, ``tunnels = [...]``). This
module turns such a model into an ordinary flat :class:`~caredecide.model.Model`, one
state per copy, which :func:`caredecide.compile.compile_model` compiles as any other; a
model without attributes or tunnels is returned unchanged.

Generated ids join the state id, the value names and the tunnel steps with ``__``
(``stage_1__treated__years_on_treatment_0``); the last step of a tunnel of length ``N`` is
``..._Nplus`` ("N cycles or more") and keeps itself. Labels join the same parts in words
("Stage 1, treated, years on treatment 0"). Both depend only on the declarations, so they
are stable from run to run.

Rules of the expansion:

* A row, ``allowed_in`` entry or ``severity_order`` entry written for ``stage_1`` applies to
  every copy; ``stage_1__treated`` to the copies with that value (any tunnel step).
* A target ``stage_2`` in a row keeps the source copy's attribute values; a target
  ``stage_2__treated`` sets that value. A tunnel step counts whole cycles in the tunnel:
  moving from a copy at step ``k`` to a copy that carries the same tunnel gives step
  ``min(k + 1, N)``; entering from outside the tunnel gives step 0. A decision-time move
  (``[moves]``) takes no time: a move within one tunnel keeps the step, a move into it
  gives step 0. ``[under_action]`` rewards are copied to every copy they cover.
* ``[derived]`` values that read attributes or tunnels are written into each copy.
* Expressions of a copy (its QALY weight and cost, and its rows) read the attribute
  values and the tunnel steps under their names. In a copy outside a tunnel (its
  ``only_for`` values do not hold) the tunnel's name reads 0.
* ``settings.start`` names one copy (every attribute value given); it starts at step 0.
* A ``[rates]`` row inside a tunnel: within a cycle a tunnel's step stays at its value at
  the cycle start, so rate rows reach their targets without stepping on (as moves do), and
  the flat model's ``rate_row_clock`` says where each copy the cohort reached is at the
  cycle end (one step on for the tunnels it started in); :func:`apply_rate_row_clock`
  moves it there after the exponential. Leaving a tunnel at step 0 and coming back within
  one cycle through rate rows is refused (the step at the end is not defined).
"""

from __future__ import annotations

import difflib
import functools
import itertools
import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from caredecide.errors import ModelError, ModelWarningRecord, Problem
from caredecide.limits import MAX_EXPANDED_STATES
from caredecide.model import ExpressionText, Model, State, StateAttribute, Tunnel
from caredecide.per_object import PerObjectCache

SEPARATOR = "__"
"""Joins a state id, value names and tunnel steps into a generated state id."""
_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class StateCopy:
    """One state of the flat model: a declared state at given values and tunnel steps."""

    base: str
    """Id of the declared state."""
    values: tuple[tuple[str, str], ...]
    """(attribute, value name) in the order the state lists its attributes."""
    steps: tuple[tuple[str, int], ...]
    """(tunnel, step) for the tunnels active in this copy."""
    id: str
    label: str


@dataclass(frozen=True)
class Expansion:
    """The flat model and, for each of its states, where it comes from."""

    model: Model
    """A model without attributes or tunnels: every copy is a state."""
    copies: tuple[StateCopy, ...]
    """(S,) in the order of ``model.states``."""
    groups: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    """``"state"`` -> declared state id of each flat state, attribute name -> value name
    (``""`` where the state does not vary by it), tunnel name -> step (``"0"``, ``"1"``,
    ``"2+"``, ``""`` outside the tunnel); each tuple has one entry per flat state. Empty
    when the model declares no attributes or tunnels."""
    warnings: tuple[ModelWarningRecord, ...] = ()


def uses_expansion(model: Model) -> bool:
    """True when the model declares attributes or tunnels, or a state lists one."""
    return bool(
        model.attributes or model.tunnels or any(s.attributes or s.tunnels for s in model.states)
    )


def expand_model(model: Model) -> Model:
    """The flat model (``model`` itself when it uses no attributes or tunnels)."""
    return expand(model).model


def expand(model: Model) -> Expansion:
    """Expand attributes and tunnels into one state per copy.

    Parameters
    ----------
    model : Model
        A model as read from its file (attributes and tunnels as declared).

    Returns
    -------
    Expansion
        The flat model, the copy behind each of its states, grouping metadata and
        warnings (a tunnel read outside the tunnel without its attribute).

    Raises
    ------
    ModelError
        Listing every problem: unknown attributes, values or tunnels, a tunnel length
        that is not a whole number >= 1, too many generated states, ids that cannot be
        told apart, rows that reach one copy twice.
    """
    if not uses_expansion(model):
        copies = tuple(StateCopy(s.id, (), (), s.id, s.label or s.id) for s in model.states)
        return Expansion(model, copies)  # not kept: it refers to ``model`` itself
    return _EXPANSIONS.get(model, lambda: _Expander(model).run())


_EXPANSIONS: PerObjectCache[Expansion] = PerObjectCache(size=8)
"""The expansion of each live model object (the flat model never refers to it)."""


class _Expander:
    def __init__(self, model: Model):
        self.model = model
        self.problems: list[Problem] = []
        self.warnings: list[ModelWarningRecord] = []
        self.states = {s.id: s for s in model.states}

    def add(self, where: str, message: str) -> None:
        self.problems.append(Problem(where, message))

    def fail_if_problems(self) -> None:
        if self.problems:
            raise ModelError(self.problems, file=self.model.file_label)

    # -- declarations ------------------------------------------------------------------
    def check_declarations(self) -> None:
        from caredecide.expressions import FUNCTIONS, RESERVED_NAMES, REST_KEYWORD

        model = self.model
        taken = {
            *model.parameter_names(),
            *model.derived,
            *RESERVED_NAMES,
            *FUNCTIONS,
            REST_KEYWORD,
        }
        for name, attribute in model.attributes.items():
            where = f"attributes.{name}"
            self._check_name(name, where, taken)
            if not attribute.values:
                self.add(
                    f"{where}.values",
                    "has no values; expected a table such as { untreated = 0, treated = 1 }",
                )
            for value, number in attribute.values.items():
                if not _IDENTIFIER.match(value) or SEPARATOR in value:
                    self.add(
                        f"{where}.values.{value}",
                        f"value name {value!r}; expected letters, digits and single _ "
                        f"(not starting with a digit, no {SEPARATOR!r})",
                    )
                if (
                    isinstance(number, bool)
                    or not isinstance(number, int | float)
                    or not math.isfinite(number)
                ):
                    self.add(
                        f"{where}.values.{value}",
                        f"{number!r}; expected the finite number expressions read for it",
                    )
        for name, tunnel in model.tunnels.items():
            where = f"tunnels.{name}"
            self._check_name(name, where, taken)
            if name in model.attributes:
                self.add(where, f"name {name!r} is also an attribute; choose another name")
            length = tunnel.length
            if isinstance(length, bool) or not isinstance(length, int) or length < 1:
                self.add(
                    f"{where}.length",
                    f"{length!r}; expected a whole number of cycles >= 1 (the last step, "
                    "'length or more', keeps itself)",
                )
            for limit, value in tunnel.only_for.items():
                if limit not in model.attributes:
                    self.add(
                        f"{where}.only_for.{limit}",
                        f"unknown attribute {limit!r}{_suggest(limit, model.attributes)}; "
                        f"attributes are {sorted(model.attributes)}",
                    )
                elif value not in model.attributes[limit].values:
                    known = list(model.attributes[limit].values)
                    self.add(
                        f"{where}.only_for.{limit}",
                        f"unknown value {value!r}{_suggest(value, known)}; {limit!r} takes {known}",
                    )
        for state in model.states:
            self._check_state(state)

    def _check_name(self, name: str, where: str, taken: set[str]) -> None:
        if not _IDENTIFIER.match(name):
            self.add(where, f"name {name!r}; expected letters, digits and _")
        elif name in taken:
            self.add(
                where,
                f"name {name!r} is already a parameter, a function or a value the model "
                "supplies; choose another name",
            )

    def _check_state(self, state: State) -> None:
        model = self.model
        where = f"states.{state.id}"
        if SEPARATOR in state.id:
            self.add(
                f"{where}.id",
                f"{state.id!r} contains {SEPARATOR!r}, which joins the parts of generated "
                "state ids; expected single underscores",
            )
        seen_values: dict[str, str] = {}
        for attribute in state.attributes:
            if attribute not in model.attributes:
                self.add(
                    f"{where}.attributes",
                    f"unknown attribute {attribute!r}{_suggest(attribute, model.attributes)}; "
                    f"expected one of {sorted(model.attributes)} (declare it in [attributes])",
                )
                continue
            if state.attributes.count(attribute) > 1:
                self.add(f"{where}.attributes", f"attribute {attribute!r} is listed twice")
            for value in model.attributes[attribute].values:
                other = seen_values.setdefault(value, attribute)
                if other != attribute:
                    self.add(
                        f"{where}.attributes",
                        f"value name {value!r} belongs to both {other!r} and {attribute!r}; "
                        "a generated id could not tell them apart; rename one",
                    )
        for tunnel in state.tunnels:
            if tunnel not in model.tunnels:
                self.add(
                    f"{where}.tunnels",
                    f"unknown tunnel {tunnel!r}{_suggest(tunnel, model.tunnels)}; "
                    f"expected one of {sorted(model.tunnels)} (declare it in [tunnels])",
                )
                continue
            if state.tunnels.count(tunnel) > 1:
                self.add(f"{where}.tunnels", f"tunnel {tunnel!r} is listed twice")
            if state.absorbing:
                self.add(
                    f"{where}.tunnels",
                    f"state {state.id!r} is absorbing: the cohort never moves on, so it "
                    f"cannot count steps of tunnel {tunnel!r}; remove it",
                )
            missing = sorted(set(model.tunnels[tunnel].only_for) - set(state.attributes))
            if missing:
                self.add(
                    f"{where}.tunnels",
                    f"tunnel {tunnel!r} applies only for values of {missing}, which state "
                    f"{state.id!r} does not vary by; add them to its attributes",
                )

    # -- copies --------------------------------------------------------------------------
    def count_copies(self) -> tuple[int, bool]:
        """(number of copies, exact); stops counting once past :data:`MAX_EXPANDED_STATES`."""
        total = 0
        for state in self.model.states:
            sizes = [len(self.model.attributes[a].values) for a in state.attributes]
            if total + math.prod(sizes) > MAX_EXPANDED_STATES:  # at least one copy each
                return total + math.prod(sizes), False
            for combination in itertools.product(
                *(list(self.model.attributes[a].values) for a in state.attributes)
            ):
                values = dict(zip(state.attributes, combination, strict=True))
                total += math.prod(t.length + 1 for t in self.active_tunnels(state, values))
                if total > MAX_EXPANDED_STATES:
                    return total, False
        return total, True

    def build_copies(self) -> list[StateCopy]:
        copies: list[StateCopy] = []
        for state in self.model.states:
            attributes = [self.model.attributes[a] for a in state.attributes]
            for combination in itertools.product(*(list(a.values) for a in attributes)):
                values = tuple(zip(state.attributes, combination, strict=True))
                active = self.active_tunnels(state, dict(values))
                ranges = [range(t.length + 1) for t in active]
                for steps in itertools.product(*ranges):
                    step_pairs = tuple((t.name, k) for t, k in zip(active, steps, strict=True))
                    copies.append(self._copy(state, values, step_pairs))
        return copies

    def active_tunnels(self, state: State, values: Mapping[str, str]) -> list[Tunnel]:
        tunnels = (self.model.tunnels[t] for t in state.tunnels)
        return [t for t in tunnels if all(values.get(a) == v for a, v in t.only_for.items())]

    def _copy(
        self,
        state: State,
        values: tuple[tuple[str, str], ...],
        steps: tuple[tuple[str, int], ...],
    ) -> StateCopy:
        id_parts = [state.id, *(v for _, v in values)]
        label_parts = [state.label or state.id]
        label_parts += [v.replace("_", " ") for _, v in values]
        for name, k in steps:
            tunnel = self.model.tunnels[name]
            id_parts.append(_step_id(tunnel, k))
            label_parts.append(f"{tunnel.label or name.replace('_', ' ')} {_step_text(tunnel, k)}")
        return StateCopy(state.id, values, steps, SEPARATOR.join(id_parts), ", ".join(label_parts))

    def variables(self, copy: StateCopy) -> dict[str, float]:
        """Numbers the expressions of ``copy`` read: attribute values and tunnel steps."""
        out = {a: float(self.model.attributes[a].values[v]) for a, v in copy.values}
        out.update({t: 0.0 for t in self.states[copy.base].tunnels})
        out.update({t: float(k) for t, k in copy.steps})
        return out

    # -- references to copies ----------------------------------------------------------
    def read_key(self, key: str, where: str) -> tuple[str, dict[str, str]] | None:
        """``stage_1__treated`` -> ("stage_1", {"on_treatment": "treated"}); None if bad."""
        base, *parts = key.split(SEPARATOR)
        if base not in self.states:
            self.add(
                where,
                f"unknown state {base!r}{_suggest(base, self.states)}; "
                f"states are {sorted(self.states)}",
            )
            return None
        state = self.states[base]
        owner = {v: a for a in state.attributes for v in self.model.attributes[a].values}
        chosen: dict[str, str] = {}
        for part in parts:
            if part in owner:
                chosen[owner[part]] = part
                continue
            if any(part.startswith(f"{t}_") for t in state.tunnels):
                self.add(
                    where,
                    f"{key!r} names a tunnel step ({part!r}); steps are set by the expansion, "
                    f"so write the state and its values only (e.g. {base!r})",
                )
            else:
                values = {a: list(self.model.attributes[a].values) for a in state.attributes}
                self.add(
                    where,
                    f"{key!r}: {part!r} is not a value of state {base!r}"
                    f"{_suggest(part, owner)}; its attributes take {values}",
                )
            return None
        return base, chosen

    def matching(self, key: str, where: str) -> list[StateCopy]:
        read = self.read_key(key, where)
        if read is None:
            return []
        base, chosen = read
        return [
            c
            for c in self.copies
            if c.base == base and all(dict(c.values).get(a) == v for a, v in chosen.items())
        ]

    def target(
        self, key: str, source: StateCopy, where: str, *, advance: bool = True
    ) -> StateCopy | None:
        """The copy ``key`` reaches from ``source``: a cycle later (``advance``, a row) or at
        once (a decision-time move, where no time passes and a tunnel keeps its step)."""
        read = self.read_key(key, where)
        if read is None:
            return None
        base, chosen = read
        inherited = dict(source.values)
        values: list[tuple[str, str]] = []
        for attribute in self.states[base].attributes:
            value = chosen.get(attribute, inherited.get(attribute))
            if value is None:
                example = SEPARATOR.join(
                    [base, next(iter(self.model.attributes[attribute].values))]
                )
                self.add(
                    where,
                    f"state {base!r} varies by {attribute!r} but {source.base!r} does not, so "
                    f"the value cannot be carried over; name it, e.g. {example!r}",
                )
                return None
            values.append((attribute, value))
        source_steps = dict(source.steps)
        steps = []
        for tunnel in self.active_tunnels(self.states[base], dict(values)):
            k = source_steps.get(tunnel.name)
            if k is not None and advance:
                k = min(k + 1, tunnel.length)
            steps.append((tunnel.name, 0 if k is None else k))
        return self.by_key[(base, tuple(values), tuple(steps))]

    # -- the flat model ------------------------------------------------------------------
    def run(self) -> Expansion:
        from caredecide.expressions import substitute_names

        model = self.model
        self.check_declarations()
        self.fail_if_problems()
        count, exact = self.count_copies()
        if count > MAX_EXPANDED_STATES:
            sizes = {
                s.id: s.attributes + s.tunnels for s in model.states if s.attributes or s.tunnels
            }
            raise ModelError(
                Problem(
                    "states",
                    f"attributes and tunnels would generate {'' if exact else 'at least '}"
                    f"{count:,} states, more than "
                    f"{MAX_EXPANDED_STATES:,} (the transition arrays grow as the square of "
                    f"the states); expected fewer values or shorter tunnels ({sizes})",
                ),
                file=model.file_label,
            )
        self.copies = self.build_copies()
        self.by_key = {(c.base, c.values, c.steps): c for c in self.copies}
        self.inlined = self._derived_reading_copies()
        variables = {c.id: self.variables(c) for c in self.copies}

        states = []
        for copy in self.copies:
            state = self.states[copy.base]
            values = variables[copy.id]
            states.append(
                replace(
                    state,
                    id=copy.id,
                    label=copy.label,
                    qaly_weight=substitute_names(self.inline(state.qaly_weight), values),
                    cost=substitute_names(self.inline(state.cost), values),
                    attributes=(),
                    tunnels=(),
                )
            )
            for field_name in ("qaly_weight", "cost"):
                value = self.inline(getattr(state, field_name))
                self._check_reads(value, copy, f"states.{state.id}.{field_name}")
                self._warn_unguarded(value, copy, f"states.{copy.id}.{field_name}")

        for action in model.actions:  # actions are the same in every state
            for field_name in ("oneoff_cost", "oneoff_qaly_loss", "cost_per_cycle"):
                read = sorted(_names(getattr(action, field_name)) & set(self.inlined))
                if read:
                    self.add(
                        f"actions.{action.id}.{field_name}",
                        f"reads derived value(s) {read}, which read attributes or tunnels; "
                        "an action's costs are the same in every state, so expected them "
                        "in the states' costs or rows",
                    )
        actions = []
        for action in model.actions:
            allowed = action.allowed_in
            if not isinstance(allowed, str):
                ids: list[str] = []
                for key in allowed:
                    ids += [
                        c.id
                        for c in self.matching(key, f"actions.{action.id}.allowed_in")
                        if c.id not in ids
                    ]
                allowed = tuple(ids)
            actions.append(replace(action, allowed_in=allowed))

        self.allowed = {
            a.id: set(
                replace(model, states=tuple(states), actions=tuple(actions)).allowed_states(a)
            )
            for a in actions
        }
        given: dict[tuple[str, str], str] = {}
        tables: dict[str, Any] = {}
        tables["transitions"] = self._rows("transitions", model.transitions, given, variables)
        # Within a cycle a tunnel's step stays at its value at the cycle start (the clock
        # ticks at the cycle end, see rate_row_clock), so rate rows reach their targets at
        # once, as moves do: a target in the same tunnel keeps the step, entering gives 0.
        tables["rates"] = self._rows("rates", model.rates, given, variables, advance=False)
        # Decision-time moves (no time passes) and rewards of a state under an action (keyed
        # by fields, not states), in models whose format has them.
        if hasattr(model, "moves"):
            tables["moves"] = self._rows("moves", model.moves, {}, variables, advance=False)
        if hasattr(model, "under_action"):
            tables["under_action"] = self._rows(
                "under_action", model.under_action, {}, variables, targets=False
            )

        settings = model.settings
        start = settings.start
        if isinstance(start, str):
            start = self._start_copy(start, "settings.start") or start
        else:
            start = {
                (self._start_copy(key, f"settings.start.{key}") or key): share
                for key, share in start.items()
            }
        order: list[str] = []
        for key in settings.severity_order:
            order += [
                c.id for c in self.matching(key, "settings.severity_order") if c.id not in order
            ]
        self.fail_if_problems()
        clock = self._rate_row_clock(tables["rates"])
        self.fail_if_problems()
        flat = replace(
            model,
            states=tuple(states),
            actions=tuple(actions),
            **tables,
            settings=replace(settings, start=start, severity_order=tuple(order)),
            attributes={},
            tunnels={},
            # Definitions that read attributes or tunnels were written into each copy.
            derived={k: v for k, v in model.derived.items() if k not in self.inlined},
            rate_row_clock=clock,
        )
        self._warn_beyond_length()
        return Expansion(flat, tuple(self.copies), self._groups(), tuple(self.warnings))

    def _rows(
        self,
        table_name: str,
        table: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]],
        given: dict[tuple[str, str], str],
        variables: Mapping[str, Mapping[str, float]],
        *,
        advance: bool = True,
        targets: bool = True,
    ) -> dict[str, dict[str, dict[str, ExpressionText]]]:
        """Rows of ``table`` for every copy they cover. ``advance``: targets are reached a
        cycle later (tunnel steps move on); ``targets=False``: the inner keys are field
        names (``under_action``), copied for each copy with its values written in."""
        from caredecide.expressions import substitute_names

        out: dict[str, dict[str, dict[str, ExpressionText]]] = {}
        for action_id, rows in table.items():
            out[action_id] = {}
            for key, row in rows.items():
                where = f"{table_name}.{action_id}.{key}"
                sources = self.matching(key, where)
                if action_id in self.allowed and SEPARATOR not in key:
                    # A row written for a whole state covers the copies where the action
                    # is allowed (and absorbing ones, whose rows validation checks).
                    allowed = self.allowed[action_id]
                    absorbing = self.states[key].absorbing if key in self.states else False
                    sources = [c for c in sources if c.id in allowed or absorbing]
                for source in sources:
                    if (action_id, source.id) in given:
                        self.add(
                            where,
                            f"the row of {source.id!r} is also given by "
                            f"[{given[(action_id, source.id)]}]; give each copy one row",
                        )
                        continue
                    given[(action_id, source.id)] = where
                    flat_row: dict[str, ExpressionText] = {}
                    for to_key, value in row.items():
                        if not targets:
                            value = self.inline(value)
                            flat_row[to_key] = substitute_names(value, variables[source.id])
                            self._check_reads(value, source, f"{where}.{to_key}")
                            self._warn_unguarded(value, source, f"{where}.{to_key}")
                            continue
                        target = self.target(to_key, source, f"{where}.{to_key}", advance=advance)
                        if target is None:
                            continue
                        if target.id in flat_row:
                            self.add(
                                f"{where}.{to_key}",
                                f"from {source.id!r} this entry reaches {target.id!r}, which "
                                "another entry of the row reaches too; give each copy once",
                            )
                            continue
                        value = self.inline(value)
                        flat_row[target.id] = substitute_names(value, variables[source.id])
                        self._check_reads(value, source, f"{where}.{to_key}")
                        self._warn_unguarded(value, source, f"{where}.{to_key}")
                    out[action_id][source.id] = flat_row
        return out

    def _rate_row_clock(
        self, rates: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]]
    ) -> dict[str, dict[str, dict[str, str]]]:
        """Where the cohort of a rate row inside a tunnel ends the cycle.

        All rate rows of an action form one generator; within the cycle a tunnel's step
        is the one at the cycle start (the rows were resolved without advancing). For a
        source copy inside a tunnel, every copy its cohort can reach within the cycle is
        mapped to the copy at the cycle end: a tunnel the source was in and the reached
        copy still shows at the source's step (the cohort stayed in it) steps one on,
        ``min(k + 1, N)``; a tunnel entered during the cycle shows step 0 and keeps it.
        That reading needs the two cases told apart: a cohort that starts at step 0 and
        can leave the tunnel and come back within the cycle (through rate rows) would be
        at step 0 either way, so that is refused.

        Returns ``{action: {source: {reached: at_end}}}`` with only the copies that move.
        """
        by_id = {c.id: c for c in self.copies}
        lengths = {name: t.length for name, t in self.model.tunnels.items()}
        clock: dict[str, dict[str, dict[str, str]]] = {}
        for action_id, rows in rates.items():
            for source_id in rows:
                source = by_id[source_id]
                if not source.steps:
                    continue
                start = dict(source.steps)
                reached = self._reached_within_cycle(rows, source, action_id)
                ends: dict[str, str] = {}
                for copy in reached:
                    steps = tuple(
                        (name, min(k + 1, lengths[name]) if start.get(name) == k else k)
                        for name, k in copy.steps
                    )
                    end = self.by_key[(copy.base, copy.values, steps)]
                    if end.id != copy.id:
                        ends[copy.id] = end.id
                if ends:
                    clock.setdefault(action_id, {})[source_id] = ends
        return clock

    def _reached_within_cycle(
        self, rows: Mapping[str, Mapping[str, ExpressionText]], source: StateCopy, action: str
    ) -> list[StateCopy]:
        """Copies reachable from ``source`` through rate rows of one action (itself too);
        reports a path that leaves a tunnel ``source`` is in at step 0 and comes back."""
        by_id = {c.id: c for c in self.copies}
        # (copy id, tunnels at step 0 that the path has left) -> search both at once.
        at_zero = frozenset(name for name, k in source.steps if k == 0)
        seen: set[tuple[str, frozenset[str]]] = {(source.id, frozenset())}
        queue = [(source.id, frozenset[str]())]
        reached = {source.id: source}
        while queue:
            copy_id, left = queue.pop()
            for target_id in rows.get(copy_id, {}):
                target = by_id[target_id]
                inside = {name for name, _ in target.steps}
                back = sorted(left & inside)
                if back:
                    self.add(
                        f"rates.{action}.{source.base}",
                        f"within one cycle the cohort starting in {source.id!r} (step 0 of "
                        f"tunnel {back[0]!r}) can leave the tunnel and come back through "
                        f"rate rows (reaching {target.id!r}), and would then be at step 0 "
                        "either way, so the step at the cycle end is not defined; expected "
                        "one of the rows on that path as a [transitions] row (e.g. "
                        f"[transitions.{action}.{target.base}] with chance_within(rate, "
                        'cycle_years) per exit and "rest")',
                    )
                    return list(reached.values())
                now_left = frozenset(left | (at_zero - inside))
                reached.setdefault(target.id, target)
                if (target.id, now_left) not in seen:
                    seen.add((target.id, now_left))
                    queue.append((target.id, now_left))
        return list(reached.values())

    def _derived_reading_copies(self) -> dict[str, str]:
        """``[derived]`` values that read an attribute or a tunnel, directly or through
        other derived values: name -> definition text. Each copy gets them written in."""
        reads = {name: _names(text) for name, text in self.model.derived.items()}
        found: set[str] = set(self.model.attributes) | set(self.model.tunnels)
        dependent: set[str] = set()
        changed = True
        while changed:
            changed = False
            for name, used in reads.items():
                if name not in dependent and used & (found | dependent):
                    dependent.add(name)
                    changed = True
        return {name: str(self.model.derived[name]) for name in dependent}

    def inline(self, value: ExpressionText) -> ExpressionText:
        """``value`` with the derived values that read attributes or tunnels written in."""
        from caredecide.expressions import substitute_names

        for _ in range(len(self.inlined) + 1):  # a loop of definitions is reported later
            hits = _names(value) & set(self.inlined)
            if not hits:
                break
            value = substitute_names(value, {name: self.inlined[name] for name in hits})
        return value

    def _start_copy(self, key: str, where: str) -> str | None:
        copies = self.matching(key, where)
        first = [c for c in copies if all(k == 0 for _, k in c.steps)]
        if len(first) > 1:
            self.add(
                where,
                f"{key!r} stands for {len(first)} states ({[c.id for c in first]}); "
                "expected one: name every attribute value",
            )
            return None
        return first[0].id if first else None

    def _check_reads(self, value: object, copy: StateCopy, where: str) -> None:
        """An expression may read only the attributes and tunnels of its own state."""
        declared = set(self.model.attributes) | set(self.model.tunnels)
        state = self.states[copy.base]
        for name in sorted(_names(value) & declared - {*state.attributes, *state.tunnels}):
            kind = "attribute" if name in self.model.attributes else "tunnel"
            message = (
                f"{value!r} reads {kind} {name!r}, which state {state.id!r} does not "
                f"{'vary by' if kind == 'attribute' else 'count'}; expected it in the "
                f"state's {kind}s list, or an expression without it"
            )
            if not any(p.where == where and p.message == message for p in self.problems):
                self.add(where, message)

    def _warn_unguarded(self, value: object, copy: StateCopy, where: str) -> None:
        """Warn when a tunnel read outside the tunnel is not told apart by its attribute."""
        if not isinstance(value, str):
            return
        active = {t for t, _ in copy.steps}
        for name in self.states[copy.base].tunnels:
            if name in active or not re.search(rf"\b{re.escape(name)}\b", value):
                continue
            guards = self.model.tunnels[name].only_for
            if any(re.search(rf"\b{re.escape(a)}\b", value) for a in guards):
                continue
            self.warnings.append(
                ModelWarningRecord(
                    where,
                    f"{value!r} reads {name!r} in {copy.id!r}, which is outside the tunnel "
                    f"(it reads 0 there); expected the expression to also read "
                    f"{sorted(guards)} to tell the copies apart",
                    {"tunnel": name, "state": copy.id},
                )
            )

    def _warn_beyond_length(self) -> None:
        """Warn when an expression compares a tunnel with a step it never reaches."""
        cells: list[tuple[str, object]] = []
        for state in self.model.states:
            cells += [
                (f"states.{state.id}.{f}", getattr(state, f)) for f in ("qaly_weight", "cost")
            ]
        for table_name in ("transitions", "rates", "moves", "under_action"):
            for action_id, rows in getattr(self.model, table_name, {}).items():
                for key, row in rows.items():
                    cells += [(f"{table_name}.{action_id}.{key}.{t}", v) for t, v in row.items()]
        cells += [(f"derived.{name}", text) for name, text in self.model.derived.items()]
        for where, value in cells:
            if not isinstance(value, str):
                continue
            for name, tunnel in self.model.tunnels.items():
                for step in _compared_steps(value, name, tunnel.length):
                    self.warnings.append(
                        ModelWarningRecord(
                            where,
                            f"{value!r} compares {name!r} with {step:g}, but its steps stop at "
                            f"{tunnel.length} ('{tunnel.length} or more'), so the comparison "
                            f"cannot tell them apart; expected tunnels.{name}.length >= {step:g}",
                            {"tunnel": name, "step": step},
                        )
                    )

    def _groups(self) -> dict[str, tuple[str, ...]]:
        groups: dict[str, tuple[str, ...]] = {"state": tuple(c.base for c in self.copies)}
        for name in self.model.attributes:
            groups[name] = tuple(dict(c.values).get(name, "") for c in self.copies)
        for name, tunnel in self.model.tunnels.items():
            groups[name] = tuple(
                _step_text(tunnel, dict(c.steps)[name]) if name in dict(c.steps) else ""
                for c in self.copies
            )
        return groups


def apply_rate_row_clock(P: Any, model: Model) -> None:
    """Move the cohort of rate rows inside tunnels to their step at the cycle end, in place.

    Parameters
    ----------
    P : ndarray, shape (D, Tp, A, S, S)
        Transition probabilities per cycle of the flat ``model``, rate rows already
        exponentiated (each row's cohort where it is after the cycle, tunnel steps as at
        the cycle start).
    model : Model
        The flat model (:func:`expand_model`); its ``rate_row_clock`` says, per action and
        source copy, which copy each reached copy becomes at the cycle end. Nothing
        happens when it is empty (no rate row inside a tunnel).
    """
    import numpy as np

    if not model.rate_row_clock:
        return
    actions = {a: i for i, a in enumerate(model.action_ids)}
    states = {s: i for i, s in enumerate(model.state_ids)}
    index = [
        (actions[a], states[source], states[reached], states[end])
        for a, rows in model.rate_row_clock.items()
        for source, ends in rows.items()
        for reached, end in ends.items()
    ]
    a, s, reached, end = (np.array(column, dtype=int) for column in zip(*index, strict=True))
    moving = P[:, :, a, s, reached]  # (D, Tp, n), a copy
    P[:, :, a, s, reached] = 0.0
    # Unbuffered sum (two reached copies could end in one); P's last three axes first.
    np.add.at(np.moveaxis(P, (2, 3, 4), (0, 1, 2)), (a, s, end), np.moveaxis(moving, -1, 0))


def _names(value: object) -> set[str]:
    """Names an expression reads (empty when it does not parse; parsing reports it)."""
    return set(_text_names(value)) if isinstance(value, str) else set()


@functools.lru_cache(maxsize=4096)
def _text_names(text: str) -> frozenset[str]:
    """:func:`_names` of one text, parsed once: every copy of a state asks again for the
    names its declared expressions read (thousands of copies in a large expansion)."""
    from caredecide.errors import ExpressionError
    from caredecide.expressions import parse_expression

    try:
        return frozenset(parse_expression(text).names)
    except ExpressionError:
        return frozenset()


_FLIPPED = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "==": "==", "!=": "!="}


def _compared_steps(text: str, name: str, length: int) -> list[float]:
    """Steps a comparison of ``name`` with a number needs beyond the tunnel's ``length``.

    ``name >= v`` (or ``<``, ``==``, ``!=``) tells steps apart only if step ``v`` exists
    (``v <= length``); ``name > v`` (or ``<=``) only if step ``v + 1`` does. Returns the step
    each comparison would need, where it exceeds ``length``.
    """
    number = r"([0-9]+(?:\.[0-9]*)?)"
    operator = r"(<=|>=|==|!=|<|>)"
    found = [
        (op, float(v))
        for op, v in re.findall(rf"\b{re.escape(name)}\s*{operator}\s*{number}", text)
    ]
    found += [
        (_FLIPPED[op], float(v))
        for v, op in re.findall(rf"(?<![\w.]){number}\s*{operator}\s*{re.escape(name)}\b", text)
    ]
    needed = [v + 1 if op in (">", "<=") else v for op, v in found]
    return [n for n in needed if n > length]


def _step_id(tunnel: Tunnel, k: int) -> str:
    return f"{tunnel.name}_{k}plus" if k == tunnel.length else f"{tunnel.name}_{k}"


def _step_text(tunnel: Tunnel, k: int) -> str:
    return f"{k}+" if k == tunnel.length else str(k)


def _suggest(name: str, candidates: Iterable[str]) -> str:
    close = difflib.get_close_matches(name, sorted(candidates), n=3, cutoff=0.6)
    return f" (did you mean {', '.join(repr(c) for c in close)}?)" if close else ""


__all__ = [
    "MAX_EXPANDED_STATES",
    "SEPARATOR",
    "Expansion",
    "StateAttribute",
    "StateCopy",
    "Tunnel",
    "apply_rate_row_clock",
    "expand",
    "expand_model",
    "uses_expansion",
]
