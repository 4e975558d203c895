"""Checks that catch modelling slips: a distribution that does not fit its parameter's kind,
a one-off charge that can repeat in consecutive cycles, unused parameters, and "did you
mean" suggestions for unknown names."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from caredecide.errors import ModelError
from caredecide.modelfile import load_model, validate_model
from caredecide.uncertainty.psa import analyse_uncertainty
from tests.conftest import load_dict, small_model_dict

# A copy of the first demo model, whose "Start treatment" rows keep the cohort in the
# untreated stage: the one-off start cost and toxicity are charged again every year.
REPEAT_PATTERN = Path(__file__).parent / "data" / "repeated_one_off_charge.toml"


def problems_of(data: dict) -> str:
    with pytest.raises(ModelError) as caught:
        load_dict(data)
    return str(caught.value)


# ------------------------------------------------------------- distributions versus kind
def test_normal_on_a_probability_is_refused_before_any_sampling():
    data = small_model_dict()
    data["parameters"]["p_sick"]["distribution"] = {"type": "normal", "mean": 0.1, "sd": 0.05}
    message = problems_of(data)
    assert "test.toml: parameters.p_sick.distribution: a normal distribution draws values in " in (
        message
    )
    assert "(-inf, inf), but 'p_sick' is a probability" in message
    assert "expected a distribution within [0, 1], such as beta" in message


def test_gamma_on_a_qaly_weight_is_refused():
    data = small_model_dict()
    data["parameters"]["u_sick"]["distribution"] = {"type": "gamma", "mean": 0.6, "se": 0.1}
    message = problems_of(data)
    assert "parameters.u_sick.distribution: a gamma distribution draws values in [0, inf)" in (
        message
    )
    assert "'u_sick' is a qaly_weight and a QALY weight is at most 1" in message


def test_uniform_beyond_a_ratio_range_is_refused_and_within_is_accepted():
    data = small_model_dict()
    data["parameters"]["rr_treat"]["distribution"] = {"type": "uniform", "low": -0.1, "high": 1.0}
    assert "'rr_treat' is a relative_risk and a relative risk is >= 0" in problems_of(data)
    data["parameters"]["rr_treat"]["distribution"] = {"type": "uniform", "low": 0.2, "high": 1.0}
    load_dict(data)


def test_fitting_distributions_pass_and_costs_are_free():
    # Common practice: beta for probabilities and utilities, lognormal for ratios, gamma
    # for costs; a normal on a cost is not refused (costs may be negative: savings).
    data = small_model_dict()
    specs = {
        "p_sick": {"type": "beta", "mean": 0.1, "se": 0.02},
        "u_sick": {"type": "beta", "mean": 0.6, "se": 0.05},
        "rr_treat": {"type": "lognormal", "low": 0.3, "high": 0.8},
        "c_drug": {"type": "normal", "mean": 1000.0, "sd": 100.0},
    }
    for name, spec in specs.items():
        data["parameters"][name]["distribution"] = spec
    load_dict(data)


def test_the_sampling_path_never_sees_a_misfit_distribution():
    # The same model is refused by the loader, so an uncertainty run cannot start with it
    # and fail later on a draw index.
    data = small_model_dict()
    data["parameters"]["p_die_sick"]["distribution"] = {"type": "normal", "mean": 0.2, "sd": 0.1}
    with pytest.raises(ModelError, match=r"parameters\.p_die_sick\.distribution"):
        analyse_uncertainty(load_dict(data, validate=False), 10, seed=1)


@pytest.mark.parametrize(
    ("name", "key", "bound", "fragment"),
    [
        ("p_die_sick", "high", 1.5, "1.5 is outside the range of a probability"),
        ("rr_treat", "low", -0.2, "-0.2 is outside the range of a relative_risk"),
        ("u_sick", "high", 1.1, "1.1 is outside the range of a qaly_weight"),
    ],
)
def test_a_bound_outside_the_kind_range_is_refused_naming_the_parameter(name, key, bound, fragment):
    data = small_model_dict()
    other = "high" if key == "low" else "low"
    data["parameters"][name][key] = bound
    data["parameters"][name][other] = data["parameters"][name]["value"]
    assert f"test.toml: parameters.{name}.{key}: {fragment}" in problems_of(data)


# ---------------------------------------------------------------- repeated one-off charge
def test_the_demo_pattern_is_flagged_for_each_state_it_repeats_in():
    model = load_model(REPEAT_PATTERN, validate=False)
    repeats = [w for w in validate_model(model) if w.extra.get("rule") == "repeated_one_off"]
    assert [(w.where, w.extra["state"]) for w in repeats] == [
        ("actions.treat", "stage_2"),
        ("actions.treat", "stage_3"),
    ]
    first = repeats[0].message
    assert "one-off cost 1500 and one-off QALY loss 0.03 is charged each cycle 'treat'" in first
    assert "keeps up to 0.897 of the cohort in 'stage_2'" in first
    assert "can be paid in consecutive cycles" in first


def test_the_rewritten_demo_moves_the_cohort_and_is_not_flagged():
    # "Start treatment" now moves stage_k to stage_k on treatment at the decision, so the
    # treated cohort leaves the state where the one-off charge is made.
    from synthetic_cohort import demo_model_path

    warnings = validate_model(load_model(demo_model_path()))
    assert not [w for w in warnings if w.extra.get("rule") == "repeated_one_off"]


def test_repeated_charge_needs_mass_kept_in_the_same_state():
    # The small model: treat in `sick` keeps 1 - 0.2 x 0.5 ... of the cohort in `sick`.
    data = small_model_dict()
    warnings = [w for w in validate_model(load_dict(data)) if w.where == "actions.treat"]
    assert len(warnings) == 1 and warnings[0].extra["state"] == "sick"
    # Treat moves everyone out of `sick` (to a state where treat is not allowed): no repeat.
    data["states"].insert(2, {"id": "sick_tx", "qaly_weight": 0.7, "cost": 100.0})
    data["transitions"]["treat"]["sick"] = {"sick_tx": "rest", "dead": 0.1}
    data["transitions"]["wait"]["sick_tx"] = {"dead": 0.1, "sick_tx": "rest"}
    assert not [w for w in validate_model(load_dict(data)) if w.where == "actions.treat"]
    # No one-off charge at all: nothing to repeat either.
    data = small_model_dict()
    data["actions"][1]["oneoff_cost"] = 0.0
    data["actions"][1]["oneoff_qaly_loss"] = 0.0
    assert not [w for w in validate_model(load_dict(data)) if w.where == "actions.treat"]


def test_a_qaly_loss_alone_also_repeats():
    data = small_model_dict()
    data["actions"][1]["oneoff_cost"] = 0.0
    (warning,) = [w for w in validate_model(load_dict(data)) if w.where == "actions.treat"]
    assert warning.message.startswith("one-off QALY loss 0.01 is charged each cycle 'treat'")


# ---------------------------------------------------------------------- unused parameters
def test_unused_parameter_is_named_with_a_close_used_name():
    data = small_model_dict()
    data["parameters"]["p_sicc"] = {"value": 0.1, "kind": "probability", "source": "Synthetic"}
    unused = [
        w for w in validate_model(load_dict(data)) if w.extra.get("rule") == "unused_parameter"
    ]
    assert [w.where for w in unused] == ["parameters.p_sicc"]
    assert "'p_sicc' is not used by any expression" in unused[0].message
    assert "(did you mean p_sick" in unused[0].message


def test_a_group_with_one_unread_member_is_fine_a_wholly_unused_group_is_not():
    data = small_model_dict()
    data["groups"] = {
        "from_well": {"members": ["g_sick", "g_dead", "g_well"], "counts": [10, 1, 89],
                      "source": "Synthetic"},
    }  # fmt: skip
    unused = lambda: [  # noqa: E731
        w.where
        for w in validate_model(load_dict(data))
        if w.extra.get("rule") == "unused_parameter"
    ]
    assert unused() == ["groups.from_well.members"]
    data["transitions"]["wait"]["well"] = {"sick": "g_sick", "dead": "g_dead", "well": "rest"}
    assert unused() == ["parameters.p_sick"]  # the row no longer reads p_sick


# ------------------------------------------------------------------------- did you mean
def test_unknown_state_in_a_row_suggests_the_close_one():
    data = small_model_dict()
    data["transitions"]["wait"]["well"]["sik"] = data["transitions"]["wait"]["well"].pop("sick")
    message = problems_of(data)
    assert "transitions.wait.well.sik: unknown state 'sik' (did you mean sick?)" in message


def test_unknown_action_table_suggests_the_close_one():
    data = small_model_dict()
    data["transitions"]["treet"] = data["transitions"].pop("treat")
    assert "transitions.treet: unknown action (did you mean treat?)" in problems_of(data)


def test_unknown_name_in_an_expression_suggests_the_close_one():
    data = small_model_dict()
    data["transitions"]["wait"]["sick"]["dead"] = "p_die_sik"
    assert "unknown name 'p_die_sik' (did you mean p_die_sick" in problems_of(data)


def test_repeat_pattern_copy_is_still_the_old_demo():
    # Guard for the data file: its treat rows for stage 2 are rate rows (mass stays put).
    text = REPEAT_PATTERN.read_text(encoding="utf-8")
    assert "[rates.treat.stage_2]" in text
    assert 'oneoff_cost = "c_start"' in text or "oneoff_cost" in text


def test_conversion_errors_over_draws_name_the_place_not_an_array_index():
    from caredecide.errors import ExpressionError
    from caredecide.expressions import parse_expression

    expression = parse_expression("with_rr(p, rr)", where="transitions.treat.sick.dead")
    with pytest.raises(ExpressionError) as caught:
        expression.evaluate({"p": [[0.2], [-0.07]], "rr": 0.5})
    message = str(caught.value)
    assert message.startswith("transitions.treat.sick.dead: expression 'with_rr(p, rr)'")
    assert "got -0.07" in message and "index" not in message


def test_a_bad_value_at_a_draw_names_the_cell_and_the_parameters_behind_it():
    from caredecide.compile import compile_model

    data = small_model_dict()
    data["transitions"]["wait"]["well"]["sick"] = "p_sick * 5"
    model = load_dict(data)
    with pytest.raises(ModelError) as caught:
        compile_model(model, {"p_sick": np.array([0.1, 0.3, 0.1])})
    assert (
        "transitions.wait.well.sick: 'p_sick * 5' gives 1.5 for draw 1 in every cycle "
        "(with p_sick = 0.3): probability; expected a probability in [0, 1]"
    ) in str(caught.value)
