"""``caredecide check MODEL``: validate a model file and summarise what it says."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from caredecide.cli.console import plain, print_caution, stderr, stdout, user_errors
from caredecide.cli.model_warnings import StrictOption, show_warnings


def _horizon_text(model) -> str:
    s = model.settings
    if s.infinite_horizon:
        return "infinite (stationary model)"
    n = model.n_cycles()
    cycles = f"{n} cycle{'s' if n != 1 else ''} of {s.cycle_years:g} year"
    cycles += "" if s.cycle_years == 1 else "s"
    if s.until_age is not None:
        return f"{cycles}, ages {s.start_age:g} to {s.until_age:g}"
    return f"{cycles} from age {s.start_age:g}"


def _value_text(value: object) -> str:
    # Expressions and labels are the user's text: shown literally, never as rich markup.
    return f"{value:g}" if isinstance(value, float) else plain(value)


def print_summary(model) -> None:
    """Print states, actions, allowed actions, parameters with sources and the horizon."""
    s = model.settings
    stdout.print(f"[bold]{plain(model.title)}[/]  ({plain(model.file_label)})")
    stdout.print(f"horizon: {_horizon_text(model)}")
    objective = (
        f"net monetary benefit at {s.willingness_to_pay:g} {plain(s.currency)} per QALY".replace(
            "  ", " "
        )
        if s.objective == "net_benefit"
        else "QALYs"
    )
    stdout.print(
        f"objective: {objective}; discount: outcomes {s.discount_outcomes:g}, "
        f"costs {s.discount_costs:g} per year; within-cycle method: {s.within_cycle}"
    )
    start = ", ".join(f"{k} {v:g}" for k, v in model.start_distribution().items())
    stdout.print(f"start: {start}")

    from caredecide.expand import expand

    expansion = expand(model)
    flat = expansion.model
    states = Table(title="States")
    for column in ("id", "label", "QALY weight / year", "cost / cycle", "kind", "allowed actions"):
        states.add_column(column)
    for state in model.states:
        copies = {c.id for c in expansion.copies if c.base == state.id}
        allowed = [a.id for a in flat.actions if copies & set(flat.allowed_states(a))]
        kind = "absorbing" if state.absorbing else "transient"
        if not state.alive:
            kind += ", dead"
        states.add_row(
            state.id,
            plain(state.label),
            _value_text(state.qaly_weight),
            _value_text(state.cost),
            kind,
            ", ".join(allowed) if allowed else "(no decision)",
        )
    stdout.print(states)
    if expansion.groups:  # attributes and tunnels: the states the model is computed on
        generated = Table(
            title=f"Generated states ({len(flat.states)}, from attributes and tunnels)"
        )
        for column in ("id", "label", "allowed actions"):
            generated.add_column(column)
        for state in flat.states:
            allowed = [a.id for a in flat.actions if state.id in flat.allowed_states(a)]
            generated.add_row(
                state.id, plain(state.label), ", ".join(allowed) if allowed else "(no decision)"
            )
        stdout.print(generated)

    actions = Table(title="Actions")
    columns = ("id", "label", "allowed in", "one-off cost", "one-off QALY loss", "cost / cycle")
    for column in columns:
        actions.add_column(column)
    for action in model.actions:
        actions.add_row(
            action.id,
            plain(action.label),
            ", ".join(model.allowed_states(action)),
            _value_text(action.oneoff_cost),
            _value_text(action.oneoff_qaly_loss),
            _value_text(action.cost_per_cycle),
        )
    stdout.print(actions)

    parameters = Table(title="Parameters")
    for column in ("name", "value", "kind", "range (low-high)", "source"):
        parameters.add_column(column)
    for name, value in model.base_parameter_values().items():
        low, high = model.parameter_range(name)
        if name in model.parameters:
            p = model.parameters[name]
            kind, source = p.kind, p.source
        else:
            group = next(g for g in model.groups.values() if name in g.members)
            kind, source = f"Dirichlet group {group.name}", group.source
        parameters.add_row(name, f"{value:g}", kind, f"{low:.4g} - {high:.4g}", plain(source))
    stdout.print(parameters)
    if model.derived:
        derived = Table(title="Derived values ([derived])")
        for column in ("name", "expression"):
            derived.add_column(column)
        for name, expression in model.derived.items():
            derived.add_row(name, _value_text(expression))
        stdout.print(derived)
    if model.mortality is not None:
        m = model.mortality
        law = (
            "Gompertz-Makeham a={:g}, b={:g}, c={:g}".format(*m.gompertz_makeham)
            if m.gompertz_makeham is not None
            else f"life table {plain(m.table)}"
        )
        source = f" ({plain(m.source)})" if m.source else ""
        stdout.print(f"background mortality: {law}{source}")


def _upgrade_file(path: Path) -> None:
    """Rewrite ``path`` from the previous model file format, reporting each renamed call."""
    from caredecide.upgrade import upgrade_text

    text = path.read_text(encoding="utf-8")
    upgraded, replacements = upgrade_text(text, file=str(path))
    _review_before_upgrade(text, path)
    path.write_text(upgraded, encoding="utf-8")
    for replacement in replacements:
        stderr.print(f"upgraded: {plain(path)}: {plain(replacement)}")
    stderr.print(
        f"upgraded: {plain(path)} is now format 2 ({len(replacements)} call(s) renamed, "
        "comments kept)"
    )


def _review_before_upgrade(text: str, path: Path) -> None:
    """Print the warnings of the file read as format 1 (other than the format itself):
    those about a changed meaning (``cycle`` in a cost) vanish once the file is format 2."""
    from caredecide.errors import CaredecideError
    from caredecide.modelfile import loads_model, validate_model

    try:
        warnings = validate_model(loads_model(text, file=str(path), validate=False))
    except CaredecideError:
        return  # the check after the upgrade lists the problems
    for warning in warnings:
        if warning.where != "format":
            stderr.print(f"[yellow]review:[/] {plain(path)}: {plain(warning)}")


def register(app: typer.Typer) -> None:
    """Add the ``check`` sub-command to ``app``."""

    @app.command("check")
    def check(
        model_path: Annotated[
            Path, typer.Argument(metavar="MODEL", help="Model file (TOML) to validate.")
        ],
        quiet: Annotated[
            bool, typer.Option("--quiet", "-q", help="Print only errors and warnings (no summary).")
        ] = False,
        upgrade: Annotated[
            bool,
            typer.Option(
                "--upgrade",
                help="Rewrite a file of the previous format (1) as the current one in place, "
                "renaming the functions that changed and keeping comments; then check it.",
            ),
        ] = False,
        strict: StrictOption = False,
    ) -> None:
        """Validate a model file: print a summary, or every problem found (exit code 2)."""
        from caredecide.modelfile import load_model, validate_model

        print_caution(model_path)
        if upgrade:
            with user_errors():
                _upgrade_file(model_path)
        with user_errors():
            model = load_model(model_path, validate=False)
            warnings = validate_model(model)
            show_warnings(model, warnings, strict=strict)
        if not quiet:
            print_summary(model)
            stdout.print(
                f"[green]OK[/]: {plain(model.file_label)} is valid ({len(warnings)} warning(s))"
            )
