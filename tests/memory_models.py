"""Synthetic grid models for memory tests: a progressive chain of states (every figure
invented), by size, horizon, time dependence and rates or probabilities."""

from __future__ import annotations


def grid_model_text(
    n_states: int,
    n_actions: int,
    horizon: int | None,
    *,
    timed: bool = False,
    rates: bool = False,
) -> str:
    """TOML text of a chain s0 -> s1 -> ... -> dead with ``n_actions`` actions.

    ``timed`` makes every transition depend on age (a time axis per cycle); ``rates``
    gives the rows as rates per year (through the matrix exponential).
    """
    alive = [f"s{i}" for i in range(n_states - 1)]
    lines = [
        "format = 2",
        'title = "Synthetic memory grid model"',
        "[settings]",
        "cycle_years = 1.0",
        'horizon = "infinite"' if horizon is None else f"horizon_cycles = {horizon}",
        "start_age = 40.0",
        'start = "s0"',
        "discount_outcomes = 0.03",
        "discount_costs = 0.03",
        'objective = "net_benefit"',
        "willingness_to_pay = 20000.0",
        'within_cycle = "start"',
    ]
    for i, state in enumerate(alive):
        weight = 0.9 - 0.5 * i / n_states
        lines += [
            "[[states]]",
            f'id = "{state}"',
            f"qaly_weight = {weight:.4f}",
            f"cost = {100 + i}",
        ]
    lines += ["[[states]]", 'id = "dead"', "qaly_weight = 0.0", "cost = 0.0", "absorbing = true"]
    everywhere = "[" + ", ".join(f'"{s}"' for s in alive) + "]"
    for a in range(n_actions):
        lines += ["[[actions]]", f'id = "a{a}"']
        lines += ['allowed_in = "all"'] if a == 0 else [f"allowed_in = {everywhere}"]
        lines += [f"cost_per_cycle = {100 * a}"] if a else []
    age = " * (1 + 0.001 * age)" if timed else ""
    table, prefix = ("rates", "r") if rates else ("transitions", "p")
    for a in range(n_actions):
        for i, state in enumerate(alive):
            lines.append(f"[{table}.a{a}.{state}]")
            if i + 1 < len(alive):
                lines.append(
                    f'{alive[i + 1]} = "{prefix}_prog * {1 - 0.1 * a / n_actions:.3f}{age}"'
                )
            lines.append(f'dead = "{prefix}_die{age}"')
            if not rates:
                lines.append(f'{state} = "rest"')
    for name, value, kind in (
        ("p_prog", 0.1, "probability"),
        ("p_die", 0.02, "probability"),
        ("r_prog", 0.1, "rate"),
        ("r_die", 0.02, "rate"),
    ):
        lines += [
            f"[parameters.{name}]",
            f"value = {value}",
            f'kind = "{kind}"',
            'source = "Synthetic"',
        ]
    return "\n".join(lines) + "\n"
