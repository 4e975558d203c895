"""Sensitivity to each transition cell: switching factors on a hand-worked model, the cell
moves against recompiling the model, and every option's error.

The models here are synthetic (invented for the tests); the expected factors are derived
by hand in the docstrings.
"""

from __future__ import annotations

import copy
import math
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError, ModelTooLargeError, RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.model import Action, Model, Parameter, Settings, State
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.sensitivity.cell_scaling import (
    EXITS_RESCALED,
    FIXED_REMAINDER,
    FIXED_ZERO,
    RATE_SCALED,
    CellScaler,
)
from caredecide.sensitivity.cells import (
    FRAME_COLUMNS,
    NO_SWITCH_BAND,
    WHOLE_PATH_NOTE,
    cell_chunk_size,
    cell_memory,
    cell_sensitivity,
    closeness_band,
)
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR

SYNTHETIC = "Synthetic: invented for a hand-checkable test"
P_WAIT, P_TREAT, LOSS = 0.3, 0.1, 0.05


def two_state_model(wait_row: dict | None = None, treat_rate: bool = False) -> Model:
    """Two cycles, states ``sick`` and ``dead``; the decision at cycle 0 is the one that moves.

    Start-of-cycle counting (weights 1, 1, 0), QALY weight 1 per year, no discounting.
    ``wait`` dies with probability p = 0.3 per cycle; ``treat`` with q = 0.1 and costs a
    one-off QALY loss L = 0.05. At cycle 1 nothing follows, so V_1(sick) = 1 (waiting, as
    L > 0) and V_1(dead) = 0. At cycle 0:

        Q_0(wait)  = 1 + (1 - p)
        Q_0(treat) = 1 - L + (1 - q)
        margin of treat = Q_0(treat) - Q_0(wait) = p - q - L = 0.15 > 0: treat is best.

    Scaling the wait cell p by k: the margin is k p - q - L, zero at k = (q + L) / p = 0.5;
    above 1 it only grows (no switch). Scaling the treat cell q by k: the margin is
    p - k q - L, zero at k = (p - L) / q = 2.5; below 1 it only grows.
    With ``treat_rate`` the treat row is a rate mu = -ln(1 - q) per year (so q is unchanged at
    the base case); scaling the rate gives q(k) = 1 - exp(-k mu) and the switch is at
    1 - exp(-k mu) = p - L, i.e. k = ln(1 - p + L) / ln(1 - q) = ln 0.75 / ln 0.9.
    """
    wait_row = wait_row or {"dead": "p", "sick": "rest"}
    treat_table = {"treat": {"sick": {"dead": "mu"}}} if treat_rate else {}
    transitions = {"wait": {"sick": wait_row}}
    if not treat_rate:
        transitions["treat"] = {"sick": {"dead": "q", "sick": "rest"}}
    return Model(
        title="Synthetic: two-state model for cell switching factors",
        description=SYNTHETIC,
        settings=Settings(
            cycle_years=1.0,
            horizon_cycles=2,
            start="sick",
            objective="qalys",
            within_cycle="start",
        ),
        states=(
            State(id="sick", qaly_weight=1.0),
            State(id="dead", absorbing=True, alive=False),
        ),
        actions=(Action(id="wait"), Action(id="treat", oneoff_qaly_loss="loss")),
        transitions=transitions,
        rates=treat_table,
        parameters={
            "p": Parameter("p", P_WAIT, SYNTHETIC, kind="probability"),
            "q": Parameter("q", P_TREAT, SYNTHETIC, kind="probability"),
            "mu": Parameter("mu", -math.log(1 - P_TREAT), SYNTHETIC, kind="rate"),
            "loss": Parameter("loss", LOSS, SYNTHETIC, kind="other"),
        },
    )


def _row(frame, cell: str):
    rows = frame[frame["cell"] == cell]
    assert len(rows) == 1, cell
    return rows.iloc[0]


def test_switching_factors_equal_the_hand_derived_ones():
    # Source: derived by hand in two_state_model's docstring (common practice: the
    # Bellman equation of a two-cycle decision).
    result = cell_sensitivity(two_state_model(), loss_factors=(0.25, 3.0))
    frame = result.to_frame()
    wait = _row(frame, "transitions.wait.sick.dead")
    treat = _row(frame, "transitions.treat.sick.dead")
    assert wait["factor_below"] == pytest.approx((P_TREAT + LOSS) / P_WAIT, abs=1e-8)  # 0.5
    assert np.isnan(wait["factor_above"])
    assert treat["factor_above"] == pytest.approx((P_WAIT - LOSS) / P_TREAT, abs=1e-8)  # 2.5
    assert np.isnan(treat["factor_below"])
    assert wait["changes_below"] == "sick treat->wait at ages 0"
    assert treat["changes_above"] == "sick treat->wait at ages 0"
    # Feasible factors: k p <= p + (1 - p), so k <= 1 / p (rest rows).
    assert wait["feasible_max"] == pytest.approx(1 / P_WAIT)
    assert wait["search_above"] == pytest.approx(1 / P_WAIT)
    assert "stopped at the feasible factor 3.333" in wait["note"]
    assert "factor 3 is beyond" not in wait["note"]  # 3 < 3.333: still feasible
    # Value lost by keeping "treat" at cycle 0 when the wait cell is at k = 0.25:
    # Q_0(wait) - Q_0(treat) = (1 - k p) - (1 - L - q) = q + L - k p = 0.075.
    assert wait["value_lost_below"] == pytest.approx(P_TREAT + LOSS - 0.25 * P_WAIT, abs=1e-12)
    assert wait["value_lost_above"] == 0.0  # at k = 3 treating is still best
    # Treat cell at k = 3: (1 - p) - (1 - L - 3 q) = 3 q + L - p = 0.05.
    assert treat["value_lost_above"] == pytest.approx(3 * P_TREAT + LOSS - P_WAIT, abs=1e-12)
    assert treat["value_lost_below"] == 0.0
    assert result.base_value == pytest.approx(1 - LOSS + 1 - P_TREAT)
    assert list(frame.columns) == FRAME_COLUMNS
    assert set(result.fixed_frame()["reason"]) == {FIXED_REMAINDER}


def test_a_row_without_remainder_gives_the_same_factor():
    # Source: two_state_model's docstring; the only other exit (stay) takes 1 - k p.
    model = two_state_model(wait_row={"dead": "p", "sick": "1 - p"})
    frame = cell_sensitivity(model).to_frame()
    wait_dead = _row(frame, "transitions.wait.sick.dead")
    assert wait_dead["rule"] == EXITS_RESCALED
    assert wait_dead["factor_below"] == pytest.approx(0.5, abs=1e-8)
    # Scaling the stay cell s = 1 - p by k leaves dead = 1 - k s: treat stays best while
    # 1 - k s - q - L > 0... i.e. k < (1 - q - L) / (1 - p) = 0.85 / 0.7; feasible k <= 1/0.7.
    stay = _row(frame, "transitions.wait.sick.sick")
    assert stay["factor_above"] == pytest.approx((1 - P_TREAT - LOSS) / (1 - P_WAIT), abs=1e-8)
    assert stay["feasible_max"] == pytest.approx(1 / (1 - P_WAIT))


def test_a_rate_cell_is_scaled_before_the_exponential():
    # Source: two_state_model's docstring; p = 1 - exp(-rate) for one exit (common practice,
    # e.g. Fleurence & Hollenbeak 2007, PharmacoEconomics 25(1):3-6).
    frame = cell_sensitivity(two_state_model(treat_rate=True)).to_frame()
    rate = _row(frame, "rates.treat.sick.dead")
    assert rate["rule"] == RATE_SCALED
    expected = math.log(1 - P_WAIT + LOSS) / math.log(1 - P_TREAT)  # 2.7305..., not 2.5
    assert rate["factor_above"] == pytest.approx(expected, abs=1e-8)
    assert math.isinf(rate["feasible_max"])


def test_an_age_dependent_cell_is_scaled_along_its_whole_path():
    # p_t = 0.3 (1 + t): 0.3 at cycle 0 and 0.6 at cycle 1. One factor scales both, so the
    # feasible factor is set by cycle 1: k <= 1 / 0.6; the switch (decided at cycle 0) is
    # still at k = 0.5 (two_state_model's docstring).
    model = two_state_model(wait_row={"dead": "p * (1 + cycle)", "sick": "rest"})
    frame = cell_sensitivity(model).to_frame()
    wait = _row(frame, "transitions.wait.sick.dead")
    assert bool(wait["varies_with_age"])
    assert WHOLE_PATH_NOTE in wait["note"]
    assert wait["feasible_max"] == pytest.approx(1 / 0.6)
    assert (wait["base_low"], wait["base_high"]) == pytest.approx((0.3, 0.6))
    assert wait["factor_below"] == pytest.approx(0.5, abs=1e-8)
    assert "factor 2 is beyond the feasible factor 1.667" in wait["note"]
    assert np.isnan(wait["value_lost_above"])


DEMOS = ["demo_progressive.toml", "demo_counts_table.toml", "lesion_surveillance.toml"]


def _recompiled(model: Model, cell, factor: float) -> np.ndarray:
    """The transitions of ``model`` compiled with the cell's expression times ``factor``."""
    table = "rates" if cell.rule == RATE_SCALED else "transitions"
    rows = copy.deepcopy(dict(getattr(model, table)))
    rows[cell.action_id][cell.from_id][cell.to_id] = f"({cell.expression}) * {float(factor)!r}"
    return compile_model(replace(model, **{table: rows})).transition[0]


@pytest.mark.parametrize("name", DEMOS)
def test_moves_equal_recompiling_the_model_with_the_cell_scaled(name):
    # Reference: the compiler itself (a rest entry is one minus the rest of the row; rate
    # rows are exponentiated), applied to the model text with the cell multiplied by k.
    model = load_model(MODELS_DIR / name)
    scaler = CellScaler(model)
    checked = 0
    for i, cell in enumerate(scaler.cells):
        if cell.rule == EXITS_RESCALED:
            continue  # no text form; checked by the property test below
        factors = np.array([0.0, 0.35, min(1.8, cell.feasible_max)])
        batch = scaler.scaled(np.full(3, i), factors)
        for d, k in enumerate(factors):
            np.testing.assert_allclose(
                batch.transition[d], _recompiled(model, cell, float(k)), atol=1e-15
            )
            checked += 1
    assert checked >= 9


@settings(max_examples=40, deadline=None)
@given(
    k=st.floats(0.0, 1.0),
    stay=st.floats(0.05, 0.9),
    share=st.floats(0.05, 0.95),
)
def test_rescaled_rows_stay_distributions_and_keep_the_other_ratios(k, stay, share):
    # Invariant (common practice, as for Dirichlet rows): the row sums to 1, entries stay
    # in [0, 1] and the entries not moved keep their ratios.
    rest = 1.0 - stay
    row = {"sick": repr(stay), "dead": repr(rest * share)}
    model = two_state_model(wait_row=row | {"well": repr(rest * (1 - share))})
    model = replace(
        model, states=(*model.states[:1], State(id="well", absorbing=True), model.states[1])
    )
    scaler = CellScaler(model)
    i = next(n for n, c in enumerate(scaler.cells) if c.path == "transitions.wait.sick.sick")
    cell = scaler.cells[i]
    factor = k * cell.feasible_max
    P = scaler.scaled(np.array([i]), np.array([factor])).transition[0, 0, 0, 0]
    assert P.sum() == pytest.approx(1.0, abs=1e-12)
    assert ((P >= 0) & (P <= 1)).all()
    assert P[0] == pytest.approx(factor * stay)
    if P[2] > 1e-9:
        assert P[1] / P[2] == pytest.approx((1 - share) / share, rel=1e-9)


def test_demo_switching_factors_bound_a_change_of_policy():
    # At each reported factor the base-case policy holds just inside it and not just past
    # it (checked by solving the moved model directly).
    model = load_model(MODELS_DIR / "demo_progressive.toml")
    result = cell_sensitivity(model)
    scaler = CellScaler(model)
    objective = Objective.from_settings(model.settings)
    base = solve(scaler.base, objective)
    decision = base.decision_states[None, :] & ~base.indifferent[0]
    checked = 0
    for i in range(len(result.cells)):
        for factor, sign in ((result.factor_below[i], -1), (result.factor_above[i], 1)):
            if np.isnan(factor):
                continue
            inside, past = factor * (1 - sign * 1e-5), factor * (1 + sign * 1e-5)
            solved = solve(scaler.scaled(np.array([i, i]), np.array([inside, past])), objective)
            differs = (solved.policy != base.policy) & decision[None]
            assert not differs[0].any() and differs[1].any()
            checked += 1
    assert checked >= 10
    # Every "rest" entry of the model stays fixed as a remainder; literal zeros as zeros.
    reasons = dict(zip(result.fixed_frame()["cell"], result.fixed_frame()["reason"], strict=True))
    for table in ("transitions", "rates"):
        for action, rows in getattr(model, table).items():
            for source, row in rows.items():
                for target, value in row.items():
                    path = f"{table}.{action}.{source}.{target}"
                    if value == "rest":
                        assert reasons[path] == FIXED_REMAINDER
                    elif value in (0, 0.0, "0", "0.0"):
                        assert reasons[path] == FIXED_ZERO
    assert set(reasons.values()) <= {FIXED_REMAINDER, FIXED_ZERO}


def test_value_lost_equals_evaluating_the_base_policy_on_the_moved_model():
    model = load_model(MODELS_DIR / "demo_counts_table.toml")
    result = cell_sensitivity(model, loss_factors=(0.8, 1.2))
    scaler = CellScaler(model)
    objective = Objective.from_settings(model.settings)
    base_policy = solve(scaler.base, objective).policy
    C = len(scaler.cells)
    caps = np.array([c.feasible_max for c in scaler.cells])
    factors = np.minimum(np.tile([0.8, 1.2], C), np.repeat(caps, 2))
    moved = scaler.scaled(np.repeat(np.arange(C), 2), factors)
    best = solve(moved, objective).expected_value(moved.start_distribution)
    kept = evaluate_policy(moved, base_policy, objective).value
    feasible = (factors == np.tile([0.8, 1.2], C)).reshape(C, 2)
    expected = (best - kept).reshape(C, 2)
    np.testing.assert_allclose(
        result.value_lost[feasible], expected[feasible], rtol=1e-9, atol=1e-6
    )
    assert np.isnan(result.value_lost[~feasible]).all()  # beyond the feasible factor
    assert (result.value_lost[feasible] > 1.0).any()


@pytest.mark.parametrize(
    ("factor", "band"),
    [(1.05, "within 1.1x"), (0.85, "within 1.25x"), (1.5, "within 1.5x"), (0.5, "within 2x"),
     (0.0, "further than 2x"), (7.0, "further than 2x"), (float("nan"), NO_SWITCH_BAND)],
)  # fmt: skip
def test_closeness_bands(factor, band):
    assert closeness_band(factor) == band


@pytest.mark.parametrize(
    ("options", "where"),
    [
        ({"loss_factors": (1.5, 2.0)}, "loss_factors = (1.5, 2.0)"),
        ({"loss_factors": (0.5,)}, "loss_factors = (0.5,)"),
        ({"search_max": 1.0}, "search_max = 1.0"),
        ({"search_max": float("inf")}, "search_max = inf"),
        ({"grid": 1}, "grid = 1"),
        ({"xtol": 0.0}, "xtol = 0.0"),
    ],
)
def test_bad_options_are_refused_by_name(options, where):
    with pytest.raises(RunOptionError) as error:
        cell_sensitivity(two_state_model(), **options)
    assert str(error.value).startswith(where) and "expected" in str(error.value)


def test_a_factor_beyond_the_feasible_one_is_refused_naming_the_cell():
    scaler = CellScaler(two_state_model())
    i = next(n for n, c in enumerate(scaler.cells) if c.path == "transitions.wait.sick.dead")
    with pytest.raises(ModelError) as error:
        scaler.scaled(np.array([i]), np.array([3.5]))
    message = str(error.value)
    assert (
        "transitions.wait.sick.dead" in message and "3.5" in message and "[0, 3.33333]" in message
    )


def test_chunked_batches_give_the_same_result():
    # The memory budget only splits the batches (one draw per chunk here): same answers.
    model = load_model(MODELS_DIR / "demo_counts_table.toml")
    whole = cell_sensitivity(model).to_frame()
    scaler = CellScaler(model)
    n_total = 20 * len(scaler.cells)  # more than the run moves: the kept part is counted high
    fixed, per_draw = cell_memory(scaler, n_total)
    assert cell_chunk_size(scaler, n_total, fixed + per_draw)[0] == 1
    chunked = cell_sensitivity(model, memory_limit_bytes=fixed + per_draw).to_frame()
    numbers = ["factor_below", "factor_above", "value_lost_below", "value_lost_above"]
    np.testing.assert_allclose(chunked[numbers], whole[numbers], rtol=1e-12)
    assert list(chunked["changes_below"]) == list(whole["changes_below"])


def test_a_budget_below_one_moved_draw_is_refused_naming_the_model_estimate_and_budget():
    model = load_model(MODELS_DIR / "demo_counts_table.toml")
    with pytest.raises(ModelTooLargeError) as info:
        cell_sensitivity(model, memory_limit_bytes=100_000)
    message = str(info.value)
    assert "demo_counts_table.toml: the sensitivity of the transition cells" in message
    assert "of 4 states in dense rows) needs an estimated" in message
    assert "the budget is 0.1 MiB (100,000 bytes)" in message


def test_a_model_with_only_fixed_cells_gives_an_empty_table():
    # wait: dead = 0 (zero), sick = rest; treat: rest only -> nothing to move.
    model = two_state_model(wait_row={"dead": 0.0, "sick": "rest"})
    model = replace(model, transitions={**model.transitions, "treat": {"sick": {"sick": "rest"}}})
    result = cell_sensitivity(model)
    assert result.to_frame().empty and list(result.to_frame().columns) == FRAME_COLUMNS
    assert set(result.fixed_frame()["reason"]) == {FIXED_ZERO, FIXED_REMAINDER}


@settings(max_examples=15, deadline=None)
@given(
    p=st.floats(0.1, 0.6),
    q_share=st.floats(0.1, 0.8),
    loss_share=st.floats(0.1, 0.8),
)
def test_switching_factors_follow_the_algebra_for_any_estimates(p, q_share, loss_share):
    # Source: two_state_model's docstring (common practice: the Bellman equation), with
    # q < p and L < p - q so that treating is best: the wait cell switches at (q + L) / p,
    # the treat cell at (p - L) / q when that is below its search end min(10, 1 / q).
    q = q_share * p
    loss = loss_share * (p - q)
    model = two_state_model()
    parameters = dict(model.parameters)
    parameters["p"] = replace(parameters["p"], value=p)
    parameters["q"] = replace(parameters["q"], value=q)
    parameters["loss"] = replace(parameters["loss"], value=loss)
    frame = cell_sensitivity(replace(model, parameters=parameters)).to_frame()
    wait = _row(frame, "transitions.wait.sick.dead")
    treat = _row(frame, "transitions.treat.sick.dead")
    assert wait["factor_below"] == pytest.approx((q + loss) / p, abs=1e-8)
    above = (p - loss) / q
    if above < min(10.0, 1.0 / q) * (1 - 1e-6):
        assert treat["factor_above"] == pytest.approx(above, abs=1e-8)
    elif above > min(10.0, 1.0 / q) * (1 + 1e-6):
        assert np.isnan(treat["factor_above"])


def test_an_infinite_horizon_names_no_ages():
    # One stationary policy: a change holds in every cycle (common practice).
    frame = cell_sensitivity(load_model(MODELS_DIR / "teaching_stationary.toml")).to_frame()
    texts = [t for t in (*frame["changes_below"], *frame["changes_above"]) if t != "none"]
    assert texts and all(t.endswith("in every cycle") for t in texts)


def _cell_peak(model, budget: int) -> tuple[int, int, int]:
    """(estimate, traced peak, draws per chunk) of a cell sensitivity run in ``budget``."""
    import gc
    import tracemalloc

    from caredecide.sensitivity.cells import DEFAULT_GRID

    scaler = CellScaler(model)
    C = len(scaler.cells)
    n_total = C * (2 * DEFAULT_GRID + 2) + 4 * C
    size, _ = cell_chunk_size(scaler, n_total, budget)
    fixed, per_draw = cell_memory(scaler, n_total)
    estimate = fixed + min(size, C * (2 * DEFAULT_GRID + 2)) * per_draw  # the grid pass
    del scaler
    gc.collect()
    tracemalloc.start()
    try:
        cell_sensitivity(model, memory_limit_bytes=budget)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return estimate, peak, size


@pytest.mark.parametrize(
    ("name", "budget"),
    [
        ("grid", 30_000_000),
        ("demo_years_since_progression.toml", 3_000_000),
        ("grid300", 60_000_000),  # scaled in sparse rows (300 age-dependent states)
    ],
)
def test_cell_memory_estimate_is_within_25_percent_of_the_measured_peak(name, budget, monkeypatch):
    # Reference: the peak tracemalloc measures (it sees every numpy array); the 25% band
    # is the memory guard's acceptance rule, as in tests/test_memory.py (common practice
    # here, no published source). Age-dependent dense rows, several chunks per pass; the
    # demo has tunnels and decision-time moves. The peak must also stay within the budget.
    from caredecide.modelfile import loads_model
    from caredecide.sensitivity import cells
    from tests.memory_models import grid_model_text

    if name.startswith("grid"):
        shape = (60, 2, 20) if name == "grid" else (300, 2, 20)
        model = loads_model(grid_model_text(*shape, timed=True), file="g.toml", validate=False)
    else:
        model = load_model(MODELS_DIR / name)
    # Compiled loops and lazy imports load once per process: not part of a pass. Compiling
    # a loop (a fresh clone has no numba cache on disk) traces tens of MB: the dense rows'
    # loops and, on a small model scaled in sparse rows, the sparse rows' loops too.
    cell_sensitivity(two_state_model())
    with monkeypatch.context() as patch:
        patch.setattr(cells, "CellScaler", lambda model: CellScaler(model, "sparse"))
        small = loads_model(grid_model_text(4, 2, 4, timed=True), file="g.toml", validate=False)
        cell_sensitivity(small)
    estimate, peak, size = _cell_peak(model, budget)
    assert size > 1
    assert 0.75 * peak <= estimate <= 1.25 * peak, (estimate / 1e6, peak / 1e6)
    assert peak <= budget, (peak / 1e6, budget / 1e6)


def _scaled_both_ways(model, n: int = 40):
    """(sparse, dense) batches of the same random cells and factors."""
    sparse, dense = CellScaler(model, "sparse"), CellScaler(model, "dense")
    assert (sparse.transition_form, dense.transition_form) == ("sparse", "dense")
    keys = [
        (c.path, c.rule, c.remainder, c.base_low, c.base_high, c.feasible_max) for c in dense.cells
    ]
    assert [
        (c.path, c.rule, c.remainder, c.base_low, c.base_high, c.feasible_max) for c in sparse.cells
    ] == keys
    assert [(f.path, f.reason) for f in sparse.fixed] == [(f.path, f.reason) for f in dense.fixed]
    rng = np.random.default_rng(5)
    which = rng.integers(0, len(dense.cells), n)
    caps = np.array([min(dense.cells[c].feasible_max, 5.0) for c in which])
    factors = rng.uniform(0.0, 1.0, n) * caps
    return sparse.scaled(which, factors), dense.scaled(which, factors)


@pytest.mark.parametrize(
    "row",
    [{"dead": "p", "sick": "1 - p"}, {"dead": "p * (1 + cycle)", "sick": "rest"}],
    ids=["exits rescaled", "remainder absorbs"],
)
def test_sparse_rows_scale_cells_as_the_dense_rows(row):
    # Common practice: the same move in another storage of the rows gives the same rows.
    a, b = _scaled_both_ways(two_state_model(wait_row=row))
    assert a.sparse_transition is not None and b.sparse_transition is None
    np.testing.assert_array_equal(a.sparse_transition.to_dense(), b.transition)


def test_a_large_age_dependent_model_is_scaled_in_sparse_rows_with_its_moves():
    # 300 age-dependent states (compile picks sparse rows): the cells are scaled in them,
    # giving the rows the dense scaling gives.
    from caredecide.modelfile import loads_model
    from tests.memory_models import grid_model_text

    model = loads_model(grid_model_text(300, 2, 6, timed=True), file="g.toml", validate=False)
    assert CellScaler(model).transition_form == "sparse"
    a, b = _scaled_both_ways(model)
    np.testing.assert_array_equal(a.sparse_transition.to_dense(), b.transition)
    # With decision-time moves (the demo with tunnels): moved rows follow the scaled rows.
    a, b = _scaled_both_ways(load_model(MODELS_DIR / "demo_years_since_progression.toml"))
    np.testing.assert_allclose(a.sparse_transition.to_dense(), b.transition, rtol=0, atol=1e-15)
