"""Model files: structural checks and full validation of a :class:`~caredecide.model.Model`.

Validation has two layers: :func:`structural_problems` (references, ranges, required
fields; no arithmetic) and the numerical checks of :func:`caredecide.compile.compile_model`
on the base case (probabilities in [0, 1], rows summing to 1, NaN, negative costs).
:func:`validate_model` runs both and returns the warnings.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace

import numpy as np

from caredecide.compiled import WITHIN_CYCLE_METHODS, CompiledModel
from caredecide.errors import (
    DistributionError,
    ModelError,
    ModelWarningRecord,
    Problem,
)
from caredecide.expressions import did_you_mean
from caredecide.model import (
    ALL_STATES,
    FORMAT_VERSION,
    OBJECTIVES,
    PARAMETER_KINDS,
    Model,
)
from caredecide.modelfile.advisories import (
    bound_problems,
    distribution_problems,
    repeated_charge_warnings,
    unused_derived_warnings,
    unused_parameter_warnings,
)
from caredecide.upgrade import PREVIOUS_FORMAT_VERSION, previous_format_warning

ROW_TOLERANCE = 1e-9
IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


# =====================================================================================
# Validation
# =====================================================================================
def structural_problems(model: Model) -> list[Problem]:
    """Every problem that needs no arithmetic: fields, ranges, references, rows.

    Returns
    -------
    list of Problem
        Empty when the model is structurally sound.
    """
    problems: list[Problem] = []

    def add(where: str, message: str) -> None:
        problems.append(Problem(where, message))

    if model.format_version not in (FORMAT_VERSION, PREVIOUS_FORMAT_VERSION):
        add("format", f"unknown format version {model.format_version!r}; expected {FORMAT_VERSION}")
    if not model.title.strip():
        add("title", "is empty; give the model a title")
    _check_settings(model, add)
    _check_states_and_actions(model, add)
    _check_rows(model, add)
    _check_moves(model, add)
    _check_under_action(model, add)
    _check_parameters(model, add)
    problems.extend(distribution_problems(model))
    problems.extend(bound_problems(model))
    _check_mortality(model, add)
    return problems


def _finite(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _check_settings(model: Model, add) -> None:
    s = model.settings
    state_ids = set(model.state_ids)
    if not (_finite(s.cycle_years) and s.cycle_years > 0):
        add("settings.cycle_years", f"{s.cycle_years!r}; expected a cycle length in years > 0")
    given = [
        name
        for name, present in (
            ("horizon_cycles", s.horizon_cycles is not None),
            ("until_age", s.until_age is not None),
            ('horizon = "infinite"', s.infinite_horizon),
        )
        if present
    ]
    if len(given) != 1:
        add(
            "settings",
            f"the horizon is given by {given or 'nothing'}; expected exactly one of "
            'horizon_cycles, until_age or horizon = "infinite"',
        )
    if s.horizon_cycles is not None and s.horizon_cycles < 1:
        add("settings.horizon_cycles", f"{s.horizon_cycles!r}; expected a whole number >= 1")
    if not _finite(s.start_age) or s.start_age < 0:
        add("settings.start_age", f"{s.start_age!r}; expected an age in years >= 0")
    if s.until_age is not None and _finite(s.start_age):
        if not _finite(s.until_age) or s.until_age <= s.start_age:
            add(
                "settings.until_age",
                f"{s.until_age!r}; expected an age greater than start_age = {s.start_age!r}",
            )
    for key in ("discount_outcomes", "discount_costs"):
        value = getattr(s, key)
        if not (_finite(value) and 0.0 <= value < 1.0):
            add(f"settings.{key}", f"{value!r}; expected an annual rate in [0, 1) (e.g. 0.035)")
    if s.objective not in OBJECTIVES:
        add("settings.objective", f"{s.objective!r}; expected one of {list(OBJECTIVES)}")
    if not (_finite(s.willingness_to_pay) and s.willingness_to_pay >= 0):
        add("settings.willingness_to_pay", f"{s.willingness_to_pay!r}; expected a number >= 0")
    if s.within_cycle not in WITHIN_CYCLE_METHODS:
        add("settings.within_cycle", f"{s.within_cycle!r}; expected one of {WITHIN_CYCLE_METHODS}")
    for state_id in s.severity_order:
        if state_id not in state_ids:
            add(
                "settings.severity_order",
                _unknown("state", state_id, state_ids),
            )
    if isinstance(s.start, str):
        if s.start not in state_ids:
            add(
                "settings.start",
                _unknown("state", s.start, state_ids),
            )
    else:
        for state_id, share in s.start.items():
            if state_id not in state_ids:
                add(
                    f"settings.start.{state_id}",
                    _unknown("state", state_id, state_ids, named=False),
                )
            if not (_finite(share) and 0.0 <= share <= 1.0):
                add(f"settings.start.{state_id}", f"share {share!r}; expected a number in [0, 1]")
        total = math.fsum(s.start.values())
        if abs(total - 1.0) > ROW_TOLERANCE:
            add("settings.start", f"shares sum to {total!r}; expected 1")
    # A cohort that starts wholly in absorbing states never meets a decision.
    absorbing = {state.id for state in model.states if state.absorbing}
    start = {s.start: 1.0} if isinstance(s.start, str) else dict(s.start)
    if (
        start
        and set(start) <= state_ids
        and all(
            state_id in absorbing
            for state_id, share in start.items()
            if _finite(share) and share > 0
        )
    ):
        add(
            "settings.start",
            f"{s.start!r}: the whole cohort starts in absorbing states "
            f"{sorted(absorbing & set(start))}; expected some of it in a state where a "
            "decision is made",
        )


def _check_ids(kind: str, ids: list[str], add) -> None:
    seen: set[str] = set()
    for i, item in enumerate(ids):
        if not IDENTIFIER.match(item):
            add(
                f"{kind}[{i}].id",
                f"{item!r}; expected letters, digits and _ (not starting with a digit)",
            )
        if item in seen:
            add(f"{kind}.{item}", f"id {item!r} is used twice; ids must be unique")
        seen.add(item)


def _check_states_and_actions(model: Model, add) -> None:
    state_ids = list(model.state_ids)
    if not state_ids:
        add("states", "the model has no [[states]]")
    if not model.actions:
        add("actions", "the model has no [[actions]]")
    _check_ids("states", state_ids, add)
    _check_ids("actions", list(model.action_ids), add)
    absorbing = {s.id for s in model.states if s.absorbing}
    for action in model.actions:
        if isinstance(action.allowed_in, str) and action.allowed_in != ALL_STATES:
            add(
                f"actions.{action.id}.allowed_in",
                f'{action.allowed_in!r}; expected a list or "all"',
            )
            continue
        if isinstance(action.allowed_in, str):
            continue
        for state_id in action.allowed_in:
            if state_id not in state_ids:
                add(
                    f"actions.{action.id}.allowed_in",
                    _unknown("state", state_id, state_ids),
                )
            elif state_id in absorbing:
                add(
                    f"actions.{action.id}.allowed_in",
                    f"state {state_id!r} is absorbing: no decision is made there; remove it",
                )
    allowed_somewhere = {s for a in model.actions for s in model.allowed_states(a)}
    for state in model.states:
        if not state.absorbing and state.id not in allowed_somewhere:
            add(
                f"states.{state.id}",
                "no action is allowed in this state; expected at least one action whose "
                'allowed_in lists it (or allowed_in = "all")',
            )


def _check_rows(model: Model, add) -> None:
    from caredecide.expressions import REST_KEYWORD

    state_ids = set(model.state_ids)
    action_ids = set(model.action_ids)
    absorbing = {s.id for s in model.states if s.absorbing}
    allowed = {a.id: set(model.allowed_states(a)) for a in model.actions}
    for table_name, table in (("transitions", model.transitions), ("rates", model.rates)):
        for action_id, rows in table.items():
            if action_id not in action_ids:
                add(
                    f"{table_name}.{action_id}",
                    _unknown("action", action_id, action_ids, named=False),
                )
                continue
            for from_id, row in rows.items():
                where = f"{table_name}.{action_id}.{from_id}"
                if from_id not in state_ids:
                    add(
                        where,
                        _unknown("state", from_id, state_ids),
                    )
                    continue
                for to_id in row:
                    if to_id not in state_ids:
                        add(
                            f"{where}.{to_id}",
                            _unknown("state", to_id, state_ids),
                        )
                if from_id in absorbing:
                    exits = [k for k in row if k != from_id]
                    if exits:
                        add(
                            where,
                            f"state {from_id!r} is absorbing but has exits {exits}; an absorbing "
                            "state keeps the whole cohort (remove the row or absorbing = true)",
                        )
                    continue
                if from_id not in allowed[action_id]:
                    add(
                        where,
                        f"action {action_id!r} is not allowed in {from_id!r}; add the state to "
                        "its allowed_in or remove this row",
                    )
                rests = [
                    k for k, v in row.items() if isinstance(v, str) and v.strip() == REST_KEYWORD
                ]
                if len(rests) > 1:
                    add(
                        where,
                        f"{len(rests)} entries use {REST_KEYWORD!r} ({rests}); at most one may",
                    )
                if table_name == "rates":
                    if from_id in row:
                        add(
                            f"{where}.{from_id}",
                            "a rate row lists its own state; give exit rates only",
                        )
                    if from_id in model.transitions.get(action_id, {}):
                        add(
                            where,
                            "the row is given both by [rates] and by [transitions]; keep one",
                        )
    for action in model.actions:
        for state_id in model.allowed_states(action):
            if state_id in absorbing or state_id not in state_ids:
                continue
            given = state_id in model.transitions.get(action.id, {}) or state_id in model.rates.get(
                action.id, {}
            )
            if not given and not moves_everyone(model, action.id, state_id):
                add(
                    f"transitions.{action.id}.{state_id}",
                    f"missing row: action {action.id!r} is allowed in {state_id!r}; expected "
                    f"[transitions.{action.id}.{state_id}] (or [rates.{action.id}.{state_id}])",
                )


def _check_parameters(model: Model, add) -> None:
    from caredecide.distributions import distribution_from_spec
    from caredecide.expressions import RESERVED_NAMES

    members_seen: dict[str, str] = {}
    for group in model.groups.values():
        w = f"groups.{group.name}"
        if not group.source.strip():
            add(f"{w}.source", "missing source; every estimate must say where it comes from")
        if len(group.members) != len(group.counts) or len(group.members) < 2:
            add(
                w,
                f"{len(group.members)} members and {len(group.counts)} counts; expected the same "
                "number, at least 2",
            )
        if (
            any(not _finite(c) or c < 0 for c in group.counts)
            or not sum(group.counts) + group.prior > 0
        ):
            add(f"{w}.counts", f"{list(group.counts)}; expected counts >= 0 with a positive total")
        if not _finite(group.prior) or group.prior < 0:
            add(f"{w}.prior", f"{group.prior!r}; expected a number >= 0")
        for member in group.members:
            if member in model.parameters:
                add(
                    f"{w}.members",
                    f"{member!r} is also declared in [parameters]; a group member takes its "
                    "value from the counts, so remove the [parameters] entry",
                )
            if member in members_seen:
                add(
                    f"{w}.members",
                    f"{member!r} is already a member of group {members_seen[member]!r}",
                )
            members_seen[member] = group.name
            _check_name(member, f"{w}.members", add, RESERVED_NAMES)
    for name, p in model.parameters.items():
        w = f"parameters.{name}"
        _check_name(name, w, add, RESERVED_NAMES)
        if not p.source or not p.source.strip():
            add(f"{w}.source", "missing source; every parameter must say where it comes from")
        if p.kind not in PARAMETER_KINDS:
            add(f"{w}.kind", f"{p.kind!r}; expected one of {list(PARAMETER_KINDS)}")
        if not _finite(p.value):
            add(f"{w}.value", f"{p.value!r}; expected a finite number")
            continue
        if p.kind == "probability" and not 0.0 <= p.value <= 1.0:
            add(f"{w}.value", f"{p.value!r}; a probability must be in [0, 1]")
        if (
            p.kind in ("rate", "relative_risk", "hazard_ratio", "odds_ratio", "count")
            and p.value < 0
        ):
            add(f"{w}.value", f"{p.value!r}; a {p.kind} must be >= 0")
        if p.per_years is not None and not (_finite(p.per_years) and p.per_years > 0):
            add(f"{w}.per_years", f"{p.per_years!r}; expected a period in years > 0")
        for key in ("low", "high"):
            bound = getattr(p, key)
            if bound is not None and not _finite(bound):
                add(f"{w}.{key}", f"{bound!r}; expected a finite number")
        if (
            p.low is not None
            and p.high is not None
            and _finite(p.low)
            and _finite(p.high)
            and not p.low <= p.value <= p.high
        ):
            add(w, f"value {p.value!r} lies outside [low, high] = [{p.low!r}, {p.high!r}]")
        if p.distribution is not None:
            try:
                distribution_from_spec(p.distribution, where=f"{w}.distribution")
            except DistributionError as error:
                add(f"{w}.distribution", _strip_where(str(error), f"{w}.distribution"))


def moves_everyone(model: Model, action_id: str, state_id: str) -> bool:
    """True when ``[moves.<action>.<state>]`` moves the whole cohort elsewhere (no share
    stays), so the state needs no row of its own under the action."""
    row = model.moves.get(action_id, {}).get(state_id)
    return row is not None and state_id not in row


def _check_moves(model: Model, add) -> None:
    """``[moves.<action>.<from>]``: known names, the action allowed in ``from``, one "rest",
    and rows that exist for the cycle after the move (no chained moves)."""
    from caredecide.expressions import REST_KEYWORD

    state_ids = set(model.state_ids)
    absorbing = {s.id for s in model.states if s.absorbing}
    by_id = {a.id: a for a in model.actions}
    allowed_in = {a.id: set(model.allowed_states(a)) for a in model.actions}
    for action_id, rows in model.moves.items():
        if action_id not in by_id:
            add(f"moves.{action_id}", _unknown("action", action_id, by_id, named=False))
            continue
        for from_id, row in rows.items():
            where = f"moves.{action_id}.{from_id}"
            if from_id not in state_ids:
                add(where, _unknown("state", from_id, state_ids))
                continue
            if from_id in absorbing or from_id not in allowed_in[action_id]:
                add(
                    where,
                    f"action {action_id!r} is not allowed in {from_id!r}, so it cannot move the "
                    f"cohort from there; expected a state of its allowed_in "
                    f"{sorted(allowed_in[action_id])}",
                )
                continue
            rests = [k for k, v in row.items() if isinstance(v, str) and v.strip() == REST_KEYWORD]
            if len(rests) > 1:
                add(where, f"{len(rests)} entries use {REST_KEYWORD!r} ({rests}); at most one may")
            for to_id in row:
                if to_id not in state_ids:
                    add(f"{where}.{to_id}", _unknown("state", to_id, state_ids))
                    continue
                if to_id == from_id or to_id in absorbing:
                    continue
                if to_id in rows:
                    add(
                        f"{where}.{to_id}",
                        f"{to_id!r} is itself moved by {action_id!r}; a decision moves the "
                        "cohort once, expected a destination without a move of its own",
                    )
                    continue
                there = [a.id for a in model.actions if to_id in allowed_in[a.id]]
                if action_id not in there and len(there) != 1:
                    add(
                        f"{where}.{to_id}",
                        f"after the move the cycle's transitions are those of {to_id!r} under "
                        f"{action_id!r}, which is not allowed there, and {to_id!r} allows "
                        f"{sorted(there)}; expected {action_id!r} allowed in {to_id!r}, or a "
                        "single action there",
                    )


def _check_under_action(model: Model, add) -> None:
    """``[under_action.<action>.<state>]``: known action and state, keys cost and
    qaly_weight_change."""
    keys = ("cost", "qaly_weight_change")
    state_ids = set(model.state_ids)
    action_ids = set(model.action_ids)
    for action_id, rows in model.under_action.items():
        if action_id not in action_ids:
            add(f"under_action.{action_id}", _unknown("action", action_id, action_ids, named=False))
            continue
        for state_id, fields in rows.items():
            where = f"under_action.{action_id}.{state_id}"
            if state_id not in state_ids:
                add(where, _unknown("state", state_id, state_ids))
                continue
            for key in fields:
                if key not in keys:
                    add(f"{where}.{key}", f"unknown field {key!r}; expected one of {keys}")


def _unknown(kind: str, name: str, known, *, named: bool = True) -> str:
    """``unknown state 'x' (did you mean y?); states are [...]`` (the name left out when
    the table path already shows it)."""
    shown = f" {name!r}" if named else ""
    return f"unknown {kind}{shown}{did_you_mean(name, known)}; {kind}s are {sorted(known)}"


def _check_name(name: str, where: str, add, reserved) -> None:
    if not IDENTIFIER.match(name):
        add(where, f"name {name!r}; expected letters, digits and _ (not starting with a digit)")
    if name in reserved:
        add(where, f"name {name!r} is reserved (the model supplies it); choose another name")


def _strip_where(message: str, where: str) -> str:
    return message[len(where) + 2 :] if message.startswith(f"{where}: ") else message


def _check_mortality(model: Model, add) -> None:
    spec = model.mortality
    if spec is None:
        return
    if spec.gompertz_makeham is not None:
        a, b, c = spec.gompertz_makeham
        w = "mortality.gompertz_makeham"
        if not (_finite(a) and a >= 0):
            add(f"{w}.a", f"{a!r}; expected an age-independent hazard >= 0 per year")
        if not (_finite(b) and b > 0):
            add(f"{w}.b", f"{b!r}; expected a number > 0")
        if not (_finite(c) and c > 1):
            add(f"{w}.c", f"{c!r}; expected a number > 1 (hazard rising with age)")
    elif spec.table_ages:
        first = spec.table_ages[0]
        if model.settings.start_age < first:
            add(
                "mortality.table",
                f"the life table starts at age {first:g}, after start_age = "
                f"{model.settings.start_age:g}; expected it to cover the start age",
            )
    elif not spec.table:
        add("mortality", "give a life table or gompertz_makeham constants")


def _check_time_use(model: Model, parsed, add) -> None:
    """Infinite horizons need stationary arrays; background needs [mortality]."""
    from caredecide.compile import TIME_NAMES

    for entry in parsed.all_entries():
        used = entry.expression.names
        if model.settings.infinite_horizon and used & TIME_NAMES:
            add(
                entry.where,
                f"{entry.expression.source!r} uses {sorted(used & TIME_NAMES)}, but "
                'horizon = "infinite" needs a stationary model; use horizon_cycles or until_age',
            )
        if "background" in used and model.mortality is None:
            add(
                entry.where,
                f"{entry.expression.source!r} uses 'background' but the model has no [mortality] "
                "section; expected [mortality] with a table or gompertz_makeham",
            )


@dataclass(frozen=True)
class ValidatedModel:
    """A model that passed every check: its warnings and its compiled base case.

    Attributes
    ----------
    warnings : list of ModelWarningRecord
    compiled : CompiledModel
        The base case (one draw), compiled once during validation: pass it on to the
        analysis instead of compiling again.
    """

    warnings: list[ModelWarningRecord]
    compiled: CompiledModel


def validate_model(model: Model) -> list[ModelWarningRecord]:
    """Check a model completely; return its warnings (see :func:`validate_and_compile`)."""
    return validate_and_compile(model).warnings


def validate_and_compile(model: Model) -> ValidatedModel:
    """Check a model completely; return warnings and the compiled base case, or raise.

    Runs the structural checks, parses every expression, then compiles the base case
    (which checks probabilities, rows, NaN and costs at every cycle).

    Returns
    -------
    ValidatedModel
        ``warnings``: suspicious but allowed values (QALY weights above 1, death
        probabilities below background mortality, estimates used in a row of another
        unit with no conversion); ``compiled``: the base case, so no caller compiles twice.

    Raises
    ------
    ModelError
        With one :class:`Problem` per finding, each naming the file and table path.
    """
    from caredecide.compile import compile_model, parse_model_expressions
    from caredecide.expand import expand

    file = model.file_label
    expansion = expand(model)  # attributes and tunnels -> flat states; raises on bad ones
    model = expansion.model
    problems = structural_problems(model)
    parsed = parse_model_expressions(model)
    problems += parsed.problems
    _check_time_use(model, parsed, lambda w, m: problems.append(Problem(w, m)))
    from caredecide.modelfile.overrides import scenario_problems

    problems += scenario_problems(model)
    if problems:
        raise ModelError(problems, file=file)
    # The flat model compiles to the same arrays; keep where each generated state comes from.
    compiled = replace(compile_model(model), state_groups=expansion.groups)
    records = [previous_format_warning()] if model.format_version == PREVIOUS_FORMAT_VERSION else []
    records += expansion.warnings
    used = {name for entry in parsed.all_entries() for name in entry.expression.names}
    warnings = (
        records
        + _unit_warnings(model, parsed)
        + cycle_meaning_warnings(model, parsed)
        + _warnings(model, compiled)
        + repeated_charge_warnings(model, compiled)
        + unused_parameter_warnings(model, used)
        + unused_derived_warnings(model, parsed.derived_used)
    )
    return ValidatedModel(warnings, compiled)


def cycle_meaning_warnings(model: Model, parsed) -> list[ModelWarningRecord]:
    """Occupancy rewards that depend on ``cycle``, ``years`` or ``age``: say what they mean.

    A cost or QALY weight of cycle ``t`` sees ``cycle = t`` (age at the start of the cycle)
    and, with any method but ``start``, is also counted on the cohort at the END of cycle
    ``t``. Format 1 evaluated these at boundaries (``cycle`` the boundary index), so a
    format-1 file that uses them with such a method may have been written for the other
    meaning (off by one cycle at the end of each cycle): warn there.
    """
    method = model.settings.within_cycle
    if method == "start" or model.format_version != PREVIOUS_FORMAT_VERSION:
        return []
    records = []
    entries = (*parsed.state_qaly, *parsed.state_cost, *parsed.under_cost, *parsed.under_qaly)
    for entry in entries:
        used = sorted(entry.expression.names & {"cycle", "years", "age"})
        if used:
            records.append(
                ModelWarningRecord(
                    entry.where,
                    f"{entry.expression.source!r} uses {', '.join(used)}, which format 1 read "
                    "at cycle boundaries; now cycle = t is the "
                    f"cycle the value belongs to (age at its start), and with within_cycle = "
                    f"{method!r} it is also counted on the cohort at the end of that cycle "
                    "(boundary t + 1); 'cycle < 2' means the first two cycles, not boundaries "
                    "0 and 1",
                    {"names": used, "within_cycle": method},
                )
            )
    return records


def _unit_warnings(model: Model, parsed) -> list[ModelWarningRecord]:
    """Published estimates used in a row of the wrong unit, with no conversion at all.

    A rate per year written straight into a probability row, a probability written
    straight into a rate row, or a probability over ``per_years`` years used as the
    per-cycle probability of a cycle of another length: each is a common slip when
    copying figures from a paper (Fleurence & Hollenbeak 2007). Only expressions that
    call no function are flagged, so ``chance_within(r, cycle_years)``, ``exp(-r)`` or
    ``per_cycle(p, 5)`` never are; nor is a rate or probability combined with one of the
    row's own unit (``r_event * p_fatal`` splits a rate by a conditional probability).
    """
    records: list[ModelWarningRecord] = []
    cycle = model.settings.cycle_years
    for entries, row_unit in ((parsed.transitions, "probability"), (parsed.rates, "rate")):
        for entry in entries:
            if entry.expression.functions:
                continue
            names = sorted(entry.expression.names & set(model.parameters))
            kinds = {model.parameters[name].kind for name in names}
            for name in names:
                p = model.parameters[name]
                if row_unit == "probability" and p.kind == "rate" and "probability" not in kinds:
                    message = (
                        f"rate parameter {name!r} is used as a probability per cycle; "
                        f"expected chance_within({name}, cycle_years)"
                    )
                elif row_unit == "rate" and p.kind == "probability" and "rate" not in kinds:
                    years = p.per_years if p.per_years is not None else cycle
                    message = (
                        f"probability parameter {name!r} is used as a rate per year; "
                        f"expected rate_behind({name}, {years:g})"
                    )
                elif (
                    row_unit == "probability"
                    and p.kind == "probability"
                    and p.per_years is not None
                    and not math.isclose(p.per_years, cycle, rel_tol=1e-12)
                ):
                    message = (
                        f"{name!r} is a probability over {p.per_years:g} years, used as the "
                        f"probability per cycle of {cycle:g} years; expected "
                        f"per_cycle({name}, {p.per_years:g})"
                    )
                else:
                    continue
                records.append(ModelWarningRecord(entry.where, message, {"parameter": name}))
    return records


def _warnings(model: Model, compiled) -> list[ModelWarningRecord]:
    from caredecide.mortality import background_probability

    records: list[ModelWarningRecord] = []
    weights = compiled.state_qaly[0] / compiled.cycle_length  # (Tq, S)
    for s in np.flatnonzero((weights > 1.0 + 1e-12).any(axis=0)):
        records.append(
            ModelWarningRecord(
                f"states.{model.state_ids[s]}.qaly_weight",
                f"QALY weight {weights[:, s].max():g} is above 1 (better than full health)",
                {"value": float(weights[:, s].max())},
            )
        )
    records += _life_table_warnings(model)
    # Death = absorbing states where no life-years accrue.
    dead = compiled.absorbing & ~np.array([s.alive for s in model.states])
    if model.mortality is None or not dead.any():
        return records
    n = compiled.n_cycles or 1
    ages = compiled.start_age + compiled.cycle_length * np.arange(n)
    background = background_probability(model.mortality, ages, compiled.cycle_length)  # (T,)
    death = _entering(compiled, dead)  # (Tp, A, S)
    shortfall = death < background[:, None, None] - 1e-12  # (T, A, S)
    rows = compiled.allowed.T & ~compiled.absorbing[None, :]  # (A, S)
    # Rows given by rates are skipped: a competing exit lowers the in-cycle death
    # probability below 1 - exp(-background rate) without anything being wrong.
    for action_id, rate_rows in model.rates.items():
        for from_id in rate_rows:
            if action_id in model.action_ids and from_id in model.state_ids:
                rows[model.action_ids.index(action_id), model.state_ids.index(from_id)] = False
    for a, s in np.argwhere(shortfall.any(axis=0) & rows):
        t = int(np.flatnonzero(shortfall[:, a, s])[0])
        records.append(
            ModelWarningRecord(
                f"transitions.{model.action_ids[a]}.{model.state_ids[s]}",
                f"death probability {death[min(t, death.shape[0] - 1), a, s]:.6g} at age "
                f"{ages[t]:g} is below background mortality {background[t]:.6g}",
                {"age": float(ages[t])},
            )
        )
    return records


def _entering(compiled, targets: np.ndarray) -> np.ndarray:
    """(Tp, A, S) probability of entering the ``targets`` (S,) bool states from each row,
    first draw, in either form of the transitions (dense, or the sparse rows of
    ``compiled.sparse_transition``, whose dense ``transition`` is a NaN stand-in)."""
    held = compiled.sparse_transition
    if held is None:
        return compiled.transition[0][:, :, :, targets].sum(axis=-1)
    _, tp, A, S, _ = held.shape
    rows = np.repeat(np.arange(A * S), np.diff(held.indptr))  # (nnz,) row a S + s
    slots = np.flatnonzero(targets[held.indices])
    keys = (np.arange(tp)[:, None] * (A * S) + rows[slots][None, :]).reshape(-1)
    sums = np.bincount(keys, weights=held.values[0][:, slots].reshape(-1), minlength=tp * A * S)
    return sums.reshape(tp, A, S)


def _life_table_warnings(model: Model) -> list[ModelWarningRecord]:
    """A life table that stops before the model does (its last hazard is carried on)."""
    spec = model.mortality
    n = model.n_cycles()
    if spec is None or not spec.table_ages or n is None or spec.table_probabilities[-1] >= 1.0:
        return []
    last = spec.table_ages[-1]
    end = model.settings.start_age + n * model.settings.cycle_years
    if end <= last + 1.0 + 1e-9:
        return []
    return [
        ModelWarningRecord(
            "mortality.table",
            f"the life table {spec.table!r} ends at age {last:g} but the model runs to age "
            f"{end:g}; from age {last + 1:g} on it keeps the hazard of its last row "
            f"(q = {spec.table_probabilities[-1]:g}); expected a table to age {end:g} or a "
            "last row of 1",
            {"last_age": last, "end_age": end},
        )
    ]
