"""Model files (TOML): read text or a file into a :class:`~caredecide.model.Model`.

The format is ours and documented field by field in ``docs/model-file.md``. Reading is
done with :mod:`tomllib`, never with ``eval``: expressions stay text until
:mod:`caredecide.expressions` parses them into a restricted tree. Files are data with a
size limit (:data:`caredecide.limits.MAX_MODEL_BYTES`). Every problem is reported at once.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from caredecide.errors import (
    ModelError,
    Problem,
)
from caredecide.guarded import check_data_depth, check_nesting, check_text_size, read_limited_text
from caredecide.limits import MAX_MODEL_BYTES
from caredecide.model import (
    ALL_STATES,
    FORMAT_VERSION,
    Action,
    DirichletGroup,
    Model,
    MortalitySpec,
    Parameter,
    Scenario,
    Settings,
    State,
    StateAttribute,
    Tunnel,
)
from caredecide.modelfile.validator import validate_model
from caredecide.upgrade import PREVIOUS_FORMAT_VERSION, renamed_data

_MISSING = object()

TOP_KEYS = (
    "format",
    "title",
    "description",
    "settings",
    "states",
    "actions",
    "transitions",
    "rates",
    "moves",
    "under_action",
    "parameters",
    "groups",
    "mortality",
    "attributes",
    "tunnels",
    "derived",
    "scenarios",
)
SETTINGS_KEYS = (
    "cycle_years",
    "horizon_cycles",
    "until_age",
    "horizon",
    "start_age",
    "start",
    "discount_outcomes",
    "discount_costs",
    "objective",
    "willingness_to_pay",
    "within_cycle",
    "currency",
    "severity_order",
)
STATE_KEYS = (
    "id",
    "label",
    "qaly_weight",
    "cost",
    "absorbing",
    "alive",
    "negative_cost_allowed",
    "attributes",
    "tunnels",
)
ACTION_KEYS = ("id", "label", "allowed_in", "oneoff_cost", "oneoff_qaly_loss", "cost_per_cycle")
PARAMETER_KEYS = (
    "value",
    "kind",
    "per_years",
    "low",
    "high",
    "distribution",
    "source",
    "label",
    "note",
)
GROUP_KEYS = ("members", "counts", "prior", "source", "note")
MORTALITY_KEYS = ("table", "gompertz_makeham", "source")
ATTRIBUTE_KEYS = ("values", "label")
TUNNEL_KEYS = ("length", "only_for", "label")


# =====================================================================================
# Reading
# =====================================================================================
class _Reader:
    """Typed access to TOML tables that records a Problem instead of failing early."""

    def __init__(self) -> None:
        self.problems: list[Problem] = []

    def problem(self, where: str, message: str) -> None:
        self.problems.append(Problem(where, message))

    def table(self, value: object, where: str, keys: tuple[str, ...] | None) -> dict[str, Any]:
        if not isinstance(value, Mapping):
            self.problem(where, f"expected a table, got {value!r}")
            return {}
        if keys is not None:
            for key in value:
                if key not in keys:
                    self.problem(
                        f"{where}.{key}" if where else key,
                        f"unknown field {key!r}; expected one of {list(keys)}",
                    )
        return dict(value)

    def get(self, table: Mapping, key: str, where: str, default: Any = _MISSING) -> Any:
        if key in table:
            return table[key]
        if default is _MISSING:
            self.problem(_join(where, key), "is required but missing")
            return None
        return default

    def number(self, table: Mapping, key: str, where: str, default: Any = _MISSING) -> Any:
        value = self.get(table, key, where, default)
        if value is None or value is default:
            return value
        if isinstance(value, bool) or not isinstance(value, int | float):
            self.problem(_join(where, key), f"{value!r} is not a number")
            return None if default is _MISSING else default
        return float(value)

    def integer(self, table: Mapping, key: str, where: str, default: Any = _MISSING) -> Any:
        value = self.get(table, key, where, default)
        if value is None or value is default:
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            self.problem(_join(where, key), f"{value!r} is not a whole number")
            return None
        return value

    def text(self, table: Mapping, key: str, where: str, default: Any = _MISSING) -> Any:
        value = self.get(table, key, where, default)
        if value is None or value is default:
            return value
        if not isinstance(value, str):
            self.problem(_join(where, key), f"{value!r} is not text; expected a quoted string")
            return "" if default is _MISSING else default
        return value

    def boolean(self, table: Mapping, key: str, where: str, default: Any = _MISSING) -> Any:
        value = self.get(table, key, where, default)
        if value is not None and not isinstance(value, bool):
            self.problem(_join(where, key), f"{value!r} is not true or false")
            return default if default is not _MISSING else False
        return value

    def expression(self, table: Mapping, key: str, where: str, default: float = 0.0) -> Any:
        value = table.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int | float | str):
            self.problem(_join(where, key), f"{value!r} is not a number or expression text")
            return default
        return float(value) if not isinstance(value, str) else value

    def text_list(self, table: Mapping, key: str, where: str) -> tuple[str, ...]:
        value = table.get(key, [])
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            self.problem(_join(where, key), f"{value!r} is not a list of ids")
            return ()
        return tuple(value)


def _join(where: str, key: str) -> str:
    return f"{where}.{key}" if where else key


def _syntax_problem(error: tomllib.TOMLDecodeError) -> Problem:
    message = str(error)
    match = re.search(r"\(at line (\d+), column (\d+)\)", message)
    line = int(match.group(1)) if match else None
    return Problem("", f"TOML syntax error: {message}", line=line)


def loads_model(
    text: str,
    *,
    file: str = "<text>",
    base_dir: Path | str | None = None,
    validate: bool = True,
) -> Model:
    """Read a model from TOML text.

    Parameters
    ----------
    text : str
        The model file's content.
    file : str
        Name used in messages (and ``Model.source_path``).
    base_dir : path, optional
        Folder that relative paths (the life table) are resolved against; default:
        the folder of ``file`` when it exists, else the working directory.
    validate : bool
        Run :func:`validate_model` (raise on any problem). ``False`` only checks that
        the file can be read into a :class:`Model` (useful for an editor).

    Raises
    ------
    ModelError
        Listing every problem found, each naming the file and table path.
    """
    check_text_size(text, MAX_MODEL_BYTES, file=file, what="a model file (.toml)")
    check_nesting(text, file=file)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise ModelError(_syntax_problem(error), file=file) from None
    except (ValueError, RecursionError) as error:  # e.g. an integer of 5,000 digits
        raise ModelError(
            f"TOML value cannot be read ({error}); expected a model file of ordinary values",
            file=file,
        ) from None
    check_data_depth(data, file=file)
    if base_dir is None:
        parent = Path(file).parent
        base_dir = parent if file != "<text>" and parent.is_dir() else Path.cwd()
    model, problems = _build_model(data, Path(base_dir))
    source_path = Path(file) if file != "<text>" else None
    if problems:
        raise ModelError(problems, file=file)
    model = _with_source(model, source_path)
    if validate:
        validate_model(model)
    return model


def load_model(path: Path | str, *, validate: bool = True) -> Model:
    """Read and validate a model file (relative paths inside resolve against its folder)."""
    path = Path(path)
    text = read_limited_text(path, MAX_MODEL_BYTES, what="a model file (.toml)")
    return loads_model(text, file=str(path), base_dir=path.parent, validate=validate)


def _with_source(model: Model, source_path: Path | None) -> Model:
    from dataclasses import replace

    return replace(model, source_path=source_path)


def _build_model(data: Mapping[str, Any], base_dir: Path) -> tuple[Model, list[Problem]]:
    r = _Reader()
    r.table(data, "", TOP_KEYS)
    format_version = r.get(data, "format", "", None)
    if format_version == PREVIOUS_FORMAT_VERSION and not isinstance(format_version, bool):
        data = renamed_data(data)  # read with the new function names; validate_model warns
    elif format_version is None:
        r.problem("format", f"is required; expected format = {FORMAT_VERSION}")
    elif format_version != FORMAT_VERSION or isinstance(format_version, bool):
        r.problem(
            "format",
            f"unknown format version {format_version!r}; this caredecide reads "
            f"format = {FORMAT_VERSION}",
        )
    title = r.text(data, "title", "")
    description = r.text(data, "description", "", "")
    settings = _read_settings(r, r.table(data.get("settings", {}), "settings", SETTINGS_KEYS))

    states: list[State] = []
    raw_states = data.get("states", [])
    if not isinstance(raw_states, list):
        r.problem("states", "expected [[states]] entries (an array of tables)")
        raw_states = []
    for i, raw in enumerate(raw_states):
        states.append(_read_state(r, r.table(raw, f"states[{i}]", STATE_KEYS), i))

    actions: list[Action] = []
    raw_actions = data.get("actions", [])
    if not isinstance(raw_actions, list):
        r.problem("actions", "expected [[actions]] entries (an array of tables)")
        raw_actions = []
    for i, raw in enumerate(raw_actions):
        actions.append(_read_action(r, r.table(raw, f"actions[{i}]", ACTION_KEYS), i))

    transitions = _read_rows(r, data.get("transitions", {}), "transitions")
    rates = _read_rows(r, data.get("rates", {}), "rates")
    moves = _read_rows(r, data.get("moves", {}), "moves")
    under_action = _read_rows(r, data.get("under_action", {}), "under_action")

    parameters: dict[str, Parameter] = {}
    for name, raw in r.table(data.get("parameters", {}), "parameters", None).items():
        parameters[name] = _read_parameter(
            r, name, r.table(raw, f"parameters.{name}", PARAMETER_KEYS)
        )
    groups: dict[str, DirichletGroup] = {}
    for name, raw in r.table(data.get("groups", {}), "groups", None).items():
        groups[name] = _read_group(r, name, r.table(raw, f"groups.{name}", GROUP_KEYS))
    mortality = None
    if "mortality" in data:
        mortality = _read_mortality(
            r, r.table(data["mortality"], "mortality", MORTALITY_KEYS), base_dir
        )
    attributes = {
        name: _read_attribute(r, name, r.table(raw, f"attributes.{name}", ATTRIBUTE_KEYS))
        for name, raw in r.table(data.get("attributes", {}), "attributes", None).items()
    }
    tunnels = {
        name: _read_tunnel(r, name, r.table(raw, f"tunnels.{name}", TUNNEL_KEYS))
        for name, raw in r.table(data.get("tunnels", {}), "tunnels", None).items()
    }
    raw_derived = r.table(data.get("derived", {}), "derived", None)
    derived = {name: r.expression(raw_derived, name, "derived") for name in raw_derived}
    scenarios = {
        name: _read_scenario(r, name, r.table(raw, f"scenarios.{name}", None))
        for name, raw in r.table(data.get("scenarios", {}), "scenarios", None).items()
    }
    model = Model(
        format_version=format_version if isinstance(format_version, int) else FORMAT_VERSION,
        title=title or "",
        description=description or "",
        settings=settings,
        states=tuple(states),
        actions=tuple(actions),
        transitions=transitions,
        rates=rates,
        moves=moves,
        under_action=under_action,
        parameters=parameters,
        groups=groups,
        mortality=mortality,
        attributes=attributes,
        tunnels=tunnels,
        derived=derived,
        scenarios=scenarios,
    )
    return model, r.problems


def _flatten(table: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Nested tables as dotted paths: ``{"settings": {"x": 1}}`` -> ``{"settings.x": 1}``."""
    flat: dict[str, Any] = {}
    for key, value in table.items():
        path = f"{prefix}.{key}" if prefix else str(key)
        if isinstance(value, Mapping):
            flat.update(_flatten(value, path))
        else:
            flat[path] = value
    return flat


def _read_scenario(r: _Reader, name: str, t: dict[str, Any]) -> Scenario:
    """``label`` and ``note`` are text; every other key is a path of the model file."""
    w = f"scenarios.{name}"
    label = r.text(t, "label", w, "")
    note = r.text(t, "note", w, "")
    overrides = _flatten({k: v for k, v in t.items() if k not in ("label", "note")})
    for path in overrides:
        if path.split(".")[0] == "scenarios":
            r.problem(f"{w}.{path}", "a scenario cannot change the scenarios themselves")
    if not overrides:
        r.problem(w, "sets nothing; expected at least one path = value, e.g. "
                  "settings.discount_costs = 0.06")  # fmt: skip
    return Scenario(name=name, overrides=overrides, label=label or "", note=note or "")


def _read_settings(r: _Reader, t: dict[str, Any]) -> Settings:
    w = "settings"
    horizon = r.text(t, "horizon", w, None)
    if horizon is not None and horizon != "infinite":
        r.problem("settings.horizon", f'{horizon!r}; expected "infinite" (or use horizon_cycles)')
    start = t.get("start", _MISSING)
    if start is _MISSING:
        r.problem("settings.start", "is required: a state id or a table {state = share}")
        start = ""
    elif isinstance(start, Mapping):
        shares: dict[str, float] = {}
        for key, value in start.items():
            if isinstance(value, bool) or not isinstance(value, int | float):
                r.problem(f"settings.start.{key}", f"{value!r} is not a share (a number)")
            else:
                shares[key] = float(value)
        start = shares
    elif not isinstance(start, str):
        r.problem("settings.start", f"{start!r}; expected a state id or a table {{state = share}}")
        start = ""
    severity = r.text_list(t, "severity_order", w)
    return Settings(
        cycle_years=r.number(t, "cycle_years", w),
        horizon_cycles=r.integer(t, "horizon_cycles", w, None),
        until_age=r.number(t, "until_age", w, None),
        infinite_horizon=horizon == "infinite",
        start_age=r.number(t, "start_age", w, 0.0),
        start=start,
        discount_outcomes=r.number(t, "discount_outcomes", w, 0.0),
        discount_costs=r.number(t, "discount_costs", w, 0.0),
        objective=r.text(t, "objective", w, "net_benefit"),
        willingness_to_pay=r.number(t, "willingness_to_pay", w, 0.0),
        within_cycle=r.text(t, "within_cycle", w, "trapezoid"),
        currency=r.text(t, "currency", w, ""),
        severity_order=severity,
    )


def _read_state(r: _Reader, t: dict[str, Any], i: int) -> State:
    w = f"states[{i}]"
    state_id = r.text(t, "id", w) or ""
    if state_id:
        w = f"states.{state_id}"
    absorbing = r.boolean(t, "absorbing", w, False)
    return State(
        id=state_id,
        label=r.text(t, "label", w, ""),
        qaly_weight=r.expression(t, "qaly_weight", w),
        cost=r.expression(t, "cost", w),
        absorbing=absorbing,
        alive=r.boolean(t, "alive", w, not absorbing),
        negative_cost_allowed=r.boolean(t, "negative_cost_allowed", w, False),
        attributes=r.text_list(t, "attributes", w),
        tunnels=r.text_list(t, "tunnels", w),
    )


def _read_attribute(r: _Reader, name: str, t: dict[str, Any]) -> StateAttribute:
    """``[attributes.<name>]``: value names and the numbers expressions read for them."""
    w = f"attributes.{name}"
    values: dict[str, float] = {}
    raw = r.get(t, "values", w, {})
    if not isinstance(raw, Mapping):
        r.problem(
            f"{w}.values", f"{raw!r}; expected a table such as {{ untreated = 0, treated = 1 }}"
        )
        raw = {}
    for value_name, number in raw.items():
        if isinstance(number, bool) or not isinstance(number, int | float):
            r.problem(
                f"{w}.values.{value_name}",
                f"{number!r} is not a number; expected the number expressions read for "
                f"{value_name!r}",
            )
            continue
        values[value_name] = float(number)
    return StateAttribute(name=name, values=values, label=r.text(t, "label", w, ""))


def _read_tunnel(r: _Reader, name: str, t: dict[str, Any]) -> Tunnel:
    """``[tunnels.<name>]``: length in cycles, the attribute values it is limited to."""
    w = f"tunnels.{name}"
    length = r.get(t, "length", w, 0)
    only_for = r.get(t, "only_for", w, {})
    if not isinstance(only_for, Mapping) or not all(isinstance(v, str) for v in only_for.values()):
        r.problem(
            f"{w}.only_for",
            f"{only_for!r}; expected a table of attribute values such as "
            '{ on_treatment = "treated" }',
        )
        only_for = {}
    return Tunnel(
        name=name, length=length, only_for=dict(only_for), label=r.text(t, "label", w, "")
    )


def _read_action(r: _Reader, t: dict[str, Any], i: int) -> Action:
    w = f"actions[{i}]"
    action_id = r.text(t, "id", w) or ""
    if action_id:
        w = f"actions.{action_id}"
    allowed: tuple[str, ...] | str = ALL_STATES
    raw = t.get("allowed_in", ALL_STATES)
    if isinstance(raw, str):
        allowed = raw if raw == ALL_STATES else (raw,)
    else:
        allowed = r.text_list(t, "allowed_in", w)
    return Action(
        id=action_id,
        label=r.text(t, "label", w, ""),
        allowed_in=allowed,
        oneoff_cost=r.expression(t, "oneoff_cost", w),
        oneoff_qaly_loss=r.expression(t, "oneoff_qaly_loss", w),
        cost_per_cycle=r.expression(t, "cost_per_cycle", w),
    )


def _read_rows(r: _Reader, raw: object, name: str) -> dict[str, dict[str, dict[str, Any]]]:
    out: dict[str, dict[str, dict[str, Any]]] = {}
    for action_id, rows in r.table(raw, name, None).items():
        out[action_id] = {}
        for from_id, row in r.table(rows, f"{name}.{action_id}", None).items():
            where = f"{name}.{action_id}.{from_id}"
            table = r.table(row, where, None)
            out[action_id][from_id] = {to_id: r.expression(table, to_id, where) for to_id in table}
    return out


def _read_parameter(r: _Reader, name: str, t: dict[str, Any]) -> Parameter:
    w = f"parameters.{name}"
    distribution = t.get("distribution")
    if distribution is not None and not isinstance(distribution, Mapping):
        r.problem(
            f"{w}.distribution",
            f'{distribution!r}; expected a table such as {{type = "beta", mean = 0.1, se = 0.02}}',
        )
        distribution = None
    return Parameter(
        name=name,
        value=r.number(t, "value", w),
        source=r.text(t, "source", w, ""),
        kind=r.text(t, "kind", w, "other"),
        per_years=r.number(t, "per_years", w, None),
        low=r.number(t, "low", w, None),
        high=r.number(t, "high", w, None),
        distribution=dict(distribution) if distribution is not None else None,
        label=r.text(t, "label", w, ""),
        note=r.text(t, "note", w, ""),
    )


def _read_group(r: _Reader, name: str, t: dict[str, Any]) -> DirichletGroup:
    w = f"groups.{name}"
    counts = t.get("counts", [])
    if not isinstance(counts, list) or not all(
        isinstance(c, int | float) and not isinstance(c, bool) for c in counts
    ):
        r.problem(f"{w}.counts", f"{counts!r} is not a list of numbers")
        counts = []
    return DirichletGroup(
        name=name,
        members=r.text_list(t, "members", w),
        counts=tuple(float(c) for c in counts),
        source=r.text(t, "source", w, ""),
        prior=r.number(t, "prior", w, 0.0),
        note=r.text(t, "note", w, ""),
    )


def _read_mortality(r: _Reader, t: dict[str, Any], base_dir: Path) -> MortalitySpec:
    from caredecide.mortality import read_life_table

    w = "mortality"
    table = r.text(t, "table", w, None)
    law = t.get("gompertz_makeham")
    source = r.text(t, "source", w, "")
    if (table is None) == (law is None):
        r.problem(w, 'give exactly one of table = "file.csv" or gompertz_makeham = {a, b, c}')
        return MortalitySpec(source=source)
    if law is not None:
        law_table = r.table(law, "mortality.gompertz_makeham", ("a", "b", "c"))
        a, b, c = (r.number(law_table, k, "mortality.gompertz_makeham") for k in "abc")
        if None in (a, b, c):
            return MortalitySpec(source=source)
        return MortalitySpec(gompertz_makeham=(a, b, c), source=source)
    path = base_dir / table
    try:
        ages, q = read_life_table(path)
    except FileNotFoundError:
        r.problem("mortality.table", f"life table {str(path)!r} not found (relative to the model)")
        return MortalitySpec(table=table, source=source)
    except ModelError as error:
        r.problems.extend(error.problems)
        return MortalitySpec(table=table, source=source)
    return MortalitySpec(
        table=table,
        table_ages=tuple(float(x) for x in ages),
        table_probabilities=tuple(float(x) for x in q),
        source=source,
    )
