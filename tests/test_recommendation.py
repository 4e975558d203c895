"""Thresholds in context and "what would change the recommendation".

The figures of the page must be those of the threshold analysis and of the probabilistic
analysis: each is recomputed here from the raw tables, and the probabilities beyond a
threshold from scipy's distributions (a reference library) with parameters derived by
hand.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy import stats

from caredecide.model import Parameter
from caredecide.modelfile import load_model
from caredecide.sensitivity import parameter_thresholds
from caredecide.sensitivity.context import threshold_context
from caredecide.sensitivity.recommendation import what_would_change
from caredecide.uncertainty.psa import analyse_uncertainty
from synthetic_cohort import MODELS_DIR
from tests.test_sensitivity import SYNTHETIC, group_model, hand_model

DEMO = MODELS_DIR / "demo_progressive.toml"


def hand_with_distribution():
    """The hand model with p ~ beta(mean 0.1, se 0.02) (range still 0.01 to 0.2)."""
    model = hand_model()
    p = Parameter(
        "p",
        0.1,
        SYNTHETIC,
        kind="probability",
        low=0.01,
        high=0.2,
        distribution={"type": "beta", "mean": 0.1, "se": 0.02},
    )
    return replace(model, parameters={**model.parameters, "p": p})


def test_context_of_the_hand_threshold():
    model = hand_with_distribution()
    table = threshold_context(model, parameter_thresholds(model)).set_index("parameter")
    row = table.loc["p"]
    # Threshold p (1 - hr) = loss: p = 0.05 / 0.6 = 0.083333 (tests/test_sensitivity.py),
    # below the base 0.1: 0.016667 / 0.19 of the range away.
    assert row["threshold"] == pytest.approx(0.05 / 0.6, abs=1e-9)
    assert row["direction"] == "below"
    assert row["distance_share"] == pytest.approx((0.1 - 0.05 / 0.6) / 0.19, abs=1e-8)
    # Beta by the method of moments (Briggs, Claxton & Sculpher 2006, Decision Modelling
    # for Health Economic Evaluation, ch. 4, from memory): alpha = m (m (1 - m) / s^2 - 1)
    # = 0.1 (225 - 1) = 22.4, beta = alpha (1 - m) / m = 201.6. Below the base, the
    # probability beyond is F(t).
    expected = stats.beta(22.4, 201.6).cdf(0.05 / 0.6)
    assert row["probability_beyond"] == pytest.approx(expected, rel=1e-9)
    assert row["state"] == "sick" and row["ages"] == "0" and row["cells"] == 1
    assert (row["action_below"], row["action_above"]) == ("wait", "treat")
    # hr has only a range: no distribution, no probability.
    assert np.isnan(table.loc["hr", "probability_beyond"])
    assert table.loc["unused", "ages"] == "no switch within the plausible range"


def test_dirichlet_member_uses_its_marginal_beta():
    model = group_model()
    thresholds = parameter_thresholds(model)
    table = threshold_context(model, thresholds)
    member = table[(table["parameter"] == "g_dead") & table["threshold"].notna()]
    assert len(member)
    # Dirichlet(70, 20, 10): the marginal of g_dead is Beta(10, 90) (Briggs, Ades & Price
    # 2003, Med Decis Making 23(4):341-350).
    for row in member.itertuples():
        cdf = stats.beta(10.0, 90.0).cdf(row.threshold)
        expected = 1 - cdf if row.threshold >= row.base else cdf
        assert row.probability_beyond == pytest.approx(expected, rel=1e-9)


@pytest.fixture(scope="module")
def demo():
    return load_model(DEMO)


@pytest.fixture(scope="module")
def demo_thresholds(demo):
    return parameter_thresholds(demo)


def test_flips_equal_the_threshold_analysis(demo, demo_thresholds):
    result = what_would_change(demo, thresholds=demo_thresholds)
    switches = demo_thresholds[demo_thresholds["status"] == "switch"]
    assert len(result.flips)
    for flip in result.flips.itertuples():
        cells = switches[
            (switches["parameter"] == flip.parameter) & (switches["state"] == flip.state)
        ]
        side = cells["threshold"] >= flip.base
        cells = cells[side] if flip.direction == "above" else cells[~side]
        nearest = cells["threshold"].iloc[np.argmin(np.abs(cells["threshold"] - flip.base))]
        assert flip.threshold == nearest
        assert flip.cells == len(cells)
        far = cells["threshold"].max() if flip.direction == "above" else cells["threshold"].min()
        assert flip.threshold_all == far
    # Every switching (parameter, state) of the threshold table is on the page.
    pairs = set(zip(switches["parameter"], switches["state"], strict=True))
    assert pairs == set(zip(result.flips["parameter"], result.flips["state"], strict=True))


def test_flip_probabilities_equal_the_parameter_distributions(demo, demo_thresholds):
    result = what_would_change(demo, thresholds=demo_thresholds)
    flips = result.flips[result.flips["parameter"] == "p_progress_2"]
    assert len(flips)
    # demo: p_progress_2 ~ beta(mean 0.18, se 0.03): alpha = 0.18 (0.18 * 0.82 / 0.0009 - 1)
    # = 29.34, beta = 29.34 * 0.82 / 0.18 = 133.66 (method of moments, Briggs, Claxton &
    # Sculpher 2006, ch. 4, from memory).
    spec = demo.parameters["p_progress_2"].distribution
    assert spec == {"type": "beta", "mean": 0.18, "se": 0.03}
    dist = stats.beta(29.34, 133.66)
    for flip in flips.itertuples():
        cdf = dist.cdf(flip.threshold)
        expected = 1 - cdf if flip.direction == "above" else cdf
        assert flip.probability == pytest.approx(expected, rel=1e-9)
    # Parameters given a range but no distribution have no probability.
    fixed = result.flips[result.flips["parameter"] == "q_toxicity"]
    assert fixed["probability"].isna().all()


def test_recommendation_text_names_every_decision_state_with_labels(demo, demo_thresholds):
    result = what_would_change(demo, thresholds=demo_thresholds)
    labels = {s.id: s.label for s in demo.states}
    assert set(result.recommendations["state"]) == {"stage_1", "stage_2", "stage_3"}
    text = "\n".join(result.lines())
    assert "RESEARCH USE ONLY" in text
    for state in result.recommendations["state"]:
        assert labels[state] in text
    treat_label = next(a.label for a in demo.actions if a.id == "treat")
    assert treat_label in text and " treat " not in text  # labels, not ids


def test_psa_share_equals_the_per_draw_policies(demo, demo_thresholds):
    psa = analyse_uncertainty(demo, 120, seed=3, keep_policies=True, n_frequent=0)
    result = what_would_change(demo, thresholds=demo_thresholds, psa=psa)
    base = psa.candidates[0].policy  # the base-case optimal policy
    for row in result.recommendations.itertuples():
        s = list(psa.state_ids).index(row.state)
        differs = (psa.policies[:, :, s] != base[None, :, s]).any(axis=1)
        assert row.psa_share_differs == differs.mean()
        assert row.psa_draws == 120


def test_a_scenario_that_changes_the_policy_is_listed():
    model = hand_model()
    # loss = 0.1 > p (1 - hr) = 0.06: waiting becomes best (hand algebra above).
    heavier = model.with_parameter_values({"loss": 0.1})
    same = model.with_parameter_values({"unused": 4.0})
    result = what_would_change(model, scenarios={"heavier toxicity": heavier, "other": same})
    assert list(result.scenarios["scenario"]) == ["heavier toxicity"]
    assert "wait" in result.scenarios["recommended"].iloc[0]
    assert any("heavier toxicity" in line for line in result.lines())


def test_context_and_two_way_show_action_labels(demo, demo_thresholds):
    from caredecide.sensitivity import two_way

    labels = {a.id: a.label for a in demo.actions}
    table = threshold_context(demo, demo_thresholds).dropna(subset=["threshold"])
    assert (table["label_below"] == table["action_below"].map(labels)).all()
    grid = two_way(demo, "hr_treatment", "c_drug_year", grid=2)
    assert set(grid["action_at_start"]) <= {f"stage_1: {x}; stage_2: {y}" for x in
                                            labels.values() for y in labels.values()}  # fmt: skip


def test_the_models_own_scenarios_are_examined():
    from caredecide.model import Scenario

    model = hand_model()
    # loss = 0.1 > p (1 - hr) = 0.06: waiting becomes best (hand algebra above).
    named = {
        "heavier": Scenario("heavier", {"parameters.loss.value": 0.1}, label="heavier toxicity"),
        "lighter": Scenario("lighter", {"parameters.loss.value": 0.01}),
    }
    model = replace(model, scenarios=named)
    result = what_would_change(model)
    assert result.scenario_names == ["heavier toxicity", "lighter"]
    assert list(result.scenarios["scenario"]) == ["heavier toxicity"]


def test_age_bands_of_a_flip_are_listed_youngest_first():
    model = load_model(MODELS_DIR / "demo_counts_table.toml")
    result = what_would_change(model)
    for text in result.flips["ages"]:
        firsts = [float(band.split("-")[0]) for band in text.split(", ")]
        assert firsts == sorted(firsts), text
