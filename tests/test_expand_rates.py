"""`[rates]` rows inside a tunnel: competing exits by rates, the stay moving one step on.

Every model here is a synthetic scenario of our own. The per-cycle probabilities of a
state left by competing constant rates a and b over a cycle of t years are
p_a = a / (a + b) * (1 - exp(-(a + b) t)), p_b likewise, and exp(-(a + b) t) stays
(Welton & Ades 2005, Med Decis Making 25(6):633-645). A tunnel is a chain of copies of a
state, one per cycle since entry (Siebert et al. 2012, Med Decis Making 32(5):690-700;
from memory). Inside a tunnel the cohort that stays ends the cycle one step on.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.evaluate import evaluate_policy
from caredecide.expand import expand
from caredecide.modelfile import loads_model, validate_model
from caredecide.objective import Objective

HEADER = """
format = 2
title = "Synthetic rates in a tunnel"
[settings]
cycle_years = {cycle}
horizon_cycles = 6
start = "{start}"
within_cycle = "start"
discount_costs = 0.03
discount_outcomes = 0.03
willingness_to_pay = 20000

[parameters.a0]
value = {a0}
kind = "rate"
source = "synthetic"
[parameters.a_step]
value = {a_step}
kind = "rate"
source = "synthetic"
[parameters.b]
value = {b}
kind = "rate"
source = "synthetic"
[parameters.c]
value = 0.15
kind = "rate"
source = "synthetic"

[[actions]]
id = "wait"
label = "Wait"
"""

TUNNEL = """
[tunnels.years_sick]
length = 2

[[states]]
id = "well"
qaly_weight = "1"
cost = "100"

[[states]]
id = "sick"
qaly_weight = "0.6 + 0.05 * years_sick"
cost = "2000 - 500 * years_sick"
tunnels = ["years_sick"]

[[states]]
id = "recovered"
qaly_weight = "0.9"
cost = "50"

[[states]]
id = "dead"
absorbing = true

[transitions.wait.recovered]
dead = "0.02"
recovered = "rest"

[rates.wait.sick]
dead = "a0 + a_step * years_sick"
recovered = "b"
"""

WELL_BY_PROBABILITY = """
[transitions.wait.well]
sick = "0.1"
dead = "0.01"
well = "rest"
"""

WELL_BY_RATES = """
[rates.wait.well]
sick = "c"
dead = "0.01"
"""


def _text(well: str = WELL_BY_PROBABILITY, *, cycle=1.0, a0=0.2, a_step=0.1, b=0.3, start="well"):
    return HEADER.format(cycle=cycle, a0=a0, a_step=a_step, b=b, start=start) + TUNNEL + well


SICK = ("sick__years_sick_0", "sick__years_sick_1", "sick__years_sick_2plus")


def _row(compiled, state: str) -> dict[str, float]:
    i = compiled.state_ids.index(state)
    row = compiled.transition[0, 0, 0, i]
    return {s: float(p) for s, p in zip(compiled.state_ids, row, strict=True) if p != 0}


def test_each_copy_exits_by_its_rates_and_the_stay_moves_one_step_on():
    # Source: Welton & Ades 2005 (two competing exits over t = 1 year). Copy k has
    # a = 0.2 + 0.1 k to death and b = 0.3 to recovery (hand-derived, 10 digits):
    # k = 0: R = 0.5, exp(-0.5) = 0.6065306597, dead 0.4 * 0.3934693403 = 0.1573877361,
    #        recovered 0.6 * 0.3934693403 = 0.2360816042, on to step 1: 0.6065306597
    # k = 1: R = 0.6, exp(-0.6) = 0.5488116361, dead = recovered = 0.2255941819,
    #        on to step 2+: 0.5488116361
    # k = 2+: R = 0.7, exp(-0.7) = 0.4965853038, dead 4/7 * 0.5034146962 = 0.2876655407,
    #        recovered 3/7 * 0.5034146962 = 0.2157491555, stays at 2+: 0.4965853038
    compiled = compile_model(loads_model(_text()))
    expected = {
        SICK[0]: {"dead": 0.1573877361, "recovered": 0.2360816042, SICK[1]: 0.6065306597},
        SICK[1]: {"dead": 0.2255941819, "recovered": 0.2255941819, SICK[2]: 0.5488116361},
        SICK[2]: {"dead": 0.2876655407, "recovered": 0.2157491555, SICK[2]: 0.4965853038},
    }
    for state, row in expected.items():
        got = _row(compiled, state)
        assert set(got) == set(row), state
        for target, p in row.items():
            assert got[target] == pytest.approx(p, abs=1e-10), (state, target)


def _flat_by_hand(t: float, a0: float, a_step: float, b: float) -> str:
    """The same model with the tunnel written out as three states and closed-form rows."""
    rows = []
    for k in range(3):
        a = f"(a0 + a_step * {k})"
        total = f"({a} + b)"
        stay = f"exp(-{total} * cycle_years)"
        on = f"sick_{min(k + 1, 2)}"
        rows.append(
            f"""
[[states]]
id = "sick_{k}"
qaly_weight = "0.6 + 0.05 * {k}"
cost = "2000 - 500 * {k}"

[transitions.wait.sick_{k}]
dead = "{a} / {total} * (1 - {stay})"
recovered = "b / {total} * (1 - {stay})"
{on} = "{stay}"
"""
        )
    text = HEADER.format(cycle=t, a0=a0, a_step=a_step, b=b, start="well") + (
        TUNNEL.split('[[states]]\nid = "sick"')[0]
        + "".join(rows)
        + '\n[[states]]\nid = "recovered"'
        + TUNNEL.split('[[states]]\nid = "recovered"')[1].split("[rates.wait.sick]")[0]
        + WELL_BY_PROBABILITY.replace('sick = "0.1"', 'sick_0 = "0.1"')
    )
    return text.replace("[tunnels.years_sick]\nlength = 2\n", "")


@pytest.mark.parametrize("t", [1.0, 0.5])
def test_the_tunnel_matches_the_same_model_written_out_flat_by_hand(t):
    # The expansion and a hand-written flat model (closed form, Welton & Ades 2005) agree
    # on every transition and on the totals of the one policy.
    tunnel = compile_model(loads_model(_text(cycle=t)))
    flat = compile_model(loads_model(_flat_by_hand(t, 0.2, 0.1, 0.3)))
    rename = dict(zip(SICK, ("sick_0", "sick_1", "sick_2"), strict=True))
    order = [flat.state_ids.index(rename.get(s, s)) for s in tunnel.state_ids]
    P_flat = flat.transition[..., order, :][..., order]
    np.testing.assert_allclose(tunnel.transition, P_flat, atol=1e-12)
    objective = Objective("net_benefit", 20000.0)
    first, second = evaluate_policy(tunnel, 0, objective), evaluate_policy(flat, 0, objective)
    totals, hand = first.totals(), second.totals()
    assert totals["qalys"] > 0 and totals["costs"] > 0
    for name in ("qalys", "costs", "life_years"):
        assert totals[name] == pytest.approx(hand[name], rel=1e-12), name


def test_a_rate_row_into_the_tunnel_shares_the_generator_and_entrants_start_at_step_0():
    # All rate rows of an action form one generator (Welton & Ades 2005): the well cohort
    # can fall sick and die within one cycle. Within the cycle the tunnel's step is the one
    # at the cycle start; at the end the cohort that began in the tunnel steps one on and
    # the cohort that entered during the cycle is at step 0. Reference: scipy's expm of
    # the generator written here by hand, then that relabelling done by hand.
    model = loads_model(_text(WELL_BY_RATES))
    compiled = compile_model(model)
    ids = list(compiled.state_ids)
    i = {s: ids.index(s) for s in ids}
    G = np.zeros((len(ids), len(ids)))
    G[i["well"], i[SICK[0]]] = 0.15
    G[i["well"], i["dead"]] = 0.01
    for k, state in enumerate(SICK):
        G[i[state], i["dead"]] = 0.2 + 0.1 * k
        G[i[state], i["recovered"]] = 0.3
    np.fill_diagonal(G, -G.sum(axis=1))
    E = scipy.linalg.expm(G)
    expected_well = E[i["well"]]  # entrants stay at step 0: no relabelling
    np.testing.assert_allclose(compiled.transition[0, 0, 0, i["well"]], expected_well, atol=1e-13)
    assert compiled.transition[0, 0, 0, i["well"], i[SICK[1]]] == 0.0
    for k, state in enumerate(SICK):
        expected = E[i[state]].copy()
        on = i[SICK[min(k + 1, 2)]]
        stay = expected[i[state]]
        expected[i[state]] = 0.0
        expected[on] += stay
        np.testing.assert_allclose(compiled.transition[0, 0, 0, i[state]], expected, atol=1e-13)
        # Closed form of the stay (Welton & Ades 2005): exp(-(a + b)).
        assert stay == pytest.approx(math.exp(-(0.5 + 0.1 * k)), rel=1e-12)


@settings(max_examples=25)
@given(
    a0=st.floats(0.0, 3.0),
    a_step=st.floats(0.0, 1.0),
    b=st.floats(0.0, 3.0),
    cycle=st.sampled_from([0.25, 1.0, 2.0]),
)
def test_rows_sum_to_one_and_the_stay_never_stays_before_the_last_step(a0, a_step, b, cycle):
    compiled = compile_model(loads_model(_text(cycle=cycle, a0=a0, a_step=a_step, b=b)))
    P = compiled.transition[0, 0, 0]
    np.testing.assert_allclose(P.sum(axis=1), 1.0, atol=1e-12)
    ids = list(compiled.state_ids)
    for k, state in enumerate(SICK):
        s, on = ids.index(state), ids.index(SICK[min(k + 1, 2)])
        total = a0 + a_step * k + b
        # Closed form (Welton & Ades 2005): the stay exp(-(a + b) t) moves one step on.
        assert P[s, on] == pytest.approx(math.exp(-total * cycle), rel=1e-9, abs=1e-12)
        if k < 2:
            assert P[s, s] == 0.0
        if total > 0:
            share = (a0 + a_step * k) / total * (1 - math.exp(-total * cycle))
            assert P[s, ids.index("dead")] == pytest.approx(share, rel=1e-9, abs=1e-12)


def test_a_move_between_states_of_one_tunnel_within_the_cycle_keeps_counting():
    # sick -> worse by a rate, both counting years_sick: the cohort of step 0 that worsens
    # during the cycle ends it at worse step 1 (it began the cycle in the tunnel), as a
    # [transitions] row would put it (docs/model-file.md, tunnel steps). common practice
    text = (
        _text()
        .replace(
            '[[states]]\nid = "recovered"',
            '[[states]]\nid = "worse"\nqaly_weight = "0.3"\ncost = "0"\n'
            'tunnels = ["years_sick"]\n\n[rates.wait.worse]\ndead = "1.0"\n\n'
            '[[states]]\nid = "recovered"',
        )
        .replace('recovered = "b"', 'recovered = "b"\nworse = "0.4"')
    )
    compiled = compile_model(loads_model(text))
    row = _row(compiled, SICK[0])
    assert "worse__years_sick_0" not in row
    assert row["worse__years_sick_1"] > 0
    assert sum(row.values()) == pytest.approx(1.0, abs=1e-12)
    clock = expand(loads_model(text)).model.rate_row_clock["wait"]
    assert clock[SICK[0]] == {SICK[0]: SICK[1], "worse__years_sick_0": "worse__years_sick_1"}


def test_leaving_and_reentering_a_tunnel_within_one_cycle_is_refused():
    # From step 0 a cohort could recover and fall sick again within the cycle (rate rows
    # both ways): at the cycle end both would show step 0, so the step is not defined.
    text = _text().replace(
        '[transitions.wait.recovered]\ndead = "0.02"\nrecovered = "rest"',
        '[rates.wait.recovered]\ndead = "0.02"\nsick = "0.05"',
    )
    with pytest.raises(ModelError) as raised:
        compile_model(loads_model(text, file="relapse.toml"))
    message = str(raised.value)
    assert "relapse.toml" in message
    assert "rates.wait.sick" in message
    assert "can leave the tunnel and come back" in message
    assert "expected one of the rows on that path as a [transitions] row" in message
    with pytest.raises(ModelError):
        validate_model(loads_model(text, file="relapse.toml"))
    # Written as a [transitions] row, the relapse is accepted.
    fixed = text.replace(
        '[rates.wait.recovered]\ndead = "0.02"\nsick = "0.05"',
        '[transitions.wait.recovered]\ndead = "0.02"\nsick = "0.05"\nrecovered = "rest"',
    )
    compile_model(loads_model(fixed))


def test_the_clock_is_empty_without_rate_rows_inside_tunnels():
    flat = expand(loads_model(_flat_by_hand(1.0, 0.2, 0.1, 0.3))).model
    assert flat.rate_row_clock == {}


def test_transition_cell_scaling_applies_the_same_tunnel_step():
    # Reference: the compiler itself on the flat model with the rate cell times k (as
    # tests/test_sensitivity_cells.py does for the bundled demos).
    import copy
    from dataclasses import replace

    from caredecide.sensitivity.cell_scaling import RATE_SCALED, CellScaler

    model = loads_model(_text())
    flat = expand(model).model
    scaler = CellScaler(model)
    checked = 0
    for i, cell in enumerate(scaler.cells):
        if cell.rule != RATE_SCALED or not cell.from_id.startswith("sick"):
            continue
        batch = scaler.scaled(np.full(2, i), np.array([0.5, 1.5]))
        for d, k in enumerate((0.5, 1.5)):
            rows = copy.deepcopy(dict(flat.rates))
            rows[cell.action_id][cell.from_id][cell.to_id] = f"({cell.expression}) * {k!r}"
            expected = compile_model(replace(flat, rates=rows)).transition[0]
            np.testing.assert_allclose(batch.transition[d], expected, atol=1e-14)
            checked += 1
    assert checked == 12  # 3 copies x 2 exits x 2 factors


def test_the_diagram_draws_the_stay_one_step_on():
    from caredecide.diagram import transition_diagram

    edges = transition_diagram(loads_model(_text()), "wait").edges
    stay = edges[(edges["source"] == SICK[0]) & (edges["cell"] == "rates.wait.sick")]
    assert stay[["target", "expression"]].values.tolist() == [
        [SICK[1], "stays (one tunnel step on)"]
    ]
    # Welton & Ades 2005: exp(-0.5) stays (see the first test).
    assert float(stay["probability"].iloc[0]) == pytest.approx(0.6065306597, abs=1e-10)
    last = edges[(edges["source"] == SICK[2]) & (edges["cell"] == "rates.wait.sick")]
    assert last[["target", "expression"]].values.tolist() == [[SICK[2], "stays"]]
