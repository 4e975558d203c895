"""The synthetic demo models: valid, round-trip, and their policies are not trivial."""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
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
    # Only the teaching model's repeated one-off charge may be flagged: its side effects
    # recur by design each year intensive care is given (tests/test_advisories.py).
    warnings = validate_model(model)
    others = [w for w in warnings if w.extra.get("rule") != "repeated_one_off"]
    assert others == []
    if path.name != "teaching_stationary.toml":
        assert warnings == []
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


# --- demo_progressive, re-derived by hand ------------------------------------------------
# Inputs of the demo file (synthetic): start 0.7 stage_1 / 0.3 stage_2 at age 55, 1-year
# cycles to age 100 (45 cycles), 3.5% on both, WTP 30,000, trapezoid. Background mortality
# Gompertz-Makeham a = 0.0007, b = 5e-5, c = 10^0.04: the probability of dying within a year
# at age x is q_x = 1 - exp(-a - b c^x (c - 1) / ln c) (Bowers et al. 1997, from memory).
A_GM, B_GM, C_GM = 0.0007, 5e-5, 10**0.04
WTP, D = 30_000.0, 1 / 1.035


def _q(age: float) -> float:
    return 1 - np.exp(-A_GM - B_GM * C_GM**age * (C_GM - 1) / np.log(C_GM))


def _chain(progress_rate: float, death_rate: float, next_death: float) -> tuple[float, float]:
    """(stay, progressed and alive) after one year: a state left at rates ``progress_rate``
    (to the next stage) and ``death_rate``; the next stage, itself a rate row of the same
    action, is left at ``next_death`` within the same year (all rate rows of an action form
    one generator; Welton & Ades 2005). Closed form of the two-compartment chain (Bateman
    equation; common practice): stay = e^-R, next = a (e^-R - e^-c) / (c - R)."""
    total = progress_rate + death_rate
    stay = np.exp(-total)
    return stay, progress_rate * (stay - np.exp(-next_death)) / (next_death - total)


def _demo():
    model = load_model(MODELS_DIR / "demo_progressive.toml")
    compiled = compile_model(model)
    objective = Objective(model.settings.objective, model.settings.willingness_to_pay)
    return model, compiled, objective, solve(compiled, objective)


def test_starting_treatment_moves_the_cohort_onto_treatment_first_cycle_by_hand():
    model, compiled, objective, result = _demo()
    s = {sid: i for i, sid in enumerate(compiled.state_ids)}
    treat = model.action_ids.index("treat")
    assert result.policy[0, 0, s["stage_2"]] == treat  # stage 2 at 55: start treatment
    trace = evaluate_policy(compiled, result.policy, objective).trace[0]
    q55 = _q(55)
    # Stage 1 (0.7) waits: 6% progress, q55 die, the rest stays.
    assert trace[1, s["stage_2"]] == pytest.approx(0.7 * 0.06, rel=1e-12)  # only new cases
    assert trace[1, s["stage_1"]] == pytest.approx(0.7 * (1 - 0.06 - q55), rel=1e-12)
    # Stage 2 (0.3) is moved to stage_2_tx at the decision, then stage_2_tx's competing exits:
    # progression rate -ln(1 - 0.18) x HR 0.5, death rate -ln(1 - q55); stage_3_tx is left at
    # -ln(1 - q55) + 0.3 x 0.5 within the same year.
    background = -np.log(1 - q55)
    stay, progress = _chain(-np.log(0.82) * 0.5, background, background + 0.3 * 0.5)
    assert trace[1, s["stage_2_tx"]] == pytest.approx(0.3 * stay, rel=1e-9)  # ~0.2692
    assert trace[1, s["stage_3_tx"]] == pytest.approx(0.3 * progress, rel=1e-9)  # ~0.0260
    assert trace[1, s["dead"]] == pytest.approx(0.3 * (1 - stay - progress) + 0.7 * q55, rel=1e-9)
    # Second cycle of stage 1: 0.7 (1 - 0.06 - q55)(1 - 0.06 - q56).
    assert trace[2, s["stage_1"]] == pytest.approx(
        0.7 * (1 - 0.06 - q55) * (1 - 0.06 - _q(56)), rel=1e-12
    )
    # Nobody is left untreated in stage 2 by the decision (the old rate rows kept ~90% there).
    assert trace[1, s["stage_2"]] < 0.05
    # The treated state pays the drug: 3,000 care + 4,000 drug per cycle.
    assert compiled.state_cost[0, 0, s["stage_2_tx"]] == pytest.approx(7000.0)
    # Start treatment is not allowed on treatment, so the one-off cost cannot recur there.
    assert not compiled.allowed[s["stage_2_tx"], treat]


def test_last_cycle_policy_cell_by_hand():
    # At age 99 (cycle 44, the last) in stage 2, compare the two actions by hand (present
    # value at the cycle start; the trapezoid counts half the start and half the end
    # occupancy, the end half one cycle later):
    #   wait  = 0.5 (WTP 0.7 - 3000) + 0.5 d [stay_w (WTP 0.7 - 3000) + prog_w (WTP 0.5 - 6000)]
    #   treat = -(WTP 0.03 + 1500) + 0.5 (WTP 0.68 - 7000)
    #           + 0.5 d [stay_t (WTP 0.68 - 7000) + prog_t (WTP 0.48 - 10000)]
    # with the exits of stage_2 (rate -ln 0.82; stage_3 then left at background + 0.3) and
    # stage_2_tx (rate -ln 0.82 x 0.5; stage_3_tx left at background + 0.15) at q99.
    model, compiled, _objective, result = _demo()
    s = {sid: i for i, sid in enumerate(compiled.state_ids)}
    t = compiled.n_cycles - 1
    death = -np.log(1 - _q(99))
    stay_w, prog_w = _chain(-np.log(0.82), death, death + 0.3)
    stay_t, prog_t = _chain(-np.log(0.82) * 0.5, death, death + 0.15)
    wait = 0.5 * (WTP * 0.7 - 3000) + 0.5 * D * (
        stay_w * (WTP * 0.7 - 3000) + prog_w * (WTP * 0.5 - 6000)
    )
    treat = (
        -(WTP * 0.03 + 1500)
        + 0.5 * (WTP * 0.68 - 7000)
        + 0.5 * D * (stay_t * (WTP * 0.68 - 7000) + prog_t * (WTP * 0.48 - 10000))
    )
    q = result.q_values[0, t, s["stage_2"]] / D**t
    assert q[model.action_ids.index("wait")] == pytest.approx(wait, rel=1e-9)
    assert q[model.action_ids.index("treat")] == pytest.approx(treat, rel=1e-9)
    assert wait > treat  # one year left: the start cost and toxicity cannot pay back
    assert result.policy[0, t, s["stage_2"]] == model.action_ids.index("wait")


def test_progressive_demo_policy_and_totals_as_a_modeller_reads_them():
    # Solver figures (not by hand), read as a modeller: treat stage 2 from 55 to 65 only;
    # never start treatment in stage 1 or stage 3 (stage 3: the drug and the start cost
    # outweigh the slower excess death). Net benefit 212,581 per person at 30,000/QALY, above
    # both fixed strategies (always wait 209,810; always start 205,167).
    path = MODELS_DIR / "demo_progressive.toml"
    assert _treat_ages(path, "stage_1").size == 0
    assert _treat_ages(path, "stage_3").size == 0
    np.testing.assert_array_equal(_treat_ages(path, "stage_2"), np.arange(55.0, 66.0))
    model, compiled, objective, result = _demo()
    best = evaluate_policy(compiled, result.policy, objective)
    assert best.net_monetary_benefit[0] == pytest.approx(212_580.92, abs=0.01)
    treat = model.action_ids.index("treat")
    for action, expected in ((0, 209_810.44), (treat, 205_167.14)):
        fixed = np.where(compiled.allowed[:, action], action, 0)[None, None, :]
        outcome = evaluate_policy(compiled, fixed, objective)
        assert outcome.net_monetary_benefit[0] == pytest.approx(expected, abs=0.01)
        assert outcome.net_monetary_benefit[0] < best.net_monetary_benefit[0]


def test_counts_demo_waits_for_the_cheaper_drug():
    ages = _treat_ages(MODELS_DIR / "demo_counts_table.toml", "early")
    assert 60 < ages.min() <= 65 and ages.max() < 99
