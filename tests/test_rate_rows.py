"""Rate rows: a common exit factored out of each action's generator, checked against
``scipy.linalg.expm`` (a reference library) on random generators and on the demo model.

Sources: ``exp(A + cI) = e^c exp(A)`` because ``cI`` commutes with ``A`` (Moler & Van
Loan 2003, SIAM Rev 45(1):3-49, section 2); the transition matrix of a cycle of ``h``
years is ``expm(h G)`` of the generator ``G`` (rates per year, diagonal = minus the exit
rate), and competing exits from one state give ``r_j / q (1 - exp(-q))`` (Welton & Ades
2005, Med Decis Making 25(6):633-645).
"""

from __future__ import annotations

from contextlib import contextmanager
from unittest import mock

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide import rate_rows
from caredecide.rate_rows import common_exits, fill_rate_rows


def _generators(
    exits: np.ndarray, common: np.ndarray, steady: np.ndarray, k: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Rate entries of one action: ``exits`` (S, S) per-draw rates (the same every cycle),
    plus ``common`` (D, Tp) into state ``k`` from every state in ``steady`` (S,) bool.

    Returns (state, target, rates (n, D, Tp), G (D, Tp, S, S)).
    """
    n_draws, tp = common.shape
    n_states = exits.shape[-1]
    state, target = np.nonzero((exits > 0) | (steady[:, None] & (np.arange(n_states) == k)))
    keep = state != target
    state, target = state[keep], target[keep]
    rates = np.empty((state.size, n_draws, tp))
    for n, (i, j) in enumerate(zip(state, target, strict=True)):
        rates[n] = exits[i, j] * (1.0 + np.arange(n_draws))[:, None] / n_draws
        if j == k and steady[i]:
            rates[n] = rates[n] + common
    G = np.zeros((n_draws, tp, n_states, n_states))
    G[:, :, state, target] = np.moveaxis(rates, 0, -1)
    G[..., np.arange(n_states), np.arange(n_states)] = -G.sum(axis=-1)
    return state, target, rates, G


@contextmanager
def _counting_exponentials():
    """Yields a list receiving the number of matrices of each exponential computed."""
    seen: list[int] = []
    exponential = rate_rows._generator_exponential

    def counted(Q, method="pade"):
        seen.append(Q.shape[0])
        return exponential(Q, method)

    with mock.patch.object(rate_rows, "_generator_exponential", counted):
        yield seen


def _filled(state, target, rates, n_states, cycle_years, **options):
    """(D, Tp, S, S) rows from fill_rate_rows (one action) and the matrices exponentiated."""
    n_draws, tp = rates.shape[1:]
    P = np.zeros((n_draws, tp, 1, n_states, n_states))
    P[..., np.arange(n_states), np.arange(n_states)] = 1.0
    with _counting_exponentials() as seen:
        fill_rate_rows(P, np.zeros_like(state), state, target, rates, cycle_years, **options)
    return P[:, :, 0], sum(seen)


@st.composite
def _random_block(draw):
    n_leaving = draw(st.integers(1, 4))
    n_states = n_leaving + 1  # the last state is k, without exits
    rate = st.floats(0.0, 3.0, allow_nan=False)
    exits = np.array(draw(st.lists(rate, min_size=n_states**2, max_size=n_states**2)))
    exits = exits.reshape(n_states, n_states)
    exits[-1] = 0.0  # k has no exits
    exits[exits < 0.3] = 0.0  # sparse patterns as well as dense ones
    n_draws, tp = draw(st.integers(1, 3)), draw(st.integers(2, 4))
    common = np.array(
        draw(st.lists(st.floats(1e-4, 2.0), min_size=n_draws * tp, max_size=n_draws * tp))
    ).reshape(n_draws, tp)
    cycle_years = draw(st.sampled_from([0.25, 1.0, 5.0]))
    return exits, common, cycle_years


@settings(max_examples=60, deadline=None)  # the first call loads compiled loops
@given(_random_block())
def test_factored_rows_match_scipy_expm_on_random_generators(block):
    # Every leaving state also leaves at a cycle-varying rate mu to the one state
    # without exits: one exponential per draw serves every cycle, and each row agrees
    # with scipy.linalg.expm(h G) of the whole generator of that draw and cycle.
    exits, common, cycle_years = block
    n_states = exits.shape[0]
    k = n_states - 1
    steady = np.arange(n_states) != k
    state, target, rates, G = _generators(exits, common, steady, k)
    P, exponentials = _filled(state, target, rates, n_states, cycle_years)
    n_draws, tp = common.shape
    assert exponentials <= n_draws  # not one per draw and cycle
    for d in range(n_draws):
        for t in range(tp):
            expected = scipy.linalg.expm(G[d, t] * cycle_years)
            np.testing.assert_allclose(P[d, t], expected, rtol=0.0, atol=1e-13)
    unfactored, _ = _filled(state, target, rates, n_states, cycle_years, factor=False)
    np.testing.assert_allclose(P, unfactored, rtol=0.0, atol=1e-13)


@settings(max_examples=30, deadline=None)
@given(_random_block(), st.floats(0.05, 2.0))
def test_a_second_state_without_exits_is_not_factored_and_still_exact(block, into_other):
    # A second absorbing target j: the time spent before entering j carries exp(-mu s)
    # inside an integral, so scaling expm(h G0)[i, j] by exp(-mu h) would be wrong; the
    # rows must still equal scipy's (here state 0 also exits to the new last state).
    exits, common, cycle_years = block
    n_states = exits.shape[0] + 1
    wide = np.zeros((n_states, n_states))
    wide[:-1, :-1] = exits
    wide[0, -1] = into_other
    k = n_states - 2
    steady = np.arange(n_states) < k
    state, target, rates, G = _generators(wide, common, steady, k)
    assert common_exits(np.zeros_like(state), state, target) == []
    P, _ = _filled(state, target, rates, n_states, cycle_years)
    for d in range(common.shape[0]):
        for t in range(common.shape[1]):
            expected = scipy.linalg.expm(G[d, t] * cycle_years)
            np.testing.assert_allclose(P[d, t], expected, rtol=0.0, atol=1e-13)


def test_scaling_a_second_absorbing_column_would_be_wrong():
    # One state leaving at r = 0.4 to j and mu = 0.1 to k (both without exits): the
    # competing-exits closed form gives P[j] = r / (r + mu) (1 - exp(-(r + mu)))
    # (Welton & Ades 2005), not exp(-mu) (1 - exp(-r)): the reason the factoring needs
    # k to be the only state in play without exits.
    r, mu = 0.4, 0.1
    state, target = np.array([0, 0]), np.array([1, 2])
    rates = np.array([[[r, r]], [[mu, 2 * mu]]])  # (2 entries, 1 draw, 2 cycles)
    assert common_exits(np.zeros(2, dtype=int), state, target) == []
    P, _ = _filled(state, target, rates, 3, 1.0)
    for t, m in enumerate((mu, 2 * mu)):
        competing = r / (r + m) * (1 - np.exp(-(r + m)))
        assert P[0, t, 0, 1] == pytest.approx(competing, rel=1e-14)
        assert abs(competing - np.exp(-m) * (1 - np.exp(-r))) > 1e-3


def test_common_exit_is_found_only_when_every_leaving_state_has_it():
    # Common practice (structure only): states 0 and 1 leave, 2 has no exits.
    action = np.zeros(3, dtype=int)
    found = common_exits(action, np.array([0, 0, 1]), np.array([1, 2, 2]))
    assert [(e.action, e.target, e.entries.tolist()) for e in found] == [(0, 2, [1, 2])]
    # State 0 does not enter 2 directly: no common exit.
    assert common_exits(action[:2], np.array([0, 1]), np.array([1, 2])) == []
    # Two actions: in the first, state 0 does not enter 2; the second has the structure.
    found = common_exits(np.array([0, 0, 1, 1]), np.array([0, 1, 0, 1]), np.array([1, 2, 2, 2]))
    assert [(e.action, e.target) for e in found] == [(1, 2)]


@pytest.fixture(scope="module")
def demo():
    from caredecide.modelfile import load_model
    from synthetic_cohort import demo_model_path

    return load_model(demo_model_path())


def test_demo_compiles_the_same_with_and_without_the_factoring(demo, monkeypatch):
    # The demo's stage 2 and 3 rows leave to dead at the age-dependent background rate:
    # one exponential per draw instead of one per draw and cycle, arrays equal to the
    # unfactored path and to the first (uniformization, whole matrices) path within
    # round-off.
    import caredecide.compile as compile_module
    from caredecide.compile import compile_model
    from caredecide.uncertainty.sampling import sample_parameters

    sets = sample_parameters(demo, 200, 7)
    with _counting_exponentials() as sizes:
        factored = compile_model(demo, sets)
    assert sizes == [200]  # 45 cycles each, one exponential per draw
    monkeypatch.setitem(compile_module._RATE_ROWS, "factor", False)
    unfactored = compile_model(demo, sets)
    for name in ("transition", "state_qaly", "state_cost", "decision_qaly", "decision_cost"):
        np.testing.assert_allclose(
            getattr(factored, name), getattr(unfactored, name), rtol=0.0, atol=1e-13
        )
    monkeypatch.setitem(compile_module._RATE_ROWS, "deduplicate", False)
    monkeypatch.setitem(compile_module._RATE_ROWS, "method", "uniformization")
    first = compile_model(demo, sets)
    np.testing.assert_allclose(factored.transition, first.transition, rtol=0.0, atol=1e-12)
    # The rows stay probabilities: in [0, 1], summing to 1.
    assert factored.transition.min() >= 0.0 and factored.transition.max() <= 1.0
    np.testing.assert_allclose(factored.transition.sum(axis=-1), 1.0, rtol=0.0, atol=1e-14)
