"""Probabilistic sensitivity analysis: invariants, chunking, EVPI and EVPPI."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError, RunOptionError
from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.uncertainty.psa import Candidate, PSAResult, analyse_uncertainty
from caredecide.uncertainty.voi import evpi
from tests.conftest import load_dict, small_model_dict

DRAWS = 400


def uncertain_model_dict() -> dict:
    """The small test model with distributions, a Dirichlet row and an unused parameter."""
    data = small_model_dict()
    specs = {
        "p_die_sick": {"type": "beta", "mean": 0.2, "se": 0.05},
        "rr_treat": {"type": "lognormal", "low": 0.3, "high": 1.1},
        "u_sick": {"type": "beta", "mean": 0.6, "se": 0.05},
        "c_drug": {"type": "gamma", "mean": 1000.0, "se": 300.0},
    }
    for name, spec in specs.items():
        data["parameters"][name]["distribution"] = spec
    # A parameter that enters no expression: its EVPPI must be ~0.
    data["parameters"]["unused"] = {
        "value": 1.0,
        "kind": "other",
        "source": "Synthetic: test",
        "distribution": {"type": "normal", "mean": 1.0, "sd": 1.0},
    }
    data["groups"] = {
        "from_well": {
            "members": ["g_sick", "g_dead", "g_well"],
            "counts": [10.0, 1.0, 89.0],
            "source": "Synthetic: test",
        }
    }
    data["transitions"]["wait"]["well"] = {"sick": "g_sick", "dead": "g_dead", "well": "g_well"}
    return data


@pytest.fixture(scope="module")
def model():
    return load_dict(uncertain_model_dict())


@pytest.fixture(scope="module")
def result(model):
    return analyse_uncertainty(model, DRAWS, seed=2024, chunk_size=DRAWS, keep_policies=True)


def test_acceptability_shares_sum_to_one_per_state_and_age(result):
    by_cycle = result.acceptability().groupby(["cycle", "state"])["share"].sum()
    np.testing.assert_allclose(by_cycle.to_numpy(), 1.0, atol=1e-12)
    by_band = result.acceptability_by_age_band(3.0).groupby(["state", "age_from"])["share"].sum()
    np.testing.assert_allclose(by_band.to_numpy(), 1.0, atol=1e-12)
    # Only the one decision state ("sick": wait or treat) is shown.
    assert set(result.acceptability()["state"]) == {"sick"}


def test_acceptability_equals_shares_of_kept_policies(result):
    policies = result.policies
    treat = result.action_ids.index("treat")
    sick = result.state_ids.index("sick")
    frame = result.acceptability()
    shown = frame[frame["action"] == "treat"]["share"].to_numpy()
    np.testing.assert_array_equal(shown, (policies[:, :, sick] == treat).mean(axis=0))
    # Binomial Monte Carlo error sqrt(p (1 - p) / D) (common practice).
    np.testing.assert_allclose(
        frame["mc_se"], np.sqrt(frame["share"] * (1 - frame["share"]) / DRAWS)
    )


def _assert_same(a, b):
    for name in (
        "parameters",
        "optimal",
        "candidate_totals",
        "action_counts",
        "distinct_policies",
        "distinct_counts",
        "policies",
    ):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    pd.testing.assert_frame_equal(a.evppi(), b.evppi())
    assert a.evpi() == b.evpi()


def test_chunk_size_does_not_change_any_result(model):
    # No pilot (n_frequent=0): every draw goes through the chunked runner.
    whole = analyse_uncertainty(
        model, DRAWS, seed=2024, chunk_size=DRAWS, keep_policies=True, n_frequent=0
    )
    split = analyse_uncertainty(
        model, DRAWS, seed=2024, chunk_size=37, keep_policies=True, n_frequent=0
    )
    assert split.chunk_size == 37
    _assert_same(split, whole)


def test_pilot_block_and_chunks_give_the_same_results(model):
    # The first 1,000 draws are the pilot; the rest run in chunks of any size.
    done = []
    whole = analyse_uncertainty(
        model, 1300, seed=8, chunk_size=1300, n_frequent=2, keep_policies=True
    )
    split = analyse_uncertainty(
        model,
        1300,
        seed=8,
        chunk_size=120,
        n_frequent=2,
        keep_policies=True,
        progress=lambda d, n: done.append(d),
    )
    _assert_same(split, whole)
    # The pilot's chunks are evaluated (and reported) one by one too.
    assert done == [*range(120, 1000, 120), 1000, 1120, 1240, 1300]


@pytest.mark.parametrize(
    ("draws", "chunk", "frequent", "progress_when_sent"),
    [(1300, 120, 2, 1000), (1300, 370, 0, 1110), (240, 100, 2, 240)],
)
def test_the_plane_is_handed_over_once_as_soon_as_its_draws_are_done(
    model, draws, chunk, frequent, progress_when_sent
):
    # plane_ready gets the very table of result.plane_frame(), once, after the chunk that
    # completes the first PLANE_DRAWS draws (the pilot's, or a later chunk without one).
    events: list = []
    result = analyse_uncertainty(
        model,
        draws,
        seed=8,
        chunk_size=chunk,
        n_frequent=frequent,
        progress=lambda d, n: events.append(d),
        plane_ready=lambda frame: events.append(frame),
    )
    frames = [e for e in events if isinstance(e, pd.DataFrame)]
    assert len(frames) == 1
    pd.testing.assert_frame_equal(frames[0], result.plane_frame(), check_exact=True)
    assert frames[0]["draw"].max() == min(draws, 1000) - 1
    sent_at = next(i for i, e in enumerate(events) if isinstance(e, pd.DataFrame))
    assert events[sent_at - 1] == progress_when_sent  # right after that chunk's progress


def test_threads_give_the_serial_results(model, monkeypatch):
    # Chunks (the pilot's too) on two threads of this process, in whatever order they
    # finish, must give every figure of a serial run (results are joined in draw order;
    # common practice for batched Monte Carlo work). The idle-core rule is bypassed so
    # that two threads run even on a busy machine.
    from caredecide.uncertainty import psa

    monkeypatch.setattr(psa, "usable_threads", lambda requested, watch=None: requested)
    serial = analyse_uncertainty(
        model, 1300, seed=8, chunk_size=1300, n_frequent=2, keep_policies=True
    )
    done = []
    threaded = analyse_uncertainty(
        model,
        1300,
        seed=8,
        chunk_size=90,
        n_frequent=2,
        keep_policies=True,
        workers=2,
        progress=lambda d, n: done.append(d),
    )
    assert threaded.threads == 2 and serial.threads == 1
    _assert_same(threaded, serial)
    assert [c.name for c in threaded.candidates] == [c.name for c in serial.candidates]
    assert done == sorted(done) and done[-1] == 1300


def test_workers_and_a_chunk_map_together_are_refused(model):
    from caredecide.chunks import serial_map

    with pytest.raises(RunOptionError, match="workers = 2 is not allowed"):
        analyse_uncertainty(model, 10, seed=1, workers=2, map_chunks=serial_map)


def test_default_chunk_size_fastest_size_shared_by_threads_and_dividing_a_block(model):
    from caredecide.limits import PSA_CHUNK_BYTES
    from caredecide.uncertainty.psa import BLOCK_SIZE, default_chunk_size, draw_bytes

    per_draw = draw_bytes(model)
    fastest = default_chunk_size(model, 10**6, None)
    assert fastest * per_draw <= PSA_CHUNK_BYTES
    assert fastest % BLOCK_SIZE == 0 or BLOCK_SIZE % fastest == 0
    # A budget for 283 draws: 250 (the largest divisor of the 1,000-draw block that fits);
    # two threads share it: 125 each (141 fit; 125 divides the block).
    assert default_chunk_size(model, 10**6, 283 * per_draw) == 250
    assert default_chunk_size(model, 10**6, 283 * per_draw, threads=2) == 125
    assert default_chunk_size(model, 300, 10**12) == min(300, fastest)


def test_every_draw_is_the_optimum_of_its_own_parameters(model, result):
    # The one core path: draw 123 solved alone gives the value kept for it.
    row = {name: result.parameters[123:124, j] for j, name in enumerate(result.parameter_names)}
    alone = solve(compile_model(model, row), Objective.from_settings(model.settings))
    start = compile_model(model).start_distribution
    assert result.optimal[123, 2] == pytest.approx(alone.value[0, 0] @ start, rel=1e-12)


def test_per_draw_optimum_beats_every_candidate(result):
    # Optimality (Bellman): no fixed policy beats the draw's own optimal policy.
    assert result.regret.min() >= -1e-9 * np.abs(result.optimal[:, 2]).max()


def test_evpi_is_nonnegative_and_at_least_evpi_among_candidates(result):
    info = result.evpi()
    assert info["evpi"] >= 0.0
    assert info["evpi"] >= info["evpi_among_candidates"] - 1e-9
    assert info["evpi_among_candidates"] == pytest.approx(float(evpi(result.candidate_values)))
    # EVPI = min over candidates of the expected loss (the best candidate's).
    assert info["evpi"] == pytest.approx(result.expected_loss()["expected_loss"].min())


def test_evpi_is_zero_when_every_parameter_is_fixed():
    data = small_model_dict()  # no distributions at all
    fixed = analyse_uncertainty(load_dict(data), 50, seed=1)
    assert fixed.evpi()["evpi"] == 0.0
    assert fixed.evpi()["evpi_among_candidates"] == 0.0
    assert fixed.parameters.shape == (50, 0)


def test_evppi_of_unused_parameter_is_about_zero_and_evppi_below_evpi(result):
    table = result.evppi().set_index("parameter")
    total = result.evpi()["evpi_among_candidates"]
    assert total > 0
    # Regression EVPPI of an irrelevant input is biased up only by the noise the smoother
    # keeps (Strong et al. 2014): allow 5% of the EVPI plus 3 standard errors.
    unused = table.loc["unused"]
    assert unused["evppi"] <= 0.05 * total + 3 * unused["mc_se"]
    # EVPPI <= EVPI (Strong et al. 2014), with the same tolerance for smoothing noise.
    assert (table["evppi"] <= total * 1.05 + 3 * table["mc_se"]).all()
    # The Dirichlet row is one entry, regressed on its first k - 1 members.
    assert table.loc["from_well", "members"] == "g_sick,g_dead"


def test_evpi_arithmetic_by_hand():
    # Claxton 1999 (from memory): EVPI = E[max] - max E. Two draws, two candidates:
    # V* = (10, 12); V_1 = (10, 9), V_2 = (8, 12). E[V*] = 11, E[V_1] = 9.5, E[V_2] = 10,
    # so EVPI = 11 - 10 = 1; expected losses are 1.5 and 1.
    totals = np.zeros((3, 2, 2))
    totals[2] = [[10.0, 8.0], [9.0, 12.0]]
    result = PSAResult(
        n_draws=2,
        seed=0,
        objective=Objective("net_benefit", 1.0),
        state_ids=("s",),
        action_ids=("a",),
        decision_states=np.array([False]),
        allowed=np.ones((1, 1), bool),
        ages=None,
        candidates=[
            Candidate("one", "test", np.zeros((1, 1), np.int8)),
            Candidate("two", "test", np.zeros((1, 1), np.int8)),
        ],
        parameter_names=(),
        group_members={},
        parameters=np.empty((2, 0)),
        optimal=np.array([[0.0, 0.0, 10.0], [0.0, 0.0, 12.0]]),
        candidate_totals=totals,
        action_counts=np.zeros((1, 1, 1), int),
        distinct_policies=np.zeros((1, 1, 1), np.int8),
        distinct_counts=np.array([2]),
        policies=None,
        chunk_size=2,
        iterations=[1],
        success=True,
        messages=[],
        wtp_grid=np.array([0.0, 1.0]),
    )
    np.testing.assert_allclose(result.expected_loss()["expected_loss"], [1.5, 1.0])
    assert result.evpi()["evpi"] == pytest.approx(1.0)
    assert result.evpi()["best_candidate"] == "two"


def test_candidates_include_base_mean_strategies_and_are_distinct(result):
    origins = {c.origin for c in result.candidates}
    assert {"base-case optimal", "fixed strategy"} <= origins
    names = [n for c in result.candidates for n in (c.name, *c.also)]
    assert "base-case optimal policy" in names and "optimal at mean parameters" in names
    assert "never treat" in names and "treat at once" in names
    policies = np.stack([c.policy for c in result.candidates])
    assert len(np.unique(policies.reshape(len(policies), -1), axis=0)) == len(policies)


def test_acceptability_curves_sum_to_one_and_frontier_per_wtp(result):
    curves = result.acceptability_curves()
    totals = curves.groupby("wtp")["probability_cost_effective"].sum()
    np.testing.assert_allclose(totals.to_numpy(), 1.0)
    assert len(result.acceptability_frontier()) == len(result.wtp_grid)
    np.testing.assert_allclose(result.wtp_grid[[0, -1]], [0.0, 40_000.0])  # 0 to 2 x WTP


def test_convergence_ends_at_the_full_estimates(result):
    frame = result.convergence(points=50)
    last = frame.groupby("quantity").last()
    assert last.loc["EVPI", "n"] == DRAWS
    assert last.loc["EVPI", "mean"] == pytest.approx(result.evpi()["evpi"])
    assert last.loc["expected optimal value", "mean"] == pytest.approx(
        result.evpi()["expected_optimal_value"]
    )


def test_infinite_horizon_has_one_age_band():
    data = uncertain_model_dict()
    data["settings"].pop("horizon_cycles")
    data["settings"]["horizon"] = "infinite"
    stationary = analyse_uncertainty(load_dict(data), 60, seed=2)
    bands = stationary.acceptability_by_age_band()
    assert len(bands) == 2 and bands["age_from"].isna().all()
    np.testing.assert_allclose(bands["share"].sum(), 1.0)


def test_user_strategies_join_the_candidates(model):
    from caredecide.strategies import from_age

    extra = from_age("treat", 63.0, name="my own rule")
    result = analyse_uncertainty(model, 30, seed=1, strategies=[extra], n_frequent=0)
    names = [n for c in result.candidates for n in (c.name, *c.also)]
    assert "my own rule" in names


def test_rank_correlation_reaches_the_draws(model):
    linked = analyse_uncertainty(
        model, 200, seed=3, n_frequent=0, rank_correlation={("u_sick", "c_drug"): 0.8}
    )
    columns = [linked.parameter_names.index(n) for n in ("u_sick", "c_drug")]
    ranks = pd.DataFrame(linked.parameters[:, columns]).rank()
    assert ranks.corr().iloc[0, 1] > 0.6


# ---------------------------------------------------------------- one test per refusal
@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"chunk_size": 0}, r"chunk_size = 0 is not allowed; expected a whole number >= 1"),
        ({"wtp_range": (5.0, 1.0)}, r"wtp_range: \(5\.0, 1\.0\); expected 0 <= LOW < HIGH"),
        ({"wtp_range": ("a", 1)}, r"wtp_range: \('a', 1\); expected two numbers"),
        ({"wtp_points": 1}, r"wtp_points = 1 is not allowed; expected a whole number >= 2"),
        ({"n_frequent": -1}, r"n_frequent = -1 is not allowed; expected a whole number >= 0"),
        ({"memory_limit_bytes": 0}, r"memory_limit_bytes = 0 is not allowed; expected a whole"),
        ({"chunk_size": True}, r"chunk_size = True is not allowed"),
    ],
)
def test_refusals(model, options, message):
    # Run options are the caller's: RunOptionError, never a model-file error.
    error = RunOptionError if next(iter(options)) != "wtp_range" else ModelError
    with pytest.raises(error, match=message) as info:
        analyse_uncertainty(model, 10, seed=1, **options)
    if error is RunOptionError:
        assert not isinstance(info.value, ModelError)


def test_refuses_zero_draws(model):
    with pytest.raises(RunOptionError, match=r"draws = 0 is not allowed"):
        analyse_uncertainty(model, 0, seed=1)


def test_a_pilot_larger_than_the_budget_runs_in_chunks_with_the_same_results(model):
    # A budget of 100 draws: the 1,000-draw pilot is solved in chunks of 100 (its draws
    # run again once the candidates are known), and nothing else changes.
    from caredecide.uncertainty.psa import default_chunk_size, draw_bytes

    limit = 100 * draw_bytes(model)
    assert default_chunk_size(model, 1300, limit) == 100
    done = []
    whole = analyse_uncertainty(
        model, 1300, seed=8, chunk_size=1300, n_frequent=2, keep_policies=True
    )
    small = analyse_uncertainty(
        model,
        1300,
        seed=8,
        memory_limit_bytes=limit,
        n_frequent=2,
        keep_policies=True,
        progress=lambda d, n: done.append(d),
    )
    _assert_same(small, whole)
    assert [c.name for c in small.candidates] == [c.name for c in whole.candidates]
    assert done == list(range(100, 1301, 100))


def test_default_chunk_size_counts_compile_memory_and_the_infinite_horizon_trace(model):
    # Per draw: the pass's peak per draw (caredecide.memory, checked against tracemalloc in
    # tests/test_memory.py) plus the per-cycle results kept; an infinite horizon counts
    # the evaluation's display trace of DISPLAY_CAP + 1 cycles.
    from caredecide.compile import estimate_compiled_bytes
    from caredecide.evaluate import DISPLAY_CAP
    from caredecide.uncertainty.psa import draw_bytes, draw_working_bytes

    n_s, n_a = len(model.states), len(model.actions)
    finite = draw_working_bytes(model)
    assert finite == 8 * (model.n_cycles() + 1) * n_s * (n_a + 14)
    from caredecide import memory

    assert draw_bytes(model) == memory.draw_bytes(memory.shape_of(model)) + finite
    assert draw_bytes(model) > estimate_compiled_bytes(model, 1) + finite
    data = uncertain_model_dict()
    data["settings"].pop("horizon_cycles")
    data["settings"]["horizon"] = "infinite"
    stationary = load_dict(data)
    assert draw_working_bytes(stationary) == 8 * (DISPLAY_CAP + 1) * n_s * (n_a + 14)


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 40), st.integers(1, 30), st.integers(1, 4), st.integers(0, 2**32 - 1))
def test_distinct_rows_equals_numpy_unique_by_rows(n, m, n_actions, seed):
    # The byte-string comparison must give numpy's row-wise result: the same rows in
    # the same (lexicographic) order, inverse and counts (numpy.unique, axis=0).
    from caredecide.uncertainty.psa import distinct_rows

    rows = np.random.default_rng(seed).integers(0, n_actions, (n, m)).astype(np.int8)
    unique, inverse, counts = distinct_rows(rows)
    expected = np.unique(rows, axis=0, return_inverse=True, return_counts=True)
    np.testing.assert_array_equal(unique, expected[0])
    np.testing.assert_array_equal(inverse.ravel(), expected[1].ravel())
    np.testing.assert_array_equal(counts, expected[2])
    np.testing.assert_array_equal(unique[inverse.ravel()], rows)


def test_refuses_draws_whose_results_cannot_fit_in_memory(model, monkeypatch):
    # Results kept per draw: parameters, (cost, QALYs, value) of the optimum and of each
    # candidate, float64, held twice when joined. The check runs before the chunks.
    import caredecide.uncertainty.psa as psa
    from caredecide.errors import ModelTooLargeError

    assert psa.kept_bytes(10, 4, 2) == 2 * 10 * 8 * (4 + 3 + 6)
    assert psa.kept_bytes(10, 4, 2, policy_cells=5) == 2 * 10 * (8 * 13 + 5)
    monkeypatch.setattr(psa, "default_memory_limit", lambda: 1000)
    with pytest.raises(
        ModelTooLargeError,
        match=r"draws = 2,000: the per-draw results would "
        r"need about .* GiB .*expected at most",
    ):
        # The chunks' own budget is given, so only the kept results meet the small limit.
        analyse_uncertainty(
            model, 2000, seed=1, chunk_size=100, n_frequent=0, memory_limit_bytes=10**9
        )


def test_evppi_on_the_first_draws_equals_the_regression_on_them(result):
    # max_draws bounds the regressions: the first 250 of 400 draws, regressed directly
    # (Strong et al. 2014 via voi.evppi_regression), give the same figures.
    from caredecide.uncertainty.voi import evppi_regression

    table = result.evppi(max_draws=250).set_index("parameter")
    assert (table["draws"] == 250).all()
    j = result.parameter_names.index("u_sick")
    direct = evppi_regression(result.candidate_values[:250], result.parameters[:250, j])
    assert table.loc["u_sick", "evppi"] == direct.value
    total = float(evpi(result.candidate_values[:250]))
    assert table.loc["u_sick", "share_of_evpi"] == pytest.approx(direct.value / total)
    assert (result.evppi(max_draws=None)["draws"] == DRAWS).all()
    with pytest.raises(
        RunOptionError,
        match=r"max_draws = 10 is not allowed; expected a whole number >= 200 \(or None",
    ):
        result.evppi(max_draws=10)
