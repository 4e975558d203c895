"""Model files: write a :class:`~caredecide.model.Model` as TOML that reads back equal."""

from __future__ import annotations

import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from caredecide.model import (
    FORMAT_VERSION,
    Model,
)


# =====================================================================================
# Writing
# =====================================================================================
def dumps_model(model: Model) -> str:
    """The model as TOML text that :func:`loads_model` reads back to an equal model."""
    s = model.settings
    out: list[str] = [
        f"format = {FORMAT_VERSION}",
        f"title = {_value(model.title)}",
    ]
    if model.description:
        out.append(f"description = {_value(model.description, multiline=True)}")
    settings: dict[str, Any] = {"cycle_years": s.cycle_years}
    if s.horizon_cycles is not None:
        settings["horizon_cycles"] = s.horizon_cycles
    if s.until_age is not None:
        settings["until_age"] = s.until_age
    if s.infinite_horizon:
        settings["horizon"] = "infinite"
    settings.update(
        start_age=s.start_age,
        start=s.start if isinstance(s.start, str) else dict(s.start),
        discount_outcomes=s.discount_outcomes,
        discount_costs=s.discount_costs,
        objective=s.objective,
        willingness_to_pay=s.willingness_to_pay,
        within_cycle=s.within_cycle,
    )
    if s.currency:
        settings["currency"] = s.currency
    if s.severity_order:
        settings["severity_order"] = list(s.severity_order)
    _section(out, "[settings]", settings)
    if model.derived:
        _section(out, "[derived]", dict(model.derived))
    for name, attribute in model.attributes.items():
        fields: dict[str, Any] = {"values": dict(attribute.values)}
        if attribute.label:
            fields["label"] = attribute.label
        _section(out, f"[attributes.{_key(name)}]", fields)
    for name, tunnel in model.tunnels.items():
        fields = {"length": tunnel.length}
        if tunnel.only_for:
            fields["only_for"] = dict(tunnel.only_for)
        if tunnel.label:
            fields["label"] = tunnel.label
        _section(out, f"[tunnels.{_key(name)}]", fields)
    for state in model.states:
        fields = {"id": state.id}
        if state.label:
            fields["label"] = state.label
        fields.update(qaly_weight=state.qaly_weight, cost=state.cost)
        if state.absorbing:
            fields["absorbing"] = True
        if state.alive != (not state.absorbing):
            fields["alive"] = state.alive
        if state.negative_cost_allowed:
            fields["negative_cost_allowed"] = True
        if state.attributes:
            fields["attributes"] = list(state.attributes)
        if state.tunnels:
            fields["tunnels"] = list(state.tunnels)
        _section(out, "[[states]]", fields)
    for action in model.actions:
        fields = {"id": action.id}
        if action.label:
            fields["label"] = action.label
        allowed = action.allowed_in
        fields["allowed_in"] = allowed if isinstance(allowed, str) else list(allowed)
        fields.update(
            oneoff_cost=action.oneoff_cost,
            oneoff_qaly_loss=action.oneoff_qaly_loss,
            cost_per_cycle=action.cost_per_cycle,
        )
        _section(out, "[[actions]]", fields)
    tables = (
        ("transitions", model.transitions),
        ("rates", model.rates),
        ("moves", model.moves),
        ("under_action", model.under_action),
    )
    for table_name, table in tables:
        for action_id, rows in table.items():
            if not rows:  # an action with no rows yet (e.g. being edited) stays in the file
                _section(out, f"[{table_name}.{_key(action_id)}]", {})
            for from_id, row in rows.items():
                _section(out, f"[{table_name}.{_key(action_id)}.{_key(from_id)}]", dict(row))
    for name, p in model.parameters.items():
        fields = {"value": p.value}
        if p.label:
            fields["label"] = p.label
        if p.kind != "other":
            fields["kind"] = p.kind
        for key in ("per_years", "low", "high"):
            if getattr(p, key) is not None:
                fields[key] = getattr(p, key)
        if p.distribution is not None:
            fields["distribution"] = dict(p.distribution)
        fields["source"] = p.source
        if p.note:
            fields["note"] = p.note
        _section(out, f"[parameters.{_key(name)}]", fields)
    for name, g in model.groups.items():
        fields = {"members": list(g.members), "counts": list(g.counts)}
        if g.prior:
            fields["prior"] = g.prior
        fields["source"] = g.source
        if g.note:
            fields["note"] = g.note
        _section(out, f"[groups.{_key(name)}]", fields)
    if model.mortality is not None:
        m = model.mortality
        fields = {}
        if m.table is not None:
            fields["table"] = m.table
        if m.gompertz_makeham is not None:
            fields["gompertz_makeham"] = dict(zip("abc", m.gompertz_makeham, strict=True))
        if m.source:
            fields["source"] = m.source
        _section(out, "[mortality]", fields)
    for name, scenario in model.scenarios.items():
        fields = {}
        if scenario.label:
            fields["label"] = scenario.label
        if scenario.note:
            fields["note"] = scenario.note
        fields.update(scenario.overrides)  # dotted paths, written as quoted keys
        _section(out, f"[scenarios.{_key(name)}]", fields)
    return "\n".join(out) + "\n"


def save_model(model: Model, path: Path | str, *, original_text: str | None = None) -> None:
    """Write ``model`` to ``path`` as TOML (UTF-8), whole or not at all.

    With ``original_text`` (the file the model was read from) only the changed keys are
    rewritten, keeping its comments, key order and layout
    (:func:`caredecide.modelfile.roundtrip.updated_model_text`).
    """
    from caredecide.modelfile.roundtrip import updated_model_text
    from caredecide.outputs import staged_file

    if original_text is None:
        text = dumps_model(model)
    else:
        text = updated_model_text(original_text, model, file=str(path))
    with staged_file(path) as staging:
        staging.write_text(text, encoding="utf-8")


def _section(out: list[str], header: str, fields: Mapping[str, Any]) -> None:
    out.append("")
    out.append(header)
    out.extend(f"{_key(k)} = {_value(v, multiline=True)}" for k, v in fields.items())


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _key(key: str) -> str:
    return key if _BARE_KEY.match(key) else _value(key)


def _value(value: Any, *, multiline: bool = False) -> str:
    """One TOML value; tables are written inline so each entry stays on one line.

    With ``multiline``, text spanning several lines (a description, a note) is written
    as a TOML multi-line string (in triple quotes), as a person would type it. Text
    holding a carriage return stays escaped on one line: TOML reads CR LF inside a
    multi-line string as LF.
    """
    import tomli_w

    if multiline and isinstance(value, str) and "\n" in value and "\r" not in value:
        return tomli_w.dumps({"x": value}, multiline_strings=True)[len("x = ") :].rstrip("\n")
    if isinstance(value, Mapping):
        inner = ", ".join(f"{_key(k)} = {_value(v)}" for k, v in value.items())
        return "{ " + inner + " }" if inner else "{}"
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_value(v) for v in value) + "]"
    # tomli_w formats scalars exactly (floats by repr, strings escaped).
    return tomli_w.dumps({"x": value})[len("x = ") :].rstrip("\n")
