"""Thin glue between a :class:`caredecide.model.Model` and the editable tables of the model view.

``model_to_tables`` gives one DataFrame per table (settings, states, actions, parameters,
and ``transitions.<action>`` / ``rates.<action>`` matrices with from-states as rows and
to-states as columns); ``model_with_table`` puts one edited table back. Cells that hold
a number or an expression are text in the table: a number-like cell becomes a float,
anything else stays expression text for :mod:`caredecide.expressions` to check. No
arithmetic happens here; validation is :func:`caredecide.modelfile.loads_model`'s job.
"""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import replace
from typing import Any

import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.guarded import check_nesting
from caredecide.model import ALL_STATES, Action, Model, Parameter, Settings, State
from caredecide.modelfile.reader import ACTION_KEYS, PARAMETER_KEYS, STATE_KEYS

SETTINGS_COLUMNS = (
    "cycle_years",
    "horizon_cycles",
    "until_age",
    "infinite_horizon",
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
# The editable columns are the model file's own keys (one list, in the reader).
STATE_COLUMNS = STATE_KEYS
ACTION_COLUMNS = ACTION_KEYS
PARAMETER_COLUMNS = ("name", *PARAMETER_KEYS)


# -- cells ------------------------------------------------------------------------------
def expression_cell(value: Any) -> str:
    """A number or expression as table text (``repr`` keeps every digit of a float)."""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, int | float):
        return repr(float(value)) if isinstance(value, float) else str(value)
    return str(value)


def cell_expression(text: Any) -> float | str | None:
    """Table text back to a number or expression; empty means "no entry" (None)."""
    if text is None or (isinstance(text, float) and math.isnan(text)):
        return None
    if isinstance(text, int | float) and not isinstance(text, bool):
        return float(text)
    text = str(text).strip()
    if not text:
        return None
    try:
        return float(text)
    except ValueError:
        return text


def _optional_number(value: Any) -> float | None:
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return None
    return float(value)


def _text(value: Any) -> str:
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value).strip()


def _flag(value: Any, default: bool) -> bool:
    """A check-box cell; empty (a newly added row) takes ``default``."""
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
        return default
    return bool(value)


def _names(text: str) -> tuple[str, ...]:
    return tuple(part.strip() for part in text.split(",") if part.strip())


def distribution_cell(spec: dict | None) -> str:
    """A distribution as an inline table, ``{ type = "beta", mean = 0.1, se = 0.02 }``."""
    if not spec:
        return ""
    return "{ " + ", ".join(f"{k} = {json.dumps(v)}" for k, v in spec.items()) + " }"


def cell_distribution(text: str, where: str) -> dict | None:
    """Inline-table text back to a distribution spec (parsed as TOML data, never run)."""
    text = _text(text)
    if not text:
        return None
    try:
        check_nesting(text, file=where)
        value = tomllib.loads(f"d = {text}")["d"]
    except ModelError as error:
        raise ModelError(Problem(where, error.problems[0].message)) from None
    except ValueError as error:  # TOMLDecodeError, or an integer too long to read
        raise ModelError(
            Problem(
                where,
                f"{text!r} is not an inline table ({error}); expected "
                'e.g. { type = "beta", mean = 0.1, se = 0.02 }',
            )
        ) from None
    if not isinstance(value, dict):
        raise ModelError(
            Problem(
                where,
                f"{text!r} is not an inline table; expected e.g. "
                '{ type = "beta", mean = 0.1, se = 0.02 }',
            )
        )
    return value


def start_cell(start: str | dict) -> str:
    """Cohort start as text: a state id, or ``a = 0.6, b = 0.4``."""
    if isinstance(start, str):
        return start
    return ", ".join(f"{k} = {expression_cell(v)}" for k, v in start.items())


def cell_start(text: str) -> str | dict[str, float]:
    text = _text(text)
    if "=" not in text:
        return text
    shares: dict[str, float] = {}
    for part in text.split(","):
        key, _, value = part.partition("=")
        try:
            shares[key.strip()] = float(value)
        except ValueError:
            raise ModelError(
                Problem(
                    f"settings.start.{key.strip()}",
                    f"{value.strip()!r} is not a share; expected a number such as 0.4",
                )
            ) from None
    return shares


# -- model -> tables --------------------------------------------------------------------
def _matrix(model: Model, rows: dict[str, dict[str, Any]]) -> pd.DataFrame:
    ids = list(model.state_ids)
    ids += [s for s in rows if s not in ids]
    ids += [t for row in rows.values() for t in row if t not in ids]
    ids = list(dict.fromkeys(ids))
    data = {to: [expression_cell(rows.get(frm, {}).get(to, "")) for frm in ids] for to in ids}
    return pd.DataFrame(data, index=pd.Index(ids, name="from"), dtype="string")


def model_to_tables(model: Model) -> dict[str, pd.DataFrame]:
    """One editable DataFrame per table of the model (see the module docstring)."""
    s = model.settings
    tables: dict[str, pd.DataFrame] = {
        "settings": pd.DataFrame(
            [
                {
                    "cycle_years": s.cycle_years,
                    "horizon_cycles": s.horizon_cycles,
                    "until_age": s.until_age,
                    "infinite_horizon": s.infinite_horizon,
                    "start_age": s.start_age,
                    "start": start_cell(s.start),
                    "discount_outcomes": s.discount_outcomes,
                    "discount_costs": s.discount_costs,
                    "objective": s.objective,
                    "willingness_to_pay": s.willingness_to_pay,
                    "within_cycle": s.within_cycle,
                    "currency": s.currency,
                    "severity_order": ", ".join(s.severity_order),
                }
            ]
        ).astype({"horizon_cycles": "Float64", "until_age": "Float64"}),
        "states": pd.DataFrame(
            [
                {
                    "id": st.id,
                    "label": st.label,
                    "qaly_weight": expression_cell(st.qaly_weight),
                    "cost": expression_cell(st.cost),
                    "absorbing": st.absorbing,
                    "alive": st.alive,
                    "negative_cost_allowed": st.negative_cost_allowed,
                    "attributes": ", ".join(st.attributes),
                    "tunnels": ", ".join(st.tunnels),
                }
                for st in model.states
            ],
            columns=list(STATE_COLUMNS),
        ).astype({c: "boolean" for c in ("absorbing", "alive", "negative_cost_allowed")}),
        "actions": pd.DataFrame(
            [
                {
                    "id": a.id,
                    "label": a.label,
                    "allowed_in": a.allowed_in
                    if isinstance(a.allowed_in, str)
                    else ", ".join(a.allowed_in),
                    "oneoff_cost": expression_cell(a.oneoff_cost),
                    "oneoff_qaly_loss": expression_cell(a.oneoff_qaly_loss),
                    "cost_per_cycle": expression_cell(a.cost_per_cycle),
                }
                for a in model.actions
            ],
            columns=list(ACTION_COLUMNS),
        ),
        "parameters": pd.DataFrame(
            [
                {
                    "name": name,
                    "value": number_text(p.value),
                    "kind": p.kind,
                    "per_years": number_text(p.per_years),
                    "low": number_text(p.low),
                    "high": number_text(p.high),
                    "distribution": distribution_cell(p.distribution),
                    "source": p.source,
                    "label": p.label,
                    "note": p.note,
                }
                for name, p in model.parameters.items()
            ],
            columns=list(PARAMETER_COLUMNS),
        ).astype({c: object for c in ("value", "per_years", "low", "high")}),
    }
    for kind, table in (("transitions", model.transitions), ("rates", model.rates)):
        for action_id, rows in table.items():
            tables[f"{kind}.{action_id}"] = _matrix(model, rows)
    for action_id in model.action_ids:  # an action with no rows yet gets an empty matrix
        if action_id not in model.transitions and action_id not in model.rates:
            tables[f"transitions.{action_id}"] = _matrix(model, {})
    return tables


# -- one table -> model -----------------------------------------------------------------
def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return [
        dict(zip(frame.columns, row, strict=True))
        for row in frame.itertuples(index=False, name=None)
    ]


def _settings(row: dict[str, Any]) -> Settings:
    cycles = _optional_number(row["horizon_cycles"])
    return Settings(
        cycle_years=float(row["cycle_years"]),
        horizon_cycles=int(cycles) if cycles is not None and cycles.is_integer() else cycles,
        until_age=_optional_number(row["until_age"]),
        infinite_horizon=_flag(row["infinite_horizon"], False),
        start_age=float(row["start_age"]),
        start=cell_start(row["start"]),
        discount_outcomes=float(row["discount_outcomes"]),
        discount_costs=float(row["discount_costs"]),
        objective=_text(row["objective"]),
        willingness_to_pay=float(row["willingness_to_pay"]),
        within_cycle=_text(row["within_cycle"]),
        currency=_text(row["currency"]),
        severity_order=_names(_text(row["severity_order"])),
    )


def _number_or_zero(value: Any) -> float | str:
    cell = cell_expression(value)
    return 0.0 if cell is None else cell


def _state(row: dict[str, Any]) -> State:
    absorbing = _flag(row["absorbing"], False)
    return State(
        id=_text(row["id"]),
        label=_text(row["label"]),
        qaly_weight=_number_or_zero(row["qaly_weight"]),
        cost=_number_or_zero(row["cost"]),
        absorbing=absorbing,
        alive=_flag(row["alive"], not absorbing),
        negative_cost_allowed=_flag(row["negative_cost_allowed"], False),
        attributes=_names(_text(row.get("attributes", ""))),
        tunnels=_names(_text(row.get("tunnels", ""))),
    )


def _action(row: dict[str, Any]) -> Action:
    allowed = _text(row["allowed_in"]) or ALL_STATES
    return Action(
        id=_text(row["id"]),
        label=_text(row["label"]),
        allowed_in=allowed if allowed == ALL_STATES else _names(allowed),
        oneoff_cost=_number_or_zero(row["oneoff_cost"]),
        oneoff_qaly_loss=_number_or_zero(row["oneoff_qaly_loss"]),
        cost_per_cycle=_number_or_zero(row["cost_per_cycle"]),
    )


def number_text(value: Any) -> str:
    """A number as the text of a grid cell ("" for none): text cells keep whatever is
    typed, so a wrong entry can be shown with its error instead of being lost."""
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
        return ""
    return repr(float(value)) if isinstance(value, float) else str(value)


def cell_number(value: Any, where: str, *, required: bool = False) -> float | None:
    """The number in a grid cell; ModelError naming ``where`` and the text otherwise."""
    text = _text(value).strip() if not isinstance(value, int | float) else value
    if isinstance(text, int | float) and not isinstance(text, bool):
        number = float(text)
    elif text == "":
        number = None
    else:
        try:
            number = float(text)
        except ValueError:
            number = math.nan
        if not math.isfinite(number):
            raise ModelError(
                Problem(where, f"{text!r} is not a number; expected a number such as 0.25")
            )
    if number is None and required:
        raise ModelError(Problem(where, "is empty; expected a number such as 0.25"))
    return number


def _parameter(row: dict[str, Any]) -> Parameter:
    name = _text(row["name"])
    where = f"parameters.{name}"
    value = cell_number(row["value"], f"{where}.value", required=True)
    return Parameter(
        name=name,
        value=math.nan if value is None else value,
        source=_text(row["source"]),
        kind=_text(row["kind"]) or "other",
        per_years=cell_number(row["per_years"], f"{where}.per_years"),
        low=cell_number(row["low"], f"{where}.low"),
        high=cell_number(row["high"], f"{where}.high"),
        distribution=cell_distribution(row["distribution"], f"parameters.{name}.distribution"),
        label=_text(row["label"]),
        note=_text(row["note"]),
    )


def _rows_from_matrix(
    frame: pd.DataFrame, before: dict[str, dict[str, Any]]
) -> dict[str, dict[str, Any]]:
    """Matrix back to rows; entries keep their order in the file (new ones go last)."""
    rows: dict[str, dict[str, Any]] = {}
    for from_id, series in frame.iterrows():
        cells = {
            str(to): cell
            for to, value in series.items()
            if (cell := cell_expression(value)) is not None
        }
        order = [to for to in before.get(str(from_id), {}) if to in cells]
        row = {to: cells[to] for to in [*order, *(t for t in cells if t not in order)]}
        if row:
            rows[str(from_id)] = row
    return rows


def model_with_table(model: Model, name: str, frame: pd.DataFrame) -> Model:
    """A copy of ``model`` with table ``name`` (a key of :func:`model_to_tables`) replaced.

    Raises
    ------
    ModelError
        When a cell cannot be written to the model file at all (e.g. a start share that is
        not a number); values that are merely invalid are kept for validation to report.
    """
    if name == "settings":
        return replace(model, settings=_settings(_records(frame)[0]))
    if name == "states":
        return replace(model, states=tuple(_state(r) for r in _records(frame)))
    if name == "actions":
        return replace(model, actions=tuple(_action(r) for r in _records(frame)))
    if name == "parameters":
        params = [_parameter(r) for r in _records(frame)]
        return replace(model, parameters={p.name: p for p in params})
    kind, _, action_id = name.partition(".")
    if kind in ("transitions", "rates") and action_id:
        table = {k: dict(v) for k, v in getattr(model, kind).items()}
        rows = _rows_from_matrix(frame, table.get(action_id, {}))
        if rows or action_id in table:  # an untouched empty matrix adds nothing
            table[action_id] = rows
        return replace(model, **{kind: table})
    raise KeyError(
        f"unknown model table {name!r}; expected one of settings, states, actions, "
        "parameters, transitions.<action>, rates.<action>"
    )


def with_header_comments(old_text: str, new_text: str) -> str:
    """``new_text`` preceded by the leading comment block of ``old_text``.

    Writing a model from tables drops comments; the header (e.g. the SYNTHETIC marking of a
    demo model) is kept so it survives table edits.
    """
    header = []
    for line in old_text.splitlines(keepends=True):
        if not line.lstrip().startswith("#"):
            break
        header.append(line if line.endswith("\n") else line + "\n")
    return "".join(header) + new_text


_ID_COLUMN = {"states": "id", "actions": "id", "parameters": "name"}


def locate(name: str, frame: pd.DataFrame, where: str) -> str:
    """Row and column of table ``name`` that a problem's table path points to, in words.

    ``states.stage_1.cost`` -> ``"row 1 (stage_1), column cost"``;
    ``transitions.treat.stage_1.dead`` -> ``"row stage_1, column dead"``; ``""`` when the
    path does not point into ``frame``.
    """
    rest = where[len(name) :].lstrip(".") if where.startswith(name) else ""
    if not rest:
        return ""
    if name == "settings":
        column = rest.split(".")[0]
        return f"column {column}" if column in frame.columns else ""
    head, _, tail = rest.partition(".")
    if name in _ID_COLUMN:
        if head.startswith("[") and head.endswith("]") and head[1:-1].isdigit():
            row, label = int(head[1:-1]), ""
        else:
            matches = [i for i, v in enumerate(frame[_ID_COLUMN[name]]) if _text(v) == head]
            if not matches:
                return ""
            row, label = matches[0], f" ({head})"
        column = tail.split(".")[0]
        place = f"row {row + 1}{label}"
        return f"{place}, column {column}" if column in frame.columns else place
    if head in frame.index:  # a transition or rate matrix: from-state row, to-state column
        column = tail.split(".")[0]
        return f"row {head}, column {column}" if column in frame.columns else f"row {head}"
    return ""
