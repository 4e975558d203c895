"""Transitions that vary with the cycle, compiled straight into sparse rows.

A large model with age-dependent rates is compiled into :class:`caredecide.compiled.
SparseTransitions` (one pattern per action for every draw and cycle, values per draw and
cycle), solved by backward induction and evaluated (cohort trace, totals) on those rows,
never building the dense (D, T, A, S, S) array. Checked against:

* the dense compiler, solver and evaluation on models small enough for both (common
  practice: a change of storage never changes the answer beyond rounding);
* an independent plain-numpy backward induction written here, the Bellman recursion
  ``V_t(s) = max_a [r_t(s, a) + sum_s' P_t(s'|s, a) V_{t+1}(s')]`` from the last cycle
  back (Puterman 1994, Markov Decision Processes, Wiley, chapter 4: finite-horizon
  backward induction).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide import memory
from caredecide.chunks import join_compiled
from caredecide.compile import compile_model
from caredecide.compiled import SparseTransitions, sparse_stand_in
from caredecide.errors import CompiledModelError, ModelError, RunOptionError
from caredecide.evaluate import evaluate_policies, evaluate_policy, policy_totals
from caredecide.modelfile import load_model, loads_model
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from caredecide.solvers.bellman import kernel_arrays, transition_at
from synthetic_cohort import MODELS_DIR
from tests.memory_models import grid_model_text
from tests.test_kernels import _numpy_path
from tests.test_solvers_models import make_compiled
from tests.test_sparse_solver import _finite_sparse_model


def as_sparse(compiled):
    """The same compiled model with its transitions in sparse rows: the pattern is every
    cell non-zero in some draw or cycle, plus the diagonal."""
    P = compiled.transition
    D, Tp, A, S, _ = P.shape
    cells = (P != 0).any(axis=(0, 1)) | np.eye(S, dtype=bool)  # (A, S, S)
    rows, columns = np.nonzero(cells.reshape(A * S, S))
    indptr = np.searchsorted(rows, np.arange(A * S + 1))
    values = P.reshape(D, Tp, A * S, S)[:, :, rows, columns]
    held = SparseTransitions(indptr.astype(np.int64), columns.astype(np.int64), values, S)
    return replace(compiled, transition=sparse_stand_in(P.shape), sparse_transition=held)


def random_model(seed, S, A, T, D, moves=False):
    """A progressive model with transitions per cycle (tests/test_sparse_solver.py's):
    rewards of every kind, trapezoid weights (rewards on arrival too), unequal rates."""
    return _finite_sparse_model(S, T, D=D, A=A, time_varying=True, seed=seed, moves=moves)


OBJECTIVE = Objective("net_benefit", 25_000.0)


def _agree(dense_result, sparse_result):
    assert np.array_equal(dense_result.policy, sparse_result.policy)
    scale = np.abs(dense_result.value).max()
    np.testing.assert_allclose(sparse_result.value, dense_result.value, rtol=0, atol=1e-10 * scale)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    S=st.integers(3, 12),
    A=st.integers(2, 3),
    T=st.integers(1, 9),
    D=st.integers(1, 3),
    moves=st.booleans(),
    kernels_on=st.booleans(),
)
def test_sparse_rows_solve_and_evaluate_as_dense(seed, S, A, T, D, moves, kernels_on):
    # Property (common practice: a storage change never changes the answer beyond
    # rounding): on random cycle-varying models, the sparse rows give the dense solver's
    # policies exactly, its values and totals to 1e-10 relative, and the same trace.
    dense = random_model(seed, S, A, T, D, moves=moves)
    sparse = as_sparse(dense)
    assert sparse.transition_form == "sparse" and dense.transition_form == "dense"

    def call(function, *args, **kwargs):
        return function(*args, **kwargs) if kernels_on else _numpy_path(function, *args, **kwargs)

    by_dense = solve(dense, OBJECTIVE, transition_form="dense")
    by_sparse = call(solve, sparse, OBJECTIVE)
    assert by_sparse.transition_form == "sparse"
    _agree(by_dense, by_sparse)
    np.testing.assert_allclose(by_sparse.q_values, by_dense.q_values, rtol=1e-10, atol=1e-9)
    expected = evaluate_policy(dense, by_dense.policy, OBJECTIVE, transition_form="dense")
    outcome = call(evaluate_policy, sparse, by_sparse.policy, OBJECTIVE)
    np.testing.assert_allclose(outcome.trace, expected.trace, rtol=0, atol=1e-12)
    for name in ("life_years", "qalys", "costs", "costs_undiscounted", "value"):
        np.testing.assert_allclose(getattr(outcome, name), getattr(expected, name), rtol=1e-10)


def _plain_backward_induction(P, reward, terminal):
    """Bellman recursion from the last cycle back (Puterman 1994, ch. 4), plain numpy.

    P (T, A, S, S), reward (T, S, A) in present value, terminal (S,). Returns the policy
    (T, S) (first best action) and values (T + 1, S).
    """
    T, S = P.shape[0], P.shape[2]
    value = np.zeros((T + 1, S))
    value[T] = terminal
    policy = np.zeros((T, S), dtype=int)
    for t in range(T - 1, -1, -1):
        Q = reward[t] + np.einsum("ask,k->sa", P[t], value[t + 1])
        policy[t] = Q.argmax(axis=1)
        value[t] = Q.max(axis=1)
    return policy, value


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_sparse_backward_induction_equals_a_plain_bellman_recursion(seed):
    # Start-of-cycle rewards (QALYs per cycle, a one-off QALY loss of the second action),
    # one discount rate, no moves: the recursion of Puterman 1994, ch. 4, written here
    # with the discount factor folded into present-value rewards (common practice).
    rng = np.random.default_rng(seed)
    S, A, T = 40, 2, 15
    P = np.zeros((T, A, S, S))
    live = np.arange(S - 1)
    P[:, :, live, live] = rng.uniform(0.5, 1.0, (T, A, S - 1))
    P[:, :, live, np.minimum(live + 1, S - 2)] += rng.uniform(0.0, 0.5, (T, A, S - 1))
    P[:, :, live, S - 1] = np.linspace(0.01, 0.2, T)[:, None, None]  # age-dependent death
    P[:, :, S - 1, S - 1] = 1.0
    P /= P.sum(-1, keepdims=True)
    u = np.linspace(1.0, 0.3, S)
    u[-1] = 0.0
    loss = np.zeros((S, A))
    loss[:-1, 1] = -rng.uniform(0.0, 0.4, S - 1)
    compiled = make_compiled(
        P, state_qaly=u, decision_qaly=loss, n_cycles=T, discount_outcomes=0.03,
        discount_costs=0.03, start_distribution=np.eye(S)[0],
    )  # fmt: skip
    result = solve(as_sparse(compiled), Objective("qalys"))
    d = 1.03**-1.0
    reward = (d ** np.arange(T))[:, None, None] * (u[:, None] + loss)[None]  # (T, S, A)
    policy, value = _plain_backward_induction(P, reward, np.zeros(S))
    decisions = ~compiled.absorbing
    assert np.array_equal(result.policy[0][:, decisions], policy[:, decisions])
    np.testing.assert_allclose(result.value[0], value, rtol=1e-10)


def _grid(n_states, horizon, **kind):
    return loads_model(
        grid_model_text(n_states, 2, horizon, **kind), file="grid.toml", validate=False
    )


@pytest.mark.parametrize("rates", [False, True])
def test_compiled_sparse_rows_equal_the_dense_array(rates):
    # Probabilities with remainders, and rows given by rates (each action's generator
    # exponentiated over the states in play), per draw and age-dependent cycle.
    model = _grid(25, 9, timed=True, rates=rates)
    draws = {"p_prog": np.linspace(0.05, 0.15, 3), "r_prog": np.linspace(0.05, 0.2, 3)}
    dense = compile_model(model, draws, transition_form="dense")
    sparse = compile_model(model, draws, transition_form="sparse")
    assert sparse.transition_form == "sparse"
    assert sparse.sparse_transition is not None
    assert sparse.sparse_transition.values.shape[:2] == (3, 9)
    np.testing.assert_array_equal(sparse.sparse_transition.to_dense(), dense.transition)


@pytest.mark.parametrize(
    "name",
    ["demo_progressive.toml", "demo_years_since_progression.toml", "lesion_surveillance.toml"],
)
def test_bundled_models_compile_to_the_same_rows_and_answers(name):
    # Decision-time moves, tunnel states, attributes: the sparse rows hold the dense
    # array's numbers, and the base case solves and evaluates to the same figures.
    from caredecide.uncertainty.sampling import ParameterSampler

    model = load_model(MODELS_DIR / name)
    sampler = ParameterSampler.from_model(model)
    values = sampler.draw(1, 0, 3)
    sets = {n: values[:, j] for j, n in enumerate(sampler.names)}
    dense = compile_model(model, sets, transition_form="dense")
    sparse = compile_model(model, sets, transition_form="sparse")
    assert sparse.sparse_transition is not None
    np.testing.assert_array_equal(sparse.sparse_transition.to_dense(), dense.transition)
    objective = Objective.from_settings(model.settings)
    by_dense, by_sparse = solve(dense, objective), solve(sparse, objective)
    _agree(by_dense, by_sparse)
    outcomes = evaluate_policies(sparse, [by_sparse.policy, 0], objective)
    expected = evaluate_policies(dense, [by_dense.policy, 0], objective)
    totals = policy_totals(sparse, [by_sparse.policy, 0], objective)
    for got, want, total in zip(outcomes, expected, totals, strict=True):
        np.testing.assert_allclose(got.trace, want.trace, rtol=0, atol=1e-12)
        np.testing.assert_allclose(got.value, want.value, rtol=1e-10)
        np.testing.assert_allclose(total.value, want.value, rtol=1e-10)


def test_auto_picks_sparse_rows_for_a_large_age_dependent_model():
    # 400 states, 3 non-zeros per row: 0.75% of the cells; transitions change with age.
    big = compile_model(_grid(400, 6, timed=True))
    assert big.transition_form == "sparse"
    assert big.transition.strides == (0,) * 5  # the stand-in holds no memory
    assert memory.shape_of(_grid(400, 6, timed=True)).sparse_entries == 2 * (398 * 3 + 3)
    # Small, constant over the cycles, or dense rows (rates over the whole chain): dense.
    assert compile_model(_grid(40, 6, timed=True)).transition_form == "dense"
    assert compile_model(_grid(400, 6)).transition_form == "dense"
    assert compile_model(_grid(400, 4, timed=True, rates=True)).transition_form == "dense"


def test_auto_picks_sparse_rows_when_the_dense_array_does_not_fit():
    model = _grid(60, 30, timed=True)  # small: "auto" alone would keep it dense
    dense = memory.pipeline_peak_bytes(memory.shape_of(model, transition_form="dense"))
    sparse = memory.pipeline_peak_bytes(memory.shape_of(model, transition_form="sparse"))
    limit = (dense + sparse) // 2
    assert compile_model(model, memory_limit_bytes=limit).transition_form == "sparse"
    assert compile_model(model, memory_limit_bytes=2 * dense).transition_form == "dense"


def test_sparse_rows_split_and_join_by_draws():
    model = _grid(20, 5, timed=True)
    draws = {"p_prog": np.linspace(0.05, 0.15, 4)}
    whole = compile_model(model, draws, transition_form="sparse")
    pieces = [whole.take_draws(slice(0, 1)), whole.take_draws(np.array([1, 2, 3]))]
    assert pieces[1].transition.strides == (0,) * 5
    joined = join_compiled(pieces)
    assert joined.sparse_transition is not None
    np.testing.assert_array_equal(joined.sparse_transition.values, whole.sparse_transition.values)
    with pytest.raises(CompiledModelError, match="different forms or sparse patterns"):
        join_compiled([pieces[0], compile_model(model, transition_form="dense")])


def test_dense_consumers_refuse_sparse_rows_by_name():
    sparse = compile_model(_grid(20, 5, timed=True), transition_form="sparse")
    for call in (lambda: kernel_arrays(sparse), lambda: transition_at(sparse, 0)):
        with pytest.raises(CompiledModelError, match="holds its transitions in sparse rows"):
            call()
    with pytest.raises(SolverError, match="transition_form = 'dense' is not available"):
        solve(sparse, OBJECTIVE, transition_form="dense")


def test_sparse_rows_are_checked_like_the_dense_array():
    sparse = compile_model(_grid(20, 5, timed=True), transition_form="sparse")
    held = sparse.sparse_transition
    values = held.values.copy()
    values[0, 3, held.indptr[4]] += 0.01  # row of state s4 under a0, cycle 3
    with pytest.raises(
        CompiledModelError, match=r"state 's4' under action 'a0' \(draw 0, cycle 3\)"
    ):
        replace(sparse, sparse_transition=replace(held, values=values))
    with pytest.raises(CompiledModelError, match="sparse_transition has indptr"):
        replace(sparse, sparse_transition=replace(held, indptr=held.indptr[:-1]))


def test_compile_refuses_sparse_rows_it_cannot_build():
    with pytest.raises(ModelError, match="not available for an infinite horizon"):
        compile_model(_grid(10, None), transition_form="sparse")
    with pytest.raises(RunOptionError, match="transition_form"):
        compile_model(_grid(10, 5), transition_form="thin")


def test_sparse_rows_report_the_row_a_bad_draw_breaks():
    # The compiler's checks and messages are those of the dense path.
    model = _grid(20, 5, timed=True)
    with pytest.raises(ModelError) as dense_error:
        compile_model(model, {"p_prog": np.array([0.1, 1.5])}, transition_form="dense")
    with pytest.raises(ModelError) as sparse_error:
        compile_model(model, {"p_prog": np.array([0.1, 1.5])}, transition_form="sparse")
    assert str(sparse_error.value) == str(dense_error.value)
    assert "draw 1" in str(sparse_error.value)


def test_chunks_are_sized_for_the_form_they_are_compiled_in():
    # A large age-dependent model compiles to sparse rows under "auto": its chunks may hold
    # many more draws than those of a job that needs the dense array (cell scaling).
    from caredecide.chunks import chunk_size_for

    model = _grid(400, 6, timed=True)
    limit = 64 * 1024**2
    sparse = chunk_size_for(model, 1000, limit)
    dense = chunk_size_for(model, 1000, limit, transition_form="dense")
    per_draw = memory.draw_bytes(memory.shape_of(model, transition_form="dense"))
    assert dense < sparse and dense <= max(1, limit // per_draw)


def test_rate_rows_inside_a_tunnel_stay_dense():
    # Rows given by rates inside a tunnel move their stay one step on after the
    # exponential (expand.apply_rate_row_clock, on the dense array): "auto" keeps such a
    # model dense, "sparse" is refused by name.
    from tests.test_expand_rates import _text

    model = loads_model(_text(), file="tunnel_rates.toml")
    assert model.tunnels and compile_model(model).transition_form == "dense"
    with pytest.raises(ModelError, match="not available for rate rows inside tunnels"):
        compile_model(model, transition_form="sparse")
