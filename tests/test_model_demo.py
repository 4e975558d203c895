"""The synthetic demo models: valid, round-trip, and their policies are not trivial."""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model
from caredecide.modelfile import load_model, save_model, validate_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR

DEMOS = sorted(MODELS_DIR.glob("*.toml"))


def test_there_are_demo_models():
    assert {p.name for p in DEMOS} >= {"demo_progressive.toml", "demo_counts_table.toml"}


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.name)
def test_demo_is_valid_synthetic_and_round_trips(path, tmp_path):
    model = load_model(path)
    # Only the repeated one-off charge may be flagged: demo_progressive's "Start
    # treatment" keeps the cohort in the untreated stage (tests/test_advisories.py), and
    # the teaching model's side effects recur each year intensive care is given.
    others = [w for w in validate_model(model) if w.extra.get("rule") != "repeated_one_off"]
    assert others == []
    assert "synthetic" in (model.title + model.description).lower()
    sources = [p.source for p in model.parameters.values()] + [
        g.source for g in model.groups.values()
    ]
    assert all(s.startswith("Synthetic") for s in sources)
    # Save next to a copy of the life table so a relative table path still resolves.
    for csv in MODELS_DIR.glob("*.csv"):
        (tmp_path / csv.name).write_bytes(csv.read_bytes())
    save_model(model, tmp_path / path.name)
    assert load_model(tmp_path / path.name) == model


def _treat_ages(path, state: str) -> np.ndarray:
    model = load_model(path)
    compiled = compile_model(model)
    s = model.settings
    result = solve(compiled, Objective(s.objective, s.willingness_to_pay))
    treat = model.action_ids.index("treat")
    column = model.state_ids.index(state)
    return compiled.ages()[:-1][result.policy[0, :, column] == treat]


def test_progressive_demo_waits_early_and_treats_later_stages_until_an_age():
    path = MODELS_DIR / "demo_progressive.toml"
    assert _treat_ages(path, "stage_1").size == 0  # monitoring is best in stage 1
    stage_2 = _treat_ages(path, "stage_2")
    assert stage_2.min() == 55 and 80 < stage_2.max() < 99  # treat, but not at the oldest ages
    assert _treat_ages(path, "stage_3").size > 0


def test_counts_demo_waits_for_the_cheaper_drug():
    ages = _treat_ages(MODELS_DIR / "demo_counts_table.toml", "early")
    assert 60 < ages.min() <= 65 and ages.max() < 99
