"""The best shared policy over parameter draws (caredecide.uncertainty.policy_search).

Sources: the weighted value problem and the weight-select-update heuristic, Steimle,
Kaufman & Denton 2021, "Multi-model Markov decision processes", IISE Transactions 53(10);
the value of the stochastic solution, Birge 1982, "The value of the stochastic solution in
stochastic linear programs with fixed recourse", Mathematical Programming 24:314-325
(from memory); EVPI as E[max] - max E, Claxton 1999, J Health Econ 18:341-364.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.errors import RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.uncertainty.policy_search import (
    evaluate_shared_policy,
    search_shared_policy,
)
from tests.test_solvers_models import make_compiled

QALYS = Objective("qalys")


def _random_tiny(rng: np.random.Generator, n_draws: int = 4, n_cycles: int = 3):
    """2 live states + dead, 2 actions, D draws: 2 deciding states x 3 cycles = 64 policies."""
    S, A = 3, 2
    P = np.zeros((n_draws, 1, A, S, S))
    for d in range(n_draws):
        for a in range(A):
            for s in range(2):
                row = rng.dirichlet(np.ones(S))
                P[d, 0, a, s] = row
            P[d, 0, a, 2, 2] = 1.0
    qaly = np.zeros((n_draws, 1, S))
    qaly[:, 0, :2] = rng.uniform(0.2, 1.0, size=(n_draws, 2))
    one_off = np.zeros((n_draws, 1, S, A))
    one_off[:, 0, :2, 1] = -rng.uniform(0.0, 0.3, size=(n_draws, 2))
    return make_compiled(
        P,
        state_qaly=qaly,
        decision_qaly=one_off,
        n_cycles=n_cycles,
        start_distribution=np.array([0.6, 0.4, 0.0]),
        within_cycle="end",
        discount_outcomes=0.03,
    )


def _all_policies(compiled):
    T, S = compiled.n_cycles, compiled.n_states
    for bits in itertools.product(range(2), repeat=T * 2):
        policy = np.zeros((T, S), dtype=np.intp)
        policy[:, :2] = np.reshape(bits, (T, 2))
        yield policy


def _search(compiled, objective=QALYS, **options):
    solved = solve(compiled, objective)
    base = solved.policy[0]
    per_draw_optimal = solved.value[:, 0] @ compiled.start_distribution
    return search_shared_policy(
        compiled,
        objective,
        {"first draw's optimum": base},
        base_policy=base,
        per_draw_optimal=per_draw_optimal,
        per_draw_policies=solved.policy,
        **options,
    )


def test_shared_policy_values_equal_the_policy_evaluation():
    # Common practice: the same policy evaluated two ways gives the same totals.
    compiled = _random_tiny(np.random.default_rng(7), n_draws=5)
    policy = np.array([[1, 0, 0], [0, 1, 0], [1, 1, 0]])
    shared = evaluate_shared_policy(compiled, QALYS, policy)
    reference = evaluate_policy(compiled, np.broadcast_to(policy, (5, 3, 3)), QALYS).value
    np.testing.assert_allclose(shared.per_draw, reference, rtol=1e-12, atol=1e-14)


def test_search_matches_brute_force_on_200_random_tiny_models(capsys):
    # Exact optimum by enumerating all 64 deterministic policies (2 deciding states x
    # 3 cycles x 2 actions); the search must match on at least 95% of the models.
    rng = np.random.default_rng(20261204)
    matched, worst_gap = 0, 0.0
    for _ in range(200):
        compiled = _random_tiny(rng)
        exact = max(
            evaluate_shared_policy(compiled, QALYS, p).per_draw.mean()
            for p in _all_policies(compiled)
        )
        found = _search(compiled).per_draw_best.mean()
        assert found <= exact + 1e-12
        gap = (exact - found) / abs(exact)
        worst_gap = max(worst_gap, gap)
        matched += gap <= 1e-12
    with capsys.disabled():
        print(f"\nshared-policy search: {matched}/200 matched, worst relative gap {worst_gap:.2e}")
    assert matched >= 190


def test_value_of_the_stochastic_solution_hand_worked():
    # One cycle, one deciding state, end-of-cycle QALYs, no discount. Waiting dies with
    # p = 1 - exp(-r) where the rate r is 0 or 2 with equal weight (mean rate 1);
    # treating survives with 0.5 for certain. At the mean rate waiting is worth
    # exp(-1) = 0.3679 < 0.5, so the mean-parameter (base-case) schedule treats. Over the
    # draws waiting is worth (1 + exp(-2)) / 2 = 0.5677 > 0.5: the best shared schedule
    # waits, and VSS = (1 + exp(-2)) / 2 - 0.5 = exp(-2) / 2 = 0.0676676 QALYs.
    # EVPI: draw 1 waits (1), draw 2 treats (0.5); E[max] = 0.75, so EVPI against the
    # best found = 0.75 - 0.5677 and against the base case 0.75 - 0.5 = 0.25.
    p = 1.0 - np.exp(-np.array([0.0, 2.0]))
    P = np.zeros((2, 1, 2, 2, 2))
    P[:, 0, 0, 0] = np.stack([1 - p, p], axis=1)  # wait
    P[:, 0, 1, 0] = [0.5, 0.5]  # treat
    P[:, 0, :, 1, 1] = 1.0
    compiled = make_compiled(P, state_qaly=np.array([1.0, 0.0]), n_cycles=1, within_cycle="end")
    base = np.array([[1, 0]])  # treat: the optimum at the mean rate
    at_mean = np.exp(-1.0)
    assert at_mean < 0.5
    solved = solve(compiled, QALYS)
    result = search_shared_policy(
        compiled,
        QALYS,
        {"optimum at mean parameters": base},
        base_policy=base,
        per_draw_optimal=solved.value[:, 0] @ compiled.start_distribution,
    )
    assert result.policy[0, 0] == 0  # wait
    assert result.value_of_stochastic_solution == pytest.approx(np.exp(-2) / 2, abs=1e-12)
    assert result.value_of_stochastic_solution == pytest.approx(0.0676676, abs=1e-7)
    assert result.evpi_best == pytest.approx(0.75 - (1 + np.exp(-2)) / 2, abs=1e-12)
    assert result.evpi_candidates == pytest.approx(0.25, abs=1e-12)
    assert result.acceptability == pytest.approx(0.5)
    assert list(result.differing_cells["best_over_draws"]) == ["a0"]


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), draws=st.integers(1, 6))
def test_tightened_evpi_between_zero_and_the_candidate_figure(seed, draws):
    # EVPI = E[max_pi V(pi)] - max_pi E[V(pi)] (Claxton 1999): a better shared policy can
    # only lower the second term's shortfall, never below zero.
    compiled = _random_tiny(np.random.default_rng(seed), n_draws=draws)
    result = _search(compiled)
    assert -1e-12 <= result.evpi_best <= result.evpi_candidates + 1e-12
    assert result.value_of_stochastic_solution >= -1e-12


def test_expected_search_never_below_any_start():
    rng = np.random.default_rng(3)
    for _ in range(20):
        result = _search(_random_tiny(rng))
        starts = result.to_frame()
        assert (starts["expected_after"] >= starts["expected_before"] - 1e-12).all()
        assert result.per_draw_best.mean() >= starts["expected_before"].max() - 1e-12


def test_lower_percentile_criterion_is_labelled_and_not_worse_at_its_percentile():
    # Delage & Mannor 2010 (percentile optimisation): a different criterion; the found
    # policy's lower percentile is at least that of every start.
    compiled = _random_tiny(np.random.default_rng(11), n_draws=6)
    result = _search(compiled, criterion="lower_percentile", percentile=20.0)
    assert result.criterion == "lower_percentile"
    assert any("different criterion" in note for note in result.notes)
    found = np.percentile(result.per_draw_best, 20.0)
    base = np.percentile(result.per_draw_base, 20.0)
    assert found >= base - 1e-12


def test_regret_percentile_criterion_lowers_regret():
    compiled = _random_tiny(np.random.default_rng(12), n_draws=6)
    result = _search(compiled, criterion="regret_percentile", percentile=10.0)
    regret_found = np.percentile(result.per_draw_optimal - result.per_draw_best, 90.0)
    regret_base = np.percentile(result.per_draw_optimal - result.per_draw_base, 90.0)
    assert regret_found <= regret_base + 1e-12


def test_bad_options_are_refused_naming_them():
    compiled = _random_tiny(np.random.default_rng(1))
    with pytest.raises(RunOptionError, match="criterion"):
        _search(compiled, criterion="best guess")
    with pytest.raises(RunOptionError, match="percentile"):
        _search(compiled, criterion="lower_percentile", percentile=100.0)
    with pytest.raises(ValueError, match="shape"):
        evaluate_shared_policy(compiled, QALYS, np.zeros((2, 3), dtype=int))


def test_best_schedule_identical_serial_and_dask_and_across_chunk_sizes():
    # Common practice: how the draws are split and where chunks run changes nothing.
    from caredecide.modelfile import load_model
    from caredecide.uncertainty.cluster import dask_client, dask_map
    from caredecide.uncertainty.policy_search import best_policy_over_draws
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    serial = best_policy_over_draws(model, 30, 4)
    small = best_policy_over_draws(model, 30, 4, memory_limit_bytes=60_000_000)
    with dask_client(workers=1, processes=False, threads_per_worker=2) as client:
        on_dask = best_policy_over_draws(model, 30, 4, map_chunks=dask_map(client))
    for other in (small, on_dask):
        np.testing.assert_array_equal(other.policy, serial.policy)
        np.testing.assert_array_equal(other.per_draw_best, serial.per_draw_best)
        np.testing.assert_array_equal(other.per_draw_optimal, serial.per_draw_optimal)


def _dense_and_sparse(n_states: int = 8, horizon: int = 6):
    from caredecide.compile import compile_model
    from caredecide.modelfile import loads_model
    from tests.memory_models import grid_model_text

    model = loads_model(
        grid_model_text(n_states, 2, horizon, timed=True), file="grid.toml", validate=False
    )
    draws = {"p_prog": np.linspace(0.05, 0.3, 5), "p_die": np.linspace(0.01, 0.05, 5)}
    dense = compile_model(model, draws, transition_form="dense")
    sparse = compile_model(model, draws, transition_form="sparse")
    assert (dense.transition_form, sparse.transition_form) == ("dense", "sparse")
    return model, dense, sparse


def test_sparse_rows_give_the_dense_values_occupancy_and_action_values():
    # Common practice: the same transitions in another storage give the same sums.
    model, dense, sparse = _dense_and_sparse()
    objective = Objective.from_settings(model.settings)
    rng = np.random.default_rng(3)
    allowed = np.asarray(dense.allowed)
    for _ in range(3):  # random allowed policies, age-dependent
        policy = np.array(
            [
                [rng.choice(np.flatnonzero(allowed[s])) for s in range(dense.n_states)]
                for _ in range(6)
            ]
        )
        a = evaluate_shared_policy(dense, objective, policy)
        b = evaluate_shared_policy(sparse, objective, policy)
        np.testing.assert_allclose(b.per_draw, a.per_draw, rtol=1e-12)
        np.testing.assert_allclose(b.occupancy, a.occupancy, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(b.action_values, a.action_values, rtol=1e-12)


def test_search_on_sparse_rows_finds_the_dense_answer():
    model, dense, sparse = _dense_and_sparse()
    objective = Objective.from_settings(model.settings)
    found_dense = _search(dense, objective)
    found_sparse = _search(sparse, objective)
    np.testing.assert_array_equal(found_sparse.policy, found_dense.policy)
    np.testing.assert_allclose(found_sparse.per_draw_best, found_dense.per_draw_best, rtol=1e-12)


def test_best_schedule_runs_on_a_model_compiled_in_sparse_rows():
    # 300 age-dependent states: compile picks the sparse rows (formerly refused by
    # transition_at). No parameter is uncertain, so every draw is the base case and the best
    # shared policy is the base-case optimum (common practice).
    from caredecide.compile import compile_model
    from caredecide.modelfile import loads_model
    from caredecide.uncertainty.policy_search import best_policy_over_draws
    from tests.memory_models import grid_model_text

    model = loads_model(grid_model_text(300, 2, 8, timed=True), file="g.toml", validate=False)
    base = compile_model(model)
    assert base.transition_form == "sparse"
    found = best_policy_over_draws(model, 3, 1)
    np.testing.assert_array_equal(found.policy, found.base_policy)
    np.testing.assert_allclose(found.per_draw_best, found.per_draw_optimal, rtol=1e-12)
