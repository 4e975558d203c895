"""One test per validation rule: each error names the place and the offending value.

Models come from ``tests.conftest.small_model_dict`` with one thing broken.
"""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model, estimate_compiled_bytes
from caredecide.errors import ModelError, ModelTooLargeError
from caredecide.modelfile import loads_model, validate_model
from tests.conftest import load_dict, small_model_dict


def problems_of(data) -> str:
    with pytest.raises(ModelError) as info:
        load_dict(data)
    return str(info.value)


def test_toml_syntax_error_gives_line_number():
    text = 'format = 1\ntitle = "x"\n[settings]\ncycle_years = = 1\n'
    with pytest.raises(ModelError) as info:
        loads_model(text, file="broken.toml")
    problem = info.value.problems[0]
    assert problem.line == 4
    assert "broken.toml, line 4" in str(info.value) and "TOML syntax error" in str(info.value)


def test_unknown_format_version():
    data = small_model_dict()
    data["format"] = 7
    message = problems_of(data)
    assert "test.toml: format: unknown format version 7" in message


def test_unknown_field_is_named_with_the_expected_fields():
    data = small_model_dict()
    data["states"][0]["qaly_wieght"] = 0.8
    assert "states[0].qaly_wieght: unknown field 'qaly_wieght'" in problems_of(data)


def test_unknown_target_state_in_a_row():
    data = small_model_dict()
    data["transitions"]["wait"]["well"]["sik"] = 0.0
    assert "transitions.wait.well.sik: unknown state 'sik'" in problems_of(data)


def test_unknown_action_in_transitions():
    data = small_model_dict()
    data["transitions"]["operate"] = {"sick": {"dead": 0.1, "sick": "rest"}}
    assert "transitions.operate: unknown action" in problems_of(data)


def test_unknown_parameter_in_an_expression():
    data = small_model_dict()
    data["transitions"]["wait"]["well"]["sick"] = "p_sik"
    message = problems_of(data)
    assert "transitions.wait.well.sick" in message and "'p_sik'" in message
    assert "did you mean p_sick" in message


def test_unknown_function_in_an_expression():
    data = small_model_dict()
    data["states"][1]["cost"] = "sqrt(c_drug)"
    message = problems_of(data)
    assert "states.sick.cost" in message and "unknown function 'sqrt'" in message


def test_probability_above_one_names_draw_cycle_and_age():
    data = small_model_dict()
    # Grows with the cycle: above 1 from cycle 9 (0.1 + 9 x 0.1 = 1.0; cycle 10 does not exist).
    data["transitions"]["wait"]["well"]["sick"] = "p_sick * (1 + cycle * 1.2)"
    message = problems_of(data)
    assert "transitions.wait.well.sick" in message
    assert "for draw 0 in cycle 8 (age 68)" in message and "probability in [0, 1]" in message


def test_probability_outside_unit_interval_in_one_draw_of_a_batch(small_model):
    with pytest.raises(ModelError) as info:
        compile_model(small_model, {"p_sick": np.array([0.1, 0.2, 1.3])})
    message = str(info.value)
    assert "transitions.wait.well.sick" in message and "1.3" in message and "draw 2" in message


def test_row_not_summing_to_one():
    data = small_model_dict()
    data["transitions"]["wait"]["sick"] = {"dead": 0.2, "sick": 0.7}
    message = problems_of(data)
    assert "transitions.wait.sick: row sums to 0.9 for draw 0 in every cycle" in message
    assert "expected 1" in message


def test_every_row_not_summing_to_one_is_named():
    # Two rows given without "rest", both off (the other rows sum to 1 by their rest):
    # each is reported with its own sum.
    data = small_model_dict()
    data["transitions"]["wait"]["sick"] = {"dead": 0.2, "sick": 0.7}
    data["transitions"]["treat"]["sick"] = {"dead": 0.1, "sick": 0.95}
    message = problems_of(data)
    assert "transitions.wait.sick: row sums to 0.9 for draw 0 in every cycle" in message
    assert "transitions.treat.sick: row sums to 1.05 for draw 0 in every cycle" in message


def test_negative_remainder():
    data = small_model_dict()
    data["transitions"]["wait"]["well"] = {"sick": 0.7, "dead": 0.4, "well": "rest"}
    message = problems_of(data)
    assert "transitions.wait.well.well" in message and "remainder" in message
    assert "-0.1" in message  # 1 - 0.7 - 0.4


def test_two_remainder_keywords_in_one_row():
    data = small_model_dict()
    data["transitions"]["wait"]["well"] = {"sick": "rest", "dead": 0.01, "well": "rest"}
    assert "transitions.wait.well: 2 entries use 'rest'" in problems_of(data)


def test_absorbing_state_with_exits():
    data = small_model_dict()
    data["transitions"]["wait"]["dead"] = {"well": 0.5, "dead": "rest"}
    message = problems_of(data)
    assert "transitions.wait.dead: state 'dead' is absorbing but has exits ['well']" in message


def test_state_with_no_allowed_action():
    data = small_model_dict()
    data["actions"][0]["allowed_in"] = ["well"]
    del data["transitions"]["wait"]["sick"]
    data["actions"][1]["allowed_in"] = ["well"]
    data["transitions"]["treat"] = {"well": {"well": "rest"}}
    assert "states.sick: no action is allowed in this state" in problems_of(data)


def test_missing_row_for_an_allowed_action():
    data = small_model_dict()
    del data["transitions"]["treat"]["sick"]
    assert "transitions.treat.sick: missing row" in problems_of(data)


def test_nan_or_infinite_value_is_named():
    data = small_model_dict()
    data["states"][1]["cost"] = "c_drug / (p_sick - 0.1)"  # division by zero
    message = problems_of(data)
    assert "states.sick.cost" in message and "inf" in message and "not a finite number" in message


def test_negative_cost_where_not_allowed():
    data = small_model_dict()
    data["states"][0]["cost"] = -50.0
    message = problems_of(data)
    assert "states.well.cost" in message and "-50.0" in message and "cost >= 0" in message


def test_negative_cost_allowed_when_flagged():
    data = small_model_dict()
    data["states"][0]["cost"] = -50.0
    data["states"][0]["negative_cost_allowed"] = True
    assert load_dict(data).states[0].cost == -50.0


@pytest.mark.parametrize("rate", [-0.01, 1.0, 1.5])
def test_discount_rate_outside_zero_one(rate):
    data = small_model_dict()
    data["settings"]["discount_costs"] = rate
    message = problems_of(data)
    assert f"settings.discount_costs: {rate!r}; expected an annual rate in [0, 1)" in message


@pytest.mark.parametrize("length", [0.0, -1.0])
def test_cycle_length_not_positive(length):
    data = small_model_dict()
    data["settings"]["cycle_years"] = length
    assert f"settings.cycle_years: {length!r}; expected a cycle length" in problems_of(data)


def test_horizon_below_one_cycle():
    data = small_model_dict()
    data["settings"]["horizon_cycles"] = 0
    assert "settings.horizon_cycles: 0; expected a whole number >= 1" in problems_of(data)


def test_two_horizons_given():
    data = small_model_dict()
    data["settings"]["until_age"] = 90.0
    assert "expected exactly one of horizon_cycles, until_age" in problems_of(data)


def test_until_age_not_after_start_age():
    data = small_model_dict()
    del data["settings"]["horizon_cycles"]
    data["settings"]["until_age"] = 50.0
    assert "settings.until_age: 50.0; expected an age greater than start_age" in problems_of(data)


def test_infinite_horizon_with_age_dependence():
    data = small_model_dict()
    del data["settings"]["horizon_cycles"]
    data["settings"]["horizon"] = "infinite"
    data["states"][0]["cost"] = "100 + age"
    assert "states.well.cost" in problems_of(data) and "stationary" in problems_of(data)


def test_background_without_mortality_section():
    data = small_model_dict()
    data["transitions"]["wait"]["well"]["dead"] = "background"
    assert "uses 'background' but the model has no [mortality]" in problems_of(data)


def test_missing_source():
    data = small_model_dict()
    data["parameters"]["p_sick"]["source"] = "  "
    assert "parameters.p_sick.source: missing source" in problems_of(data)


def test_bad_distribution_is_reported_with_its_place():
    data = small_model_dict()
    data["parameters"]["p_sick"]["distribution"] = {"type": "beta", "mean": 0.1, "se": 0.5}
    assert "parameters.p_sick.distribution" in problems_of(data)


def test_reserved_parameter_name():
    data = small_model_dict()
    data["parameters"]["age"] = {"value": 1.0, "source": "Synthetic: test"}
    assert "parameters.age: name 'age' is reserved" in problems_of(data)


def test_start_shares_must_sum_to_one():
    data = small_model_dict()
    data["settings"]["start"] = {"well": 0.5, "sick": 0.4}
    assert "settings.start: shares sum to 0.9" in problems_of(data)


def test_unknown_start_state():
    data = small_model_dict()
    data["settings"]["start"] = "healthy"
    assert "settings.start: unknown state 'healthy'" in problems_of(data)


def test_rate_row_also_given_by_probabilities():
    data = small_model_dict()
    data["rates"] = {"wait": {"sick": {"dead": 0.2}}}
    assert "transitions.wait.sick" in problems_of(data) or "rates.wait.sick" in problems_of(data)
    assert "given both by [rates] and by [transitions]" in problems_of(data)


def test_dirichlet_member_also_declared_as_parameter():
    data = small_model_dict()
    data["groups"] = {
        "from_well": {"members": ["p_sick", "p_stay"], "counts": [10, 90], "source": "Synthetic"}
    }
    assert "groups.from_well.members: 'p_sick' is also declared in [parameters]" in problems_of(
        data
    )


def test_every_problem_is_reported_at_once():
    data = small_model_dict()
    data["settings"]["cycle_years"] = 0.0
    data["settings"]["discount_outcomes"] = 2.0
    data["parameters"]["u_sick"]["source"] = ""
    with pytest.raises(ModelError) as info:
        load_dict(data)
    wheres = {p.where for p in info.value.problems}
    assert {"settings.cycle_years", "settings.discount_outcomes", "parameters.u_sick.source"} <= (
        wheres
    )


def test_model_too_large_for_memory_gives_the_estimate(small_model):
    from caredecide.memory import pipeline_peak_bytes, shape_of

    needed = estimate_compiled_bytes(small_model, 1000)
    # 3 states, 2 actions, no time dependence: transitions 2x3x3 + occupancy 2x3 + decisions
    # 2x3x2 = 36 floats per draw (common practice: 8 bytes per float64).
    assert needed == 1000 * 36 * 8
    peak = pipeline_peak_bytes(shape_of(small_model, 1000))
    assert peak > needed  # temporaries and the solver's results are counted too
    with pytest.raises(ModelTooLargeError) as info:
        compile_model(small_model, {"p_sick": np.full(1000, 0.1)}, memory_limit_bytes=peak - 1)
    message = str(info.value)
    assert f"({peak:,} bytes)" in message and f"({peak - 1:,} bytes)" in message
    assert "test.toml" in message and "Use at most" in message and "parameter sets" in message
    compile_model(small_model, {"p_sick": np.full(1000, 0.1)}, memory_limit_bytes=peak)


def test_model_too_large_even_for_one_draw_names_the_horizon(small_model):
    data = small_model_dict()
    data["settings"]["horizon_cycles"] = 1_000_000
    data["transitions"]["wait"]["well"]["dead"] = "0.01 + 0.0 * age"  # time-dependent rows
    model = load_dict(data)
    with pytest.raises(ModelTooLargeError) as info:
        compile_model(model, memory_limit_bytes=10_000_000)
    assert "shorten the horizon (settings.horizon_cycles or settings.until_age)" in str(info.value)


def warnings_of(model) -> list:
    """The model's warnings but the repeated one-off charge, which the small model has by
    design (its treat action keeps part of the cohort in `sick`; tested on its own)."""
    return [w for w in validate_model(model) if w.extra.get("rule") != "repeated_one_off"]


def test_warning_for_qaly_weight_above_one(small_model):
    data = small_model_dict()
    data["states"][0]["qaly_weight"] = 1.2
    warnings = warnings_of(load_dict(data))
    assert [w.where for w in warnings] == ["states.well.qaly_weight"]
    assert "1.2" in warnings[0].message


def test_warning_for_death_below_background():
    data = small_model_dict()
    data["mortality"] = {"gompertz_makeham": {"a": 0.0007, "b": 5e-5, "c": 10**0.04}}
    # Background at age 60 is 0.0137604 per year (Bowers et al. 1997, from memory), above 0.01.
    warnings = warnings_of(load_dict(data))
    assert [w.where for w in warnings] == ["transitions.wait.well"]
    assert "0.01 at age 60 is below background mortality 0.0137604" in warnings[0].message


def test_the_small_model_itself_is_valid(small_model):
    assert warnings_of(small_model) == []


def test_unknown_state_in_allowed_in():
    data = small_model_dict()
    data["actions"][1]["allowed_in"] = ["sick", "sikc"]
    assert "actions.treat.allowed_in: unknown state 'sikc'" in problems_of(data)


def test_absorbing_state_in_allowed_in():
    data = small_model_dict()
    data["actions"][1]["allowed_in"] = ["sick", "dead"]
    assert "actions.treat.allowed_in: state 'dead' is absorbing" in problems_of(data)


def test_unknown_state_in_severity_order():
    data = small_model_dict()
    data["settings"]["severity_order"] = ["well", "ill"]
    assert "settings.severity_order: unknown state 'ill'" in problems_of(data)


def test_negative_rate_is_named():
    data = small_model_dict()
    del data["transitions"]["wait"]["sick"]
    data["rates"] = {"wait": {"sick": {"dead": "p_sick - 0.3"}}}
    message = problems_of(data)
    assert "rates.wait.sick.dead" in message and "-0.2" in message and "rate >= 0" in message


def test_rest_in_a_rate_row():
    data = small_model_dict()
    del data["transitions"]["wait"]["sick"]
    data["rates"] = {"wait": {"sick": {"dead": 0.1, "well": "rest"}}}
    assert "rates.wait.sick.well: 'rest' is only allowed in [transitions] rows" in problems_of(data)


def test_rest_in_a_cost_is_refused():
    data = small_model_dict()
    data["states"][0]["cost"] = "rest"
    assert "states.well.cost" in problems_of(data)


def test_probability_parameter_outside_unit_interval():
    data = small_model_dict()
    data["parameters"]["p_sick"]["value"] = 1.4
    assert "parameters.p_sick.value: 1.4; a probability must be in [0, 1]" in problems_of(data)


def test_value_outside_its_own_range():
    data = small_model_dict()
    data["parameters"]["c_drug"].update(low=1500.0, high=2000.0)
    assert "parameters.c_drug: value 1000.0 lies outside [low, high]" in problems_of(data)


def test_gompertz_makeham_constants_out_of_range():
    data = small_model_dict()
    data["mortality"] = {"gompertz_makeham": {"a": 0.0007, "b": 5e-5, "c": 0.9}}
    assert "mortality.gompertz_makeham.c: 0.9; expected a number > 1" in problems_of(data)


def test_life_table_starting_after_start_age(tmp_path):
    (tmp_path / "life.csv").write_text("age,annual_probability\n70,0.02\n71,0.03\n")
    data = small_model_dict()
    data["mortality"] = {"table": "life.csv"}
    with pytest.raises(ModelError, match="starts at age 70, after start_age = 60"):
        load_dict(data, base_dir=tmp_path)


def test_warning_for_a_rate_written_into_a_probability_row():
    data = small_model_dict()
    data["parameters"]["r_die_sick"] = {"value": 0.3, "kind": "rate", "source": "Synthetic"}
    data["transitions"]["wait"]["sick"]["dead"] = "r_die_sick"
    warnings = warnings_of(load_dict(data))
    assert [w.where for w in warnings] == ["transitions.wait.sick.dead"]
    assert "rate parameter 'r_die_sick' is used as a probability per cycle" in warnings[0].message
    assert "expected chance_within(r_die_sick, cycle_years)" in warnings[0].message
    # Converted, it is fine (Fleurence & Hollenbeak 2007: p = 1 - exp(-r t)).
    data["transitions"]["wait"]["sick"]["dead"] = "chance_within(r_die_sick, cycle_years)"
    assert warnings_of(load_dict(data)) == []


def test_warning_for_a_probability_written_into_a_rate_row():
    data = small_model_dict()
    del data["transitions"]["wait"]["sick"]
    data["rates"] = {"wait": {"sick": {"dead": "p_die_sick"}}}
    data["parameters"]["p_die_sick"]["per_years"] = 5.0
    warnings = warnings_of(load_dict(data))
    assert [w.where for w in warnings] == ["rates.wait.sick.dead"]
    assert "expected rate_behind(p_die_sick, 5)" in warnings[0].message
    # A rate split by a conditional probability is a rate: no warning.
    data["parameters"]["r_event"] = {"value": 0.3, "kind": "rate", "source": "Synthetic"}
    data["rates"]["wait"]["sick"]["dead"] = "r_event * p_die_sick"
    assert warnings_of(load_dict(data)) == []


def test_warning_for_a_probability_over_another_period_used_per_cycle():
    data = small_model_dict()
    data["parameters"]["p_sick"]["per_years"] = 5.0
    warnings = warnings_of(load_dict(data))
    assert [w.where for w in warnings] == ["transitions.wait.well.sick"]
    assert "'p_sick' is a probability over 5 years, used as the probability per cycle of 1 " in (
        warnings[0].message
    )
    assert "expected per_cycle(p_sick, 5)" in warnings[0].message
    data["transitions"]["wait"]["well"]["sick"] = "per_cycle(p_sick, 5)"
    assert warnings_of(load_dict(data)) == []
    # A period equal to the cycle needs no conversion.
    data["transitions"]["wait"]["well"]["sick"] = "p_sick"
    data["parameters"]["p_sick"]["per_years"] = 1.0
    assert warnings_of(load_dict(data)) == []


def test_warning_for_a_life_table_that_stops_before_the_model(tmp_path):
    (tmp_path / "life.csv").write_text("age,annual_probability\n60,0.01\n61,0.02\n")
    data = small_model_dict()
    data["mortality"] = {"table": "life.csv"}
    data["transitions"]["wait"]["well"]["dead"] = "background"
    warnings = warnings_of(load_dict(data, base_dir=tmp_path))
    assert [w.where for w in warnings] == ["mortality.table"]
    assert "ends at age 61 but the model runs to age 70; from age 62 on" in warnings[0].message
    # A table whose last row (age 69) covers the last cycle [69, 70) carries nothing on.
    rows = "".join(f"{age},0.01\n" for age in range(60, 70))
    (tmp_path / "life.csv").write_text("age,annual_probability\n" + rows)
    assert warnings_of(load_dict(data, base_dir=tmp_path)) == []


def test_cohort_starting_wholly_in_absorbing_states():
    data = small_model_dict()
    data["settings"]["start"] = "dead"
    message = problems_of(data)
    assert "settings.start: 'dead': the whole cohort starts in absorbing states ['dead']" in message
    # A zero share in an absorbing state is harmless.
    data["settings"]["start"] = {"well": 1.0, "dead": 0.0}
    assert load_dict(data).start_distribution() == {"well": 1.0, "dead": 0.0}


def test_a_negative_cost_parameter_is_reported_under_parameters():
    # The value to fix sits in [parameters]: the problem names it there (the app lists
    # problems under the tab of their table), and says which entry uses it.
    from ui.working_model import problems_under

    data = small_model_dict()
    data["parameters"]["c_well"] = {"value": -5.0, "kind": "cost", "source": "Synthetic: test"}
    data["states"][0]["cost"] = "c_well"
    with pytest.raises(ModelError) as info:
        load_dict(data)
    problems = tuple(info.value.problems)
    assert [p.where for p in problems] == ["parameters.c_well"]
    assert "value -5.0" in problems[0].message and "used by states.well.cost" in problems[0].message
    assert problems_under(problems, "parameters") == list(problems)
    assert problems_under(problems, "states") == []


def test_death_below_background_is_found_in_sparse_rows_as_in_dense_rows():
    # A 300-state age-dependent chain compiles to sparse rows (their dense array is a NaN
    # stand-in, which used to hide this warning). Background mortality a = 0.05 per year
    # is above the model's death probability 0.02 (1 + 0.001 age) <= 0.0218 at every age
    # of the run (ages 40-49), so every row of a living state under either action warns:
    # 299 rows under a0 and 299 under a1 (counted by hand from grid_model_text).
    from caredecide.compiled import transition_row
    from caredecide.modelfile.validator import _entering
    from tests.memory_models import grid_model_text

    text = grid_model_text(300, 2, 10, timed=True)
    text += "[mortality]\ngompertz_makeham = { a = 0.05, b = 1e-9, c = 1.1 }\n"
    model = loads_model(text, file="grid.toml", validate=False)
    compiled = compile_model(model)
    assert compiled.transition_form == "sparse"
    dead = np.array([s == "dead" for s in compiled.state_ids])
    entering = _entering(compiled, dead)  # (Tp, A, S)
    for t, a, s in [(0, 0, 0), (9, 1, 150), (5, 0, 298), (3, 1, 299)]:
        assert entering[t, a, s] == pytest.approx(transition_row(compiled, 0, t, a, s)[dead].sum())
    warnings = [w for w in validate_model(model) if "below background mortality" in w.message]
    assert len(warnings) == 2 * 299
    first = next(w for w in warnings if w.where == "transitions.a0.s0")
    # 0.02 x (1 + 0.001 x 40) = 0.0208 at age 40; background 1 - exp(-0.05) = 0.0487706
    # (b c^age adds < 2e-7).
    assert "death probability 0.0208 at age 40 is below background mortality 0.04877" in (
        first.message
    )
