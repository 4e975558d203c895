"""The model dataclasses: horizon, parameters, ranges and edited copies."""

from __future__ import annotations

import dataclasses

import pytest
from scipy import stats

from caredecide.model import Settings
from tests.conftest import load_dict, small_model_dict


def test_horizon_until_age_counts_cycles():
    assert Settings(until_age=100.0, start_age=55.0).__class__  # dataclass builds
    data = small_model_dict()
    del data["settings"]["horizon_cycles"]
    data["settings"]["until_age"] = 100.0
    data["settings"]["start_age"] = 55.0
    assert load_dict(data).n_cycles() == 45
    data["settings"]["cycle_years"] = 0.25
    # (100 - 55) / 0.25 = 180 exactly: no extra cycle from floating-point round-off.
    assert load_dict(data).n_cycles() == 180


def test_infinite_horizon_has_no_cycle_count():
    data = small_model_dict()
    del data["settings"]["horizon_cycles"]
    data["settings"]["horizon"] = "infinite"
    model = load_dict(data)
    assert model.n_cycles() is None and model.settings.infinite_horizon


def test_allowed_in_all_means_every_non_absorbing_state(small_model):
    wait, treat = small_model.actions
    assert small_model.allowed_states(wait) == ("well", "sick")
    assert small_model.allowed_states(treat) == ("sick",)


def test_base_values_and_edited_copy(small_model):
    assert small_model.base_parameter_values()["p_sick"] == 0.1
    edited = small_model.with_parameter_values({"p_sick": 0.2})
    assert edited.base_parameter_values()["p_sick"] == 0.2
    assert small_model.base_parameter_values()["p_sick"] == 0.1  # the original is untouched
    assert edited != small_model
    with pytest.raises(KeyError, match="unknown parameter 'p_sik'"):
        small_model.with_parameter_values({"p_sik": 0.2})


def test_models_are_frozen(small_model):
    with pytest.raises(dataclasses.FrozenInstanceError):
        small_model.title = "x"  # type: ignore[misc]
    renamed = dataclasses.replace(small_model, title="Renamed")
    assert renamed.title == "Renamed" and small_model.title != "Renamed"


def test_parameter_range_explicit_then_distribution_then_fixed():
    data = small_model_dict()
    data["parameters"]["p_sick"].update(low=0.05, high=0.2)
    data["parameters"]["u_sick"]["distribution"] = {"type": "beta", "mean": 0.8, "se": 0.1}
    data["parameters"]["u_sick"]["value"] = 0.8
    model = load_dict(data)
    assert model.parameter_range("p_sick") == (0.05, 0.2)
    # Source: Briggs, Claxton & Sculpher 2006 ch. 4 (from memory): m = 0.8, s = 0.1 -> Beta(12, 3).
    low, high = model.parameter_range("u_sick")
    assert (low, high) == pytest.approx(tuple(stats.beta(12, 3).ppf([0.025, 0.975])), rel=1e-6)
    assert model.parameter_range("c_drug") == (1000.0, 1000.0)
    with pytest.raises(KeyError):
        model.parameter_range("nothing")


def test_dirichlet_members_are_parameters_but_not_editable_one_by_one():
    data = small_model_dict()
    data["groups"] = {
        "g": {"members": ["g_a", "g_b"], "counts": [1, 3], "prior": 1.0, "source": "Synthetic"}
    }
    model = load_dict(data)
    # Dirichlet(counts + prior) mean: (1 + 1) / (4 + 2) and (3 + 1) / 6.
    values = model.base_parameter_values()
    assert values["g_a"] == pytest.approx(1 / 3) and values["g_b"] == pytest.approx(2 / 3)
    assert model.parameter_names()[-2:] == ("g_a", "g_b")
    with pytest.raises(ValueError, match="Dirichlet group"):
        model.with_parameter_values({"g_a": 0.5})
