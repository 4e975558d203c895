"""Scenario analysis: --set overrides and named [scenarios], side by side.

Every scenario figure is checked against the same model written with the changed value
by hand (no override machinery), solved through the core path. The ICER is delta cost /
delta QALYs (common practice) between the scenario's optimal policy and the base-case
policy, both evaluated under the scenario's assumptions.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from caredecide.analysis import analyse_base_case, analyse_scenarios
from caredecide.cli import app
from caredecide.compile import compile_model
from caredecide.errors import ModelError, RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import dumps_model, loads_model
from caredecide.modelfile.overrides import parse_assignment, with_overrides
from caredecide.objective import Objective
from caredecide.solvers import solve
from tests.conftest import load_dict, small_model_dict

runner = CliRunner()


def _with_scenarios():
    data = small_model_dict()
    data["scenarios"] = {
        "costs_at_six": {
            "label": "Costs discounted at 6% a year",
            "settings": {"discount_costs": 0.06},
        },
        "cheap_drug": {"label": "Drug at 100 a year", "parameters": {"c_drug": {"value": 100.0}}},
    }
    return data


def _by_hand(change):
    data = small_model_dict()
    change(data)
    model = load_dict(data)
    compiled = compile_model(model)
    objective = Objective.from_settings(model.settings)
    result = solve(compiled, objective)
    return compiled, objective, result, evaluate_policy(compiled, result.policy, objective)


# ---------------------------------------------------------------------------- --set values
@pytest.mark.parametrize(
    ("text", "path", "value"),
    [
        ("settings.discount_costs=0.06", "settings.discount_costs", 0.06),
        ("parameters.rr_treat.value = 0.6", "parameters.rr_treat.value", 0.6),
        ("settings.within_cycle=trapezoid", "settings.within_cycle", "trapezoid"),
        ('settings.within_cycle="end"', "settings.within_cycle", "end"),
        ("settings.horizon_cycles=5", "settings.horizon_cycles", 5),
    ],
)
def test_assignments_are_read_as_data(text, path, value):
    assert parse_assignment(text) == (path, value)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            "settings.discount_costs",
            "--set = 'settings.discount_costs' is not allowed; expected PATH=VALUE",
        ),
        ("discount=0.06", "a dotted PATH"),
        (
            "parameters.p_sick.value=__import__('os').getcwd()",
            r"--set parameters\.p_sick\.value = ",
        ),
    ],
)
def test_a_bad_assignment_names_the_option_and_the_text(text, message):
    with pytest.raises(RunOptionError, match=message):
        parse_assignment(text)


def test_an_override_equals_the_value_written_in_the_file():
    changed = with_overrides(load_dict(small_model_dict()), {"settings.discount_costs": 0.06})
    hand = _by_hand(lambda d: d["settings"].__setitem__("discount_costs", 0.06))
    got = analyse_base_case(changed)
    assert got.totals == hand[3].totals(0)
    assert got.totals["costs"] != analyse_base_case(load_dict(small_model_dict())).totals["costs"]


def test_an_entry_of_an_array_is_named_by_its_id():
    changed = with_overrides(load_dict(small_model_dict()), {"states.sick.cost": 2500.0})
    assert changed.state("sick").cost == 2500.0


def test_an_unknown_path_names_the_part_and_the_choices():
    model = load_dict(small_model_dict())
    with pytest.raises(RunOptionError, match=r"parameters has no 'rr_treatment'.*'rr_treat'"):
        with_overrides(model, {"parameters.rr_treatment.value": 0.6})


def test_a_value_the_file_refuses_names_the_table_path():
    model = load_dict(small_model_dict())
    with pytest.raises(ModelError, match=r"settings\.discount_costs"):
        with_overrides(model, {"settings.discount_costs": 1.5})


# ---------------------------------------------------------------------- named scenarios
def test_scenarios_round_trip_through_the_file():
    model = load_dict(_with_scenarios())
    again = loads_model(dumps_model(model), file="again.toml")
    assert again.scenarios == model.scenarios
    assert model.scenarios["costs_at_six"].overrides == {"settings.discount_costs": 0.06}


def test_a_scenario_path_that_names_nothing_is_a_model_error():
    data = _with_scenarios()
    data["scenarios"]["cheap_drug"]["parameters"] = {"c_drg": {"value": 1.0}}
    with pytest.raises(ModelError, match=r"scenarios\.cheap_drug\.parameters\.c_drg\.value"):
        load_dict(data)


def test_side_by_side_table_equals_each_model_written_by_hand():
    frame = analyse_scenarios(load_dict(_with_scenarios())).to_frame().set_index("scenario")
    assert list(frame.index) == ["base case", "costs_at_six", "cheap_drug"]
    base = _by_hand(lambda d: None)
    assert frame.loc["base case", "costs"] == base[3].totals(0)["costs"]
    assert frame.loc["base case", "qalys"] == base[3].totals(0)["qalys"]
    assert math.isnan(frame.loc["base case", "icer_vs_base_policy"])
    for name, change in (
        ("costs_at_six", lambda d: d["settings"].__setitem__("discount_costs", 0.06)),
        ("cheap_drug", lambda d: d["parameters"]["c_drug"].__setitem__("value", 100.0)),
    ):
        compiled, objective, result, outcome = _by_hand(change)
        row = frame.loc[name]
        assert row["costs"] == outcome.totals(0)["costs"]
        assert row["qalys"] == outcome.totals(0)["qalys"]
        assert row["net_monetary_benefit"] == outcome.totals(0)["net_monetary_benefit"]
        assert row["policy"] == result.structure().text
        changed = not np.array_equal(result.policy, base[2].policy)
        assert row["policy_changed"] == changed
        if changed:
            kept = evaluate_policy(compiled, base[2].policy, objective).totals(0)
            expected = (outcome.totals(0)["costs"] - kept["costs"]) / (
                outcome.totals(0)["qalys"] - kept["qalys"]
            )
            assert row["icer_vs_base_policy"] == pytest.approx(expected, rel=1e-12)
        else:
            assert math.isnan(row["icer_vs_base_policy"])
            assert row["note"] == "same policy as the base case"


def test_cheap_drug_changes_the_policy_and_gets_an_icer():
    # At 100 a year the drug is worth starting in more states/ages than at 1,000: the
    # policy must change, so the row carries an ICER (a finite number).
    frame = analyse_scenarios(load_dict(_with_scenarios())).to_frame().set_index("scenario")
    assert frame.loc["cheap_drug", "policy_changed"]
    assert math.isfinite(frame.loc["cheap_drug", "icer_vs_base_policy"])


def test_set_applies_to_every_scenario_and_a_scenario_value_wins():
    model = load_dict(_with_scenarios())
    result = analyse_scenarios(model, overrides={"settings.discount_costs": 0.05})
    costs = {o.name: o.overrides for o in result.outcomes}
    assert costs["base case"] == {"settings.discount_costs": 0.05}
    assert costs["costs_at_six"] == {"settings.discount_costs": 0.06}
    assert costs["cheap_drug"]["settings.discount_costs"] == 0.05


def test_only_names_the_model_scenarios():
    with pytest.raises(RunOptionError, match="scenario = 'nope' is not allowed"):
        analyse_scenarios(load_dict(_with_scenarios()), names=["nope"])


# ------------------------------------------------------------------------------- the CLI
def _write(tmp_path, data):
    import tomli_w

    path = tmp_path / "model.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    return path


def test_cli_scenarios_json_equals_the_library(tmp_path):
    path = _write(tmp_path, _with_scenarios())
    result = runner.invoke(app, ["scenarios", str(path), "--format", "json", "--quiet"])
    assert result.exit_code == 0, result.output
    assert "research use only" in result.stderr.lower()
    rows = json.loads(result.stdout)["scenarios"]
    frame = analyse_scenarios(load_dict(_with_scenarios())).to_frame()
    assert [r["scenario"] for r in rows] == list(frame["scenario"])
    assert [r["costs"] for r in rows] == list(frame["costs"])


def test_cli_solve_with_set_equals_the_file_written_by_hand(tmp_path):
    path = _write(tmp_path, small_model_dict())
    result = runner.invoke(
        app, ["solve", str(path), "--format", "json", "--set", "settings.discount_costs=0.06"]
    )
    assert result.exit_code == 0, result.output
    totals = json.loads(result.stdout)["totals"]
    hand = _by_hand(lambda d: d["settings"].__setitem__("discount_costs", 0.06))[3].totals(0)
    assert totals["costs"] == pytest.approx(hand["costs"], rel=1e-12)


@pytest.mark.parametrize("command", ["solve", "sensitivity", "verify", "scenarios"])
def test_every_analysis_command_names_a_bad_set(tmp_path, command):
    path = _write(tmp_path, small_model_dict())
    result = runner.invoke(app, [command, str(path), "--set", "parameters.nope.value=1"])
    assert result.exit_code == 2
    assert "parameters has no 'nope'" in result.stderr
