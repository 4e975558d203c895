"""State attributes and tunnels: expanded into flat states before compiling.

Every model here is a synthetic scenario of our own; the figures checked are derived by
hand in the comments beside them. What a tunnel is follows the trade: a chain of copies of
a state, one per cycle since entry, that gives a Markov cohort model memory of the time
spent in a state (Siebert et al. 2012, Med Decis Making 32(5):690-700; from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.evaluate import evaluate_policy
from caredecide.expand import MAX_EXPANDED_STATES, expand
from caredecide.grouping import grouped_time, grouped_trace, state_group_frame
from caredecide.modelfile import dumps_model, loads_model, validate_model
from caredecide.objective import Objective

HEADER = """
format = 2
title = "Synthetic test model"
[settings]
cycle_years = 1.0
horizon_cycles = {horizon}
start = "{start}"
within_cycle = "{within}"
discount_costs = {discount}
willingness_to_pay = 20000
"""

ATTRIBUTE_MODEL = (
    HEADER.format(horizon=6, start="stage_1__untreated", within="trapezoid", discount=0.03)
    + """
severity_order = ["stage_1", "stage_2"]

[attributes.on_treatment]
values = { untreated = 0, treated = 1 }

[[states]]
id = "stage_1"
label = "Stage 1"
qaly_weight = "u_1 - on_treatment * u_loss"
cost = "c_1 + on_treatment * c_drug"
attributes = ["on_treatment"]

[[states]]
id = "stage_2"
label = "Stage 2"
qaly_weight = "u_2 - on_treatment * u_loss"
cost = "c_2 + on_treatment * c_drug"
attributes = ["on_treatment"]

[[states]]
id = "dead"
absorbing = true

[[actions]]
id = "wait"
allowed_in = "all"

[[actions]]
id = "treat"
allowed_in = ["stage_1__untreated", "stage_2__untreated"]
oneoff_cost = 500

[transitions.wait.stage_1]
stage_2 = "with_hr(p_12, when(on_treatment == 1, hr, 1))"
dead = "p_die"
stage_1 = "rest"

[rates.wait.stage_2]
dead = "rate_behind(p_die, 1) + 0.1 * (1 - on_treatment)"

[transitions.treat.stage_1]
stage_2__treated = "with_hr(p_12, hr)"
dead = "p_die"
stage_1__treated = "rest"

[transitions.treat.stage_2]
dead = "p_die"
stage_2__treated = "rest"
"""
)

HAND_COPIED = (
    HEADER.format(horizon=6, start="stage_1__untreated", within="trapezoid", discount=0.03)
    + """
severity_order = ["stage_1__untreated", "stage_1__treated", "stage_2__untreated",
                  "stage_2__treated"]

[[states]]
id = "stage_1__untreated"
qaly_weight = "u_1"
cost = "c_1"

[[states]]
id = "stage_1__treated"
qaly_weight = "u_1 - u_loss"
cost = "c_1 + c_drug"

[[states]]
id = "stage_2__untreated"
qaly_weight = "u_2"
cost = "c_2"

[[states]]
id = "stage_2__treated"
qaly_weight = "u_2 - u_loss"
cost = "c_2 + c_drug"

[[states]]
id = "dead"
absorbing = true

[[actions]]
id = "wait"
allowed_in = "all"

[[actions]]
id = "treat"
allowed_in = ["stage_1__untreated", "stage_2__untreated"]
oneoff_cost = 500

[transitions.wait.stage_1__untreated]
stage_2__untreated = "with_hr(p_12, 1)"
dead = "p_die"
stage_1__untreated = "rest"

[transitions.wait.stage_1__treated]
stage_2__treated = "with_hr(p_12, hr)"
dead = "p_die"
stage_1__treated = "rest"

[rates.wait.stage_2__untreated]
dead = "rate_behind(p_die, 1) + 0.1"

[rates.wait.stage_2__treated]
dead = "rate_behind(p_die, 1)"

[transitions.treat.stage_1__untreated]
stage_2__treated = "with_hr(p_12, hr)"
dead = "p_die"
stage_1__treated = "rest"

[transitions.treat.stage_2__untreated]
dead = "p_die"
stage_2__treated = "rest"
"""
)

PARAMETERS = """
[parameters.u_1]
value = 0.85
source = "Synthetic: invented for the test"
[parameters.u_2]
value = 0.6
source = "Synthetic: invented for the test"
[parameters.u_loss]
value = 0.05
source = "Synthetic: invented for the test"
[parameters.c_1]
value = 300
source = "Synthetic: invented for the test"
[parameters.c_2]
value = 2000
source = "Synthetic: invented for the test"
[parameters.c_drug]
value = 1200
source = "Synthetic: invented for the test"
[parameters.p_12]
value = 0.15
kind = "probability"
source = "Synthetic: invented for the test"
[parameters.hr]
value = 0.6
source = "Synthetic: invented for the test"
[parameters.p_die]
value = 0.02
kind = "probability"
source = "Synthetic: invented for the test"
"""

ARRAYS = (
    "transition",
    "allowed",
    "state_qaly",
    "state_cost",
    "decision_qaly",
    "decision_cost",
    "life_years",
    "start_distribution",
    "absorbing",
)


def _compiled(text: str, parameter_sets=None):
    return compile_model(loads_model(text), parameter_sets)


def test_attribute_model_equals_the_hand_copied_model_cell_for_cell():
    # Source: common practice - an attribute only saves writing out the copies by hand,
    # so the compiled arrays must be identical, for the base case and for other draws.
    draws = {"hr": np.array([0.6, 0.45, 0.9]), "c_drug": np.array([1200.0, 800.0, 0.0])}
    expanded = _compiled(ATTRIBUTE_MODEL + PARAMETERS, draws)
    hand = _compiled(HAND_COPIED + PARAMETERS, draws)
    assert expanded.state_ids == hand.state_ids
    assert expanded.ordered_states == hand.ordered_states
    for name in ARRAYS:
        assert np.array_equal(getattr(expanded, name), getattr(hand, name)), name
    assert expanded.state_labels[:2] == ("Stage 1, untreated", "Stage 1, treated")
    assert hand.state_groups == {}
    assert expanded.state_groups == {
        "state": ("stage_1", "stage_1", "stage_2", "stage_2", "dead"),
        "on_treatment": ("untreated", "treated", "untreated", "treated", ""),
    }


TUNNEL_MODEL = """
[attributes.on_treatment]
values = { untreated = 0, treated = 1 }

[tunnels.years_on_drug]
length = 2
only_for = { on_treatment = "treated" }
label = "years on drug"

[[states]]
id = "sick"
label = "Sick"
qaly_weight = 0.7
cost = "when(on_treatment == 1 and years_on_drug < 2, 1000, 0)"
attributes = ["on_treatment"]
tunnels = ["years_on_drug"]

[[states]]
id = "dead"
absorbing = true

[[actions]]
id = "wait"
allowed_in = "all"

[transitions.wait.sick__untreated]
sick__treated = "{enter}"
dead = "{die}"
sick = "rest"

[transitions.wait.sick__treated]
dead = "{die}"
sick = "rest"
"""


def _tunnel_model(*, start: str, enter: str, die: str, horizon: int = 4, discount=0.0) -> str:
    return HEADER.format(
        horizon=horizon, start=start, within="start", discount=discount
    ) + TUNNEL_MODEL.replace("{enter}", enter).replace("{die}", die)


def _outcome(text: str):
    compiled = _compiled(text)
    return compiled, evaluate_policy(compiled, 0, Objective("net_benefit", 20000.0))


def test_tunnel_ids_labels_and_steps_are_readable_and_stable():
    model = loads_model(_tunnel_model(start="sick__untreated", enter="0.5", die="0"))
    first, second = expand(model), expand(model)
    assert first == second
    assert first.model.state_ids == (
        "sick__untreated",
        "sick__treated__years_on_drug_0",
        "sick__treated__years_on_drug_1",
        "sick__treated__years_on_drug_2plus",
        "dead",
    )
    assert [s.label for s in first.model.states][1:4] == [
        "Sick, treated, years on drug 0",
        "Sick, treated, years on drug 1",
        "Sick, treated, years on drug 2+",
    ]
    rows = first.model.transitions["wait"]
    # Step k moves to k + 1; the last step keeps itself; entering starts at step 0.
    assert rows["sick__untreated"]["sick__treated__years_on_drug_0"] == "0.5"
    assert rows["sick__untreated"]["sick__untreated"] == "rest"
    assert rows["sick__treated__years_on_drug_0"]["sick__treated__years_on_drug_1"] == "rest"
    assert rows["sick__treated__years_on_drug_1"]["sick__treated__years_on_drug_2plus"] == "rest"
    last = rows["sick__treated__years_on_drug_2plus"]
    assert last["sick__treated__years_on_drug_2plus"] == "rest"
    assert first.groups["years_on_drug"] == ("", "0", "1", "2+", "")


def test_a_cost_in_the_first_two_cycles_on_treatment_started_in_the_tunnel():
    # Hand-derived (start-of-cycle counting, 4 cycles, 10% die each cycle): the cohort at
    # boundaries 0..3 is 1, 0.9, 0.81, 0.729; the drug is paid at steps 0 and 1 only, so
    # 1000 * (1 + 0.9) = 1900; discounted at 5%: 1000 + 900 / 1.05.
    _, outcome = _outcome(_tunnel_model(start="sick__treated", enter="0", die="0.1"))
    assert outcome.costs_undiscounted[0] == pytest.approx(1900.0, rel=1e-12)
    _, outcome = _outcome(_tunnel_model(start="sick__treated", enter="0", die="0.1", discount=0.05))
    assert outcome.costs[0] == pytest.approx(1000.0 + 900.0 / 1.05, rel=1e-12)


def test_a_cost_in_the_first_two_cycles_after_entering_the_tunnel():
    # Hand-derived: half of the untreated cohort starts treatment each cycle, nobody dies.
    # Boundary 1: 0.5 at step 0; boundary 2: 0.25 at step 0 and 0.5 at step 1; boundary 3:
    # 0.125 at step 0, 0.25 at step 1, 0.5 at step 2+. Drug paid at steps 0 and 1:
    # 1000 * (0.5 + 0.75 + 0.375) = 1625.
    compiled, outcome = _outcome(_tunnel_model(start="sick__untreated", enter="0.5", die="0"))
    assert outcome.costs_undiscounted[0] == pytest.approx(1625.0, rel=1e-12)
    steps = grouped_trace(outcome.trace[0], outcome.ages, compiled, "years_on_drug")
    at_3 = steps[steps["cycle"] == 3].set_index("years_on_drug")["proportion"]
    assert at_3.to_dict() == pytest.approx({"": 0.125, "0": 0.125, "1": 0.25, "2+": 0.5})
    treated = grouped_trace(outcome.trace[0], outcome.ages, compiled, "on_treatment")
    on = treated[treated["on_treatment"] == "treated"]["proportion"].to_numpy()
    np.testing.assert_allclose(on, [0.0, 0.5, 0.75, 0.875, 0.9375], rtol=0, atol=1e-15)
    # Expected cycles on treatment at boundaries 0..3 (start-of-cycle counting).
    time = grouped_time(outcome.trace[0], compiled, "on_treatment").set_index("on_treatment")
    assert time.loc["treated", "cycles"] == pytest.approx(0.5 + 0.75 + 0.875)


def test_an_effect_that_wanes_after_two_cycles_in_the_tunnel():
    # Hand-derived: death 10% per cycle in the first two cycles on treatment, 30% from
    # then on (the effect wanes). Alive at boundaries 0..4: 1, 0.9, 0.81, 0.81 * 0.7,
    # 0.81 * 0.49.
    text = _tunnel_model(
        start="sick__treated",
        enter="0",
        die="when(years_on_drug >= 2, 0.3, 0.1)",
    )
    compiled, outcome = _outcome(text)
    alive = outcome.trace[0][:, : compiled.n_states - 1].sum(axis=1)
    np.testing.assert_allclose(alive, [1, 0.9, 0.81, 0.567, 0.3969], rtol=1e-12)
    # Start-of-cycle counting: life-years are the alive shares at boundaries 0..3.
    assert outcome.life_years_undiscounted[0] == pytest.approx(1 + 0.9 + 0.81 + 0.567)


@settings(max_examples=25, deadline=None)
@given(
    length=st.integers(1, 5),
    stay=st.floats(0.0, 1.0),
    die=st.floats(0.0, 1.0),
    horizon=st.integers(1, 8),
)
def test_a_tunnel_no_expression_reads_changes_nothing(length, stay, die, horizon):
    # Invariant (common practice): splitting a state into tunnel steps that no
    # expression reads leaves the cohort in the state, summed over its steps, unchanged.
    die = die * (1 - stay)

    def text(tunnel: bool) -> str:
        states = 'tunnels = ["t"]' if tunnel else ""
        return (
            HEADER.format(horizon=horizon, start="a", within="trapezoid", discount=0.0)
            + (f"[tunnels.t]\nlength = {length}\n" if tunnel else "")
            + f"""
[[states]]
id = "a"
qaly_weight = 1
cost = 10
{states}
[[states]]
id = "b"
qaly_weight = 0.5
[[states]]
id = "dead"
absorbing = true
[[actions]]
id = "wait"
[transitions.wait.a]
a = {stay!r}
dead = {die!r}
b = "rest"
[transitions.wait.b]
a = 0.3
b = "rest"
"""
        )

    objective = Objective("net_benefit", 20000.0)
    plain = compile_model(loads_model(text(False)))
    split = compile_model(loads_model(text(True)))
    plain_out = evaluate_policy(plain, 0, objective)
    split_out = evaluate_policy(split, 0, objective)
    summed = grouped_trace(split_out.trace[0], split_out.ages, split, "state")
    for i, state in enumerate(plain.state_ids):
        np.testing.assert_allclose(
            summed[summed["state"] == state]["proportion"].to_numpy(),
            plain_out.trace[0][:, i],
            atol=1e-12,
        )
    assert split_out.value[0] == pytest.approx(plain_out.value[0], rel=1e-12, abs=1e-9)


def test_a_model_with_attributes_saves_and_reads_back_unchanged():
    model = loads_model(ATTRIBUTE_MODEL + PARAMETERS)
    assert loads_model(dumps_model(model)) == model
    tunnel = loads_model(_tunnel_model(start="sick__untreated", enter="0.5", die="0"))
    assert loads_model(dumps_model(tunnel)) == tunnel


def test_state_group_frame_lists_each_flat_state():
    compiled = _compiled(_tunnel_model(start="sick__untreated", enter="0.5", die="0"))
    frame = state_group_frame(compiled)
    assert list(frame.columns) == ["state_id", "label", "state", "on_treatment", "years_on_drug"]
    assert frame["years_on_drug"].tolist() == ["", "0", "1", "2+", ""]
    with pytest.raises(ValueError, match=r"cannot group by \['stage'\]"):
        grouped_trace(np.zeros((2, 5)), np.zeros(2), compiled, "stage")


# -- validation: one test per rule ---------------------------------------------------------
def _errors(text: str) -> str:
    with pytest.raises(ModelError) as error:
        loads_model(text)
    return str(error.value)


def _tunnel(**changes: str) -> str:
    text = _tunnel_model(start="sick__untreated", enter="0.5", die="0")
    for old, new in changes.items():
        old = old.replace("_SPACE_", " ")
        assert old in text, old
        text = text.replace(old, new)
    return text


@pytest.mark.parametrize("length", ["0", "-1", "2.5", '"two"', "true"])
def test_tunnel_length_must_be_a_whole_number_of_cycles(length):
    message = _errors(_tunnel(**{"length = 2": f"length = {length}"}))
    assert "tunnels.years_on_drug.length" in message
    assert "expected a whole number of cycles >= 1" in message


def test_unknown_attribute_value_in_a_row_is_named_with_a_suggestion():
    message = _errors(_tunnel(**{'sick__treated = "0.5"': 'sick__treatd = "0.5"'}))
    assert "transitions.wait.sick__untreated.sick__treatd" in message
    assert "'treatd' is not a value of state 'sick'" in message
    assert "did you mean 'treated'" in message


def test_unknown_attribute_on_a_state():
    message = _errors(_tunnel(**{'attributes = ["on_treatment"]': 'attributes = ["on_drug"]'}))
    assert "states.sick.attributes: unknown attribute 'on_drug'" in message


def test_unknown_tunnel_on_a_state():
    message = _errors(_tunnel(**{'tunnels = ["years_on_drug"]': 'tunnels = ["years"]'}))
    assert "states.sick.tunnels: unknown tunnel 'years'" in message


def test_tunnel_limited_to_an_unknown_value():
    message = _errors(_tunnel(**{'on_treatment = "treated" }': 'on_treatment = "yes" }'}))
    assert "tunnels.years_on_drug.only_for.on_treatment: unknown value 'yes'" in message


def test_tunnel_limited_by_an_attribute_the_state_does_not_have():
    text = _tunnel(**{'attributes = ["on_treatment"]': "attributes = []"})
    message = _errors(text)
    assert "tunnel 'years_on_drug' applies only for values of ['on_treatment']" in message


def test_too_many_expanded_states_are_refused_before_building_them():
    values = ", ".join(f"v{i} = {i}" for i in range(60))
    text = _tunnel(**{"untreated = 0, treated = 1": f"untreated = 0, treated = 1, {values}"})
    text = text.replace("length = 2", "length = 40").replace(
        'only_for = { on_treatment = "treated" }\n', ""
    )
    message = _errors(text)
    # 62 values x 41 tunnel steps (counting stops once past the limit).
    assert f"states, more than {MAX_EXPANDED_STATES:,}" in message
    assert "sick': ('on_treatment', 'years_on_drug')" in message
    text = text.replace(values, ", ".join(f"w{i} = {i}" for i in range(3000)))
    assert "would generate at least 3,002 states" in _errors(text)


def test_a_tunnel_on_an_absorbing_state_is_refused():
    text = _tunnel().replace(
        'id = "dead"\nabsorbing = true',
        'id = "dead"\nabsorbing = true\ntunnels = ["years_on_drug"]',
    )
    message = _errors(text.replace('only_for = { on_treatment = "treated" }\n', ""))
    assert "states.dead.tunnels: state 'dead' is absorbing" in message


def test_a_rate_row_inside_a_tunnel_moves_the_stay_one_step_on():
    # Formerly refused; tests/test_expand_rates.py checks the figures. One exit at 0.1 per
    # year over one year: exp(-0.1) = 0.9048374180 goes one step on (Welton & Ades 2005).
    text = _tunnel().replace(
        '[transitions.wait.sick__treated]\ndead = "0"\nsick = "rest"',
        "[rates.wait.sick__treated]\ndead = 0.1",
    )
    compiled = compile_model(loads_model(text))
    ids = list(compiled.state_ids)
    zero, one = (
        ids.index("sick__treated__years_on_drug_0"),
        ids.index("sick__treated__years_on_drug_1"),
    )
    P = compiled.transition[0, 0, 0]
    assert P[zero, one] == pytest.approx(0.9048374180, abs=1e-10)
    assert P[zero, zero] == 0.0


def test_start_must_name_one_copy():
    message = _errors(_tunnel(**{'start = "sick__untreated"': 'start = "sick"'}))
    assert "settings.start: 'sick' stands for 2 states" in message
    assert "name every attribute value" in message


def test_a_name_taken_by_a_parameter_is_refused():
    text = _tunnel() + '[parameters.on_treatment]\nvalue = 1\nsource = "Synthetic"\n'
    message = _errors(text)
    assert "attributes.on_treatment: name 'on_treatment' is already a parameter" in message


def test_a_state_id_with_the_separator_is_refused():
    text = _tunnel().replace('id = "dead"', 'id = "dead__x"').replace("dead =", "dead__x =")
    message = _errors(text)
    assert "states.dead__x.id: 'dead__x' contains '__'" in message


def test_a_value_name_with_the_separator_is_refused():
    message = _errors(_tunnel(**{"treated = 1": "on__drug = 1"}))
    assert "attributes.on_treatment.values.on__drug: value name 'on__drug'" in message


def test_attribute_values_must_be_numbers():
    message = _errors(_tunnel(**{"treated = 1": 'treated = "yes"'}))
    assert "attributes.on_treatment.values.treated: 'yes' is not a number" in message


def test_a_target_that_varies_by_an_attribute_the_source_lacks_must_name_it():
    text = _tunnel().replace(
        '[[states]]\nid = "dead"',
        '[[states]]\nid = "well"\nqaly_weight = 1\n\n[[states]]\nid = "dead"',
    )
    text += '[transitions.wait.well]\nsick = 0.1\nwell = "rest"\n'
    message = _errors(text)
    assert "transitions.wait.well.sick: state 'sick' varies by 'on_treatment'" in message
    assert "e.g. 'sick__untreated'" in message


def test_a_tunnel_step_cannot_be_named_in_a_row():
    message = _errors(_tunnel(**{'sick__treated = "0.5"': "sick__treated__years_on_drug_1 = 0.5"}))
    assert "names a tunnel step ('years_on_drug_1')" in message


def test_two_entries_of_a_row_reaching_one_copy_are_refused():
    text = _tunnel(**{'sick__treated = "0.5"': 'sick__treated = "0.5"\nsick__untreated = 0'})
    message = _errors(text)
    assert "transitions.wait.sick__untreated.sick: from 'sick__untreated'" in message
    assert "another entry of the row reaches too" in message


def test_a_copy_given_two_rows_is_refused():
    text = _tunnel() + '[transitions.wait.sick]\ndead = 0.1\nsick = "rest"\n'
    message = _errors(text)
    assert "transitions.wait.sick: the row of 'sick__untreated' is also given by" in message


def test_one_value_name_in_two_attributes_of_a_state_is_refused():
    text = _tunnel().replace(
        "[tunnels.years_on_drug]",
        "[attributes.arm]\nvalues = { treated = 0, other = 1 }\n\n[tunnels.years_on_drug]",
    )
    text = text.replace('attributes = ["on_treatment"]', 'attributes = ["on_treatment", "arm"]')
    message = _errors(text)
    assert "value name 'treated' belongs to both 'on_treatment' and 'arm'" in message


def test_reading_a_tunnel_outside_it_without_its_attribute_warns():
    guarded = "when(on_treatment == 1 and years_on_drug < 2, 1000, 0)"
    text = _tunnel(**{guarded: "when(years_on_drug < 2, 1000, 0)"})
    warnings = validate_model(loads_model(text, validate=False))
    messages = [w.message for w in warnings if w.where == "states.sick__untreated.cost"]
    assert len(messages) == 1
    assert "reads 'years_on_drug' in 'sick__untreated', which is outside the tunnel" in messages[0]
    assert validate_model(loads_model(_tunnel(), validate=False)) == []


def test_the_documented_example_generates_the_documented_states():
    from pathlib import Path

    docs = (Path(__file__).parents[1] / "docs" / "model-file.md").read_text(encoding="utf-8")
    section = docs.split("## `[attributes]`, `[tunnels]`", 1)[1].split("\n## ", 1)[0]
    example = section.split("```toml\n", 1)[1].split("```", 1)[0]
    table = [line.split("|")[1:3] for line in section.splitlines() if line.startswith("| `")]
    documented = [(i.strip().strip("`"), label.strip()) for i, label in table]
    parameters = "".join(
        f'[parameters.{name}]\nvalue = {value}\nsource = "Synthetic"\n'
        for name, value in (
            ("u_sick", 0.7),
            ("u_drug_harm", 0.05),
            ("c_care", 100),
            ("c_drug", 1000),
            ("p_die", 0.1),
            ("rr_drug", 0.5),
        )
    )
    text = (
        HEADER.format(horizon=8, start="sick__untreated", within="start", discount=0.0)
        + example
        + '[[states]]\nid = "dead"\nabsorbing = true\n[[actions]]\nid = "wait"\n'
        + parameters
    )
    model = loads_model(text)
    flat = expand(model).model
    assert [(s.id, s.label) for s in flat.states][:-1] == documented


def test_a_strategy_table_may_name_a_declared_state_or_a_value(tmp_path):
    from caredecide.grouping import states_named
    from caredecide.strategies import load_strategy_table

    compiled = _compiled(ATTRIBUTE_MODEL + PARAMETERS)
    assert states_named(compiled, "stage_1").tolist() == [True, True, False, False, False]
    assert states_named(compiled, "stage_2__untreated").tolist() == [0, 0, 1, 0, 0]
    assert states_named(compiled, "stage_2__treatd") is None
    table = tmp_path / "arms.strategies.csv"
    table.write_text(
        "strategy,state,age_from,age_to,action\n"
        "late,stage_2__untreated,,,treat\n"
        "late,stage_1,,,wait\n",
        encoding="utf-8",
    )
    (late,) = load_strategy_table(compiled, table)
    treat, wait = compiled.action_ids.index("treat"), compiled.action_ids.index("wait")
    assert (late.policy[:, 2] == treat).all()
    assert (late.policy[:, [0, 1, 3]] == wait).all()
    table.write_text("strategy,state,action\nbad,stage_3,treat\n", encoding="utf-8")
    with pytest.raises(ModelError, match="unknown state 'stage_3'"):
        load_strategy_table(compiled, table)


def test_the_report_shows_the_trace_by_attribute_and_tunnel(tmp_path):
    from caredecide.report import build_report

    model = tmp_path / "tunnel.toml"
    model.write_text(_tunnel_model(start="sick__untreated", enter="0.5", die="0.1"), "utf-8")
    out = tmp_path / "report.html"
    build_report(model, out, draws=20, seed=1)
    page = out.read_text(encoding="utf-8")
    policy = page[page.index('<section id="policy">') : page.index('<section id="strategies">')]
    for name in ("declared state", "on_treatment", "years_on_drug"):
        assert f"<h3>Cohort trace by {name}</h3>" in policy


def test_a_tunnel_shared_by_two_states_keeps_counting_across_them():
    # Common practice: time on treatment goes on when the disease progresses; a state
    # with a tunnel of its own counts time in that state only.
    text = (
        HEADER.format(horizon=3, start="a", within="start", discount=0.0)
        + """
[tunnels.on_drug]
length = 3
[tunnels.in_b]
length = 1
[[states]]
id = "a"
tunnels = ["on_drug"]
[[states]]
id = "b"
tunnels = ["on_drug", "in_b"]
[[states]]
id = "dead"
absorbing = true
[[actions]]
id = "wait"
[transitions.wait.a]
b = 1
[transitions.wait.b]
b = 1
"""
    )
    flat = expand(loads_model(text)).model
    rows = flat.transitions["wait"]
    assert rows["a__on_drug_0"] == {"b__on_drug_1__in_b_0": 1.0}
    assert rows["b__on_drug_1__in_b_0"] == {"b__on_drug_2__in_b_1plus": 1.0}
    assert rows["b__on_drug_3plus__in_b_1plus"] == {"b__on_drug_3plus__in_b_1plus": 1.0}


@settings(max_examples=25, deadline=None)
@given(
    n_values=st.integers(1, 4),
    length=st.integers(1, 4),
    limited=st.booleans(),
    die=st.floats(0.0, 0.5),
)
def test_generated_states_are_counted_named_once_and_keep_the_cohort_whole(
    n_values, length, limited, die
):
    # Invariants (common practice): one state per value and step, ids unique, rows that
    # sum to 1, and a cohort trace whose groups add up to the whole cohort every cycle.
    values = ", ".join(f"v{i} = {i}" for i in range(n_values))
    only_for = 'only_for = { kind = "v0" }\n' if limited else ""
    text = (
        HEADER.format(horizon=5, start="a__v0", within="start", discount=0.0)
        + f"""
[attributes.kind]
values = {{ {values} }}
[tunnels.t]
length = {length}
{only_for}
[[states]]
id = "a"
qaly_weight = "1 - 0.1 * kind - 0.01 * t"
attributes = ["kind"]
tunnels = ["t"]
[[states]]
id = "dead"
absorbing = true
[[actions]]
id = "wait"
[transitions.wait.a]
dead = {die!r}
a__v0 = "rest"
"""
    )
    compiled = _compiled(text)
    in_tunnel = 1 if limited else n_values
    assert compiled.n_states == (n_values - in_tunnel) + in_tunnel * (length + 1) + 1
    assert len(set(compiled.state_ids)) == compiled.n_states
    np.testing.assert_allclose(compiled.transition.sum(axis=-1), 1.0, atol=1e-12)
    outcome = evaluate_policy(compiled, 0, Objective("qalys", 0.0))
    for by in ("state", "kind", "t"):
        grouped = grouped_trace(outcome.trace[0], outcome.ages, compiled, by)
        np.testing.assert_allclose(grouped.groupby("cycle")["proportion"].sum(), 1.0, atol=1e-12)


def test_a_derived_value_may_read_attributes_and_tunnels():
    # Common practice: a named intermediate is shorthand, so writing it in changes nothing.
    derived = '[derived]\ndrug_cost = "when(on_treatment == 1 and years_on_drug < 2, 1000, 0)"\n'
    plain = _tunnel_model(start="sick__untreated", enter="0.5", die="0.1")
    text = plain.replace(
        'cost = "when(on_treatment == 1 and years_on_drug < 2, 1000, 0)"', 'cost = "drug_cost"'
    )
    with_derived = _compiled(text + derived)
    assert np.array_equal(with_derived.state_cost, _compiled(plain).state_cost)
    bad = text.replace('id = "wait"\n', 'id = "wait"\noneoff_cost = "drug_cost"\n') + derived
    message = _errors(bad)
    assert "actions.wait.oneoff_cost: reads derived value(s) ['drug_cost']" in message


def test_the_bundled_demo_with_attributes_and_a_tunnel_moves_the_cohort_as_written():
    from caredecide.mortality import background_probability
    from caredecide.solvers import solve
    from synthetic_cohort import MODELS_DIR

    model = loads_model(
        (MODELS_DIR / "demo_years_since_progression.toml").read_text("utf-8"),
        base_dir=MODELS_DIR,
    )
    compiled = compile_model(model)
    assert compiled.n_states == 9
    objective = Objective.from_settings(model.settings)
    result = solve(compiled, objective)
    start = compiled.state_ids.index("stable__off_drug")
    assert compiled.action_ids[result.policy[0, 0, start]] == "start_drug"
    outcome = evaluate_policy(compiled, result.policy, objective)
    by_drug = grouped_trace(outcome.trace[0], outcome.ages, compiled, "drug")
    by_year = grouped_trace(outcome.trace[0], outcome.ages, compiled, "years_progressed")
    q55 = float(background_probability(model.mortality, np.array([55.0]), 1.0)[0])
    # Hand-derived first cycle: the whole cohort starts the drug at 55; those who do not die
    # of background causes are on the drug at 56, and 1 - (1 - 0.08) ** 0.6 of the cohort
    # has progressed (a hazard ratio on an annual probability, Fleurence & Hollenbeak 2007)
    # and is in its first year since progression.
    on_drug = by_drug[(by_drug["cycle"] == 1) & (by_drug["drug"] == "on_drug")]["proportion"]
    assert float(on_drug.iloc[0]) == pytest.approx(1.0 - q55, rel=1e-12)
    year_0 = by_year[(by_year["cycle"] == 1) & (by_year["years_progressed"] == "0")]["proportion"]
    assert float(year_0.iloc[0]) == pytest.approx(1.0 - 0.92**0.6, rel=1e-12)


def test_comparing_a_tunnel_with_a_step_it_never_reaches_warns():
    text = _tunnel_model(
        start="sick__untreated", enter="0.5", die="when(years_on_drug >= 5, 0.2, 0.1)"
    )
    warnings = validate_model(loads_model(text, validate=False))
    found = [w for w in warnings if "steps stop at 2" in w.message]
    assert [w.where for w in found] == [  # one warning per cell written in the file
        "transitions.wait.sick__untreated.dead",
        "transitions.wait.sick__treated.dead",
    ]
    assert "compares 'years_on_drug' with 5" in found[0].message
    assert "expected tunnels.years_on_drug.length >= 5" in found[0].message


def test_the_compiled_base_case_from_validation_keeps_the_grouping():
    from caredecide.modelfile import validate_and_compile

    model = loads_model(_tunnel_model(start="sick__untreated", enter="0.5", die="0.1"))
    assert validate_and_compile(model).compiled.state_groups == compile_model(model).state_groups


def test_the_base_case_result_gives_the_trace_and_time_by_group():
    from caredecide.analysis.base_case import analyse_base_case

    model = loads_model(_tunnel_model(start="sick__untreated", enter="0.5", die="0"))
    base = analyse_base_case(model)
    by_step = base.grouped_trace_frame("years_on_drug")
    at_3 = by_step[by_step["cycle"] == 3].set_index("years_on_drug")["proportion"]
    # Hand-derived as in test_a_cost_in_the_first_two_cycles_after_entering_the_tunnel.
    assert at_3.to_dict() == pytest.approx({"": 0.125, "0": 0.125, "1": 0.25, "2+": 0.5})
    time = base.time_in_group_frame("on_treatment").set_index("on_treatment")
    assert time.loc["treated", "years"] == pytest.approx(0.5 + 0.75 + 0.875)


def test_an_expression_reading_an_attribute_its_state_lacks_is_refused():
    text = _tunnel().replace(
        'id = "dead"\nabsorbing = true', 'id = "dead"\nabsorbing = true\ncost = "on_treatment * 5"'
    )
    message = _errors(text)
    assert (
        "states.dead.cost: 'on_treatment * 5' reads attribute 'on_treatment', which state "
        "'dead' does not vary by" in message
    )
