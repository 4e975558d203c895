"""Conversions of published estimates, checked against published values and formulas."""

from __future__ import annotations

import re

import numpy as np
import pytest
import scipy.linalg
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from caredecide.conversions import (
    chance_for_period,
    chance_within,
    generator_to_transition,
    rate_behind,
    rate_behind_median,
    rate_behind_survival,
    rates_to_generator,
    times_relative_risk,
    with_hazard_ratio,
    with_odds_ratio,
    with_relative_risk,
)
from caredecide.errors import ModelError

# Published values are given to 7 significant decimals: compare to half a unit of the last one.
PUBLISHED_7 = 5e-8
PUBLISHED_6 = 5e-7

probabilities = st.floats(0.0, 0.999, allow_nan=False)
rates = st.floats(0.0, 20.0, allow_nan=False)
periods = st.floats(0.01, 50.0, allow_nan=False)
ratios = st.floats(0.0, 10.0, allow_nan=False)


# ------------------------------------------------------------------ rates and probabilities
def test_chance_within_published_value():
    # Source: Fleurence & Hollenbeak 2007, PharmacoEconomics 25(1):3-6: r = 0.1/yr -> p = 0.0951626.
    assert chance_within(0.1) == pytest.approx(0.0951626, abs=PUBLISHED_7)
    # The same over a 2-year period at half the rate.
    assert chance_within(0.05, years=2.0) == pytest.approx(0.0951626, abs=PUBLISHED_7)


def test_rate_behind_published_value():
    # Source: Fleurence & Hollenbeak 2007: annual p = 0.2 -> r = 0.2231436 per year.
    assert rate_behind(0.2) == pytest.approx(0.2231436, abs=PUBLISHED_7)
    # A 6-month probability of 0.2 is twice the rate per year.
    assert rate_behind(0.2, years=0.5) == pytest.approx(2 * 0.2231436, abs=2 * PUBLISHED_7)


def test_chance_for_period_published_values():
    # Source: Fleurence & Hollenbeak 2007; Miller & Homan 1994, Med Decis Making 14:52-58:
    # annual p = 0.2 -> monthly p = 0.0184235; 5-year p = 0.5 -> annual p = 0.1294494.
    assert chance_for_period(0.2, 1.0, 1.0 / 12.0) == pytest.approx(0.0184235, abs=PUBLISHED_7)
    assert chance_for_period(0.5, 5.0, 1.0) == pytest.approx(0.1294494, abs=PUBLISHED_7)


def test_conversions_broadcast_over_arrays():
    # Source: Fleurence & Hollenbeak 2007 (values above), evaluated as one array of draws.
    draws = np.array([[0.1], [0.2231436]])
    result = chance_within(draws, years=np.array([1.0, 2.0]))
    assert result.shape == (2, 2)
    np.testing.assert_allclose(result[:, 0], [0.0951626, 0.2], atol=PUBLISHED_7)


@settings(deadline=None)
@given(rate=rates, years=periods)
def test_rate_probability_round_trip(rate, years):
    # Inverse functions by construction (common practice). Beyond r t = 15 the probability
    # is within 3e-7 of 1 and -ln(1 - p) is ill-conditioned in floating point.
    assume(rate * years <= 15.0)
    p = chance_within(rate, years)
    assert rate_behind(p, years) == pytest.approx(rate, rel=1e-7, abs=1e-12)


@settings(deadline=None)
@given(p=probabilities, a=periods, b=periods, c=periods)
def test_rescale_composes(p, a, b, c):
    # A constant rate makes rescaling transitive: a -> b -> c equals a -> c (common practice).
    # Skip intermediates that round to 1 (they lose p in floating point).
    assume(1.0 - chance_for_period(p, a, b) > 1e-6)
    direct = chance_for_period(p, a, c)
    via = chance_for_period(chance_for_period(p, a, b), b, c)
    assert via == pytest.approx(direct, rel=1e-9, abs=1e-12)


# ------------------------------------------------------------------------ relative effects
def test_relative_risk_on_the_rate_and_on_the_probability():
    # Source: Fleurence & Hollenbeak 2007: p = 0.3, RR = 0.5 -> 0.1633400 applied to the
    # rate, 0.3 x 0.5 = 0.15 applied to the probability.
    assert with_relative_risk(0.3, 0.5) == pytest.approx(0.1633400, abs=PUBLISHED_7)
    assert times_relative_risk(0.3, 0.5) == pytest.approx(0.15, abs=1e-15)
    assert with_relative_risk(0.3, 0.5) != pytest.approx(0.15, abs=1e-3)
    # Same for a hazard ratio (constant hazards).
    assert with_hazard_ratio(0.3, 0.5) == pytest.approx(0.1633400, abs=PUBLISHED_7)


def test_relative_risk_above_one_stays_a_probability():
    # Multiplying p = 0.6 by RR = 2 would give 1.2; on the rate scale 1 - 0.4^2 = 0.84
    # (hand arithmetic; Fleurence & Hollenbeak 2007 rule).
    assert with_relative_risk(0.6, 2.0) == pytest.approx(0.84, abs=1e-15)


def test_probability_scale_relative_risk_hand_values():
    # Hand arithmetic (p * RR): 0.02 x 0.75 = 0.015; 0.4 x 2.5 = 1.0 is still a probability.
    np.testing.assert_allclose(
        times_relative_risk(np.array([0.02, 0.4]), np.array([0.75, 2.5])), [0.015, 1.0], rtol=1e-15
    )


@settings(deadline=None)
@given(p=st.floats(0.0, 0.2), ratio=st.floats(0.0, 2.0))
def test_both_scales_agree_for_small_probabilities(p, ratio):
    # 1 - (1 - p)^RR = RR p + O(p^2): the difference is at most RR |RR - 1| p^2 / 2 (1 - p)^(RR-2)
    # by Taylor's theorem (common practice); bounded here by RR |RR - 1| p^2 / (1 - p)^2.
    difference = abs(with_relative_risk(p, ratio) - times_relative_risk(p, ratio))
    assert difference <= ratio * abs(ratio - 1.0) * p**2 / (1.0 - p) ** 2 + 1e-15


def test_error_probability_scale_product_above_one():
    with raises(
        "times_relative_risk(p, rr)", "p * rr = 1.2", "p = 0.6", "rr = 2.0", "with_relative_risk"
    ):
        times_relative_risk(np.array([0.1, 0.6]), 2.0)
    with raises("times_relative_risk(rr)", "got -0.5"):
        times_relative_risk(0.3, -0.5)
    with raises("times_relative_risk(p)", "got 1.5"):
        times_relative_risk(1.5, 0.5)


@settings(deadline=None)
@given(p=probabilities, ratio=ratios, years=periods)
def test_hazard_ratio_is_relative_risk_and_period_free(p, ratio, years):
    # One rule for both; the period cancels (rate r = -ln(1-p)/t scaled then converted back).
    expected = with_relative_risk(p, ratio)
    assert with_hazard_ratio(p, ratio, years) == expected
    assert with_relative_risk(p, ratio, years) == expected
    # Equals going through the rate explicitly.
    if p < 0.999:
        via_rate = chance_within(ratio * rate_behind(p, years), years)
        assert expected == pytest.approx(via_rate, rel=1e-9, abs=1e-12)


def test_odds_ratio_published_formula():
    # Source: Zhang & Yu 1998, JAMA 280(19):1690-1691 (from memory): RR = OR / (1 - p0 + p0 OR).
    # p0 = 0.2, OR = 2: odds 0.25 x 2 = 0.5 -> p = 0.5 / 1.5 = 1/3 (hand arithmetic).
    assert with_odds_ratio(0.2, 2.0) == pytest.approx(1.0 / 3.0, abs=1e-15)
    p0, odds_ratio = 0.35, 0.7
    rr = odds_ratio / (1.0 - p0 + p0 * odds_ratio)
    assert with_odds_ratio(p0, odds_ratio) == pytest.approx(rr * p0, rel=1e-14)


@settings(deadline=None)
@given(p=st.floats(0.001, 0.999), odds_ratio=st.floats(0.01, 100.0))
def test_odds_ratio_multiplies_the_odds(p, odds_ratio):
    # Definition of the odds ratio (common practice).
    q = with_odds_ratio(p, odds_ratio)
    assert 0.0 <= q <= 1.0
    assert q / (1.0 - q) == pytest.approx(odds_ratio * p / (1.0 - p), rel=1e-9)


# --------------------------------------------------------------------------------- survival
def test_rate_behind_survival_and_median_deale():
    # Source: Beck, Kassirer & Pauker 1982, Am J Med 73(6):883-888 (DEALE): 5-year survival
    # 0.5 -> mu = 0.138629/yr -> life expectancy 1/mu = 7.213475 y.
    mu = rate_behind_survival(0.5, 5.0)
    assert mu == pytest.approx(0.138629, abs=PUBLISHED_6)
    assert 1.0 / mu == pytest.approx(7.213475, abs=PUBLISHED_6)
    # A median survival of 5 years is the same statement: ln 2 / 5.
    assert rate_behind_median(5.0) == pytest.approx(mu, rel=1e-15)


def test_deale_rates_add_through_the_generator():
    # Source: Beck, Kassirer & Pauker 1982: population LE 17 y plus an excess rate 0.1/yr
    # -> LE = 1 / (1/17 + 0.1) = 6.296296 y. Built as one alive state with two exits; the
    # expected time in the alive state is the first entry of (-G_alive,alive)^-1 1.
    rates = np.zeros((3, 3))
    rates[0, 1] = 1.0 / 17.0
    rates[0, 2] = 0.1
    G = rates_to_generator(rates)
    life_expectancy = np.linalg.solve(-G[:1, :1], np.ones(1))[0]
    assert life_expectancy == pytest.approx(6.296296, abs=PUBLISHED_6)


# -------------------------------------------------------------------------- competing risks
def two_exit_generator(a: float, b: float) -> np.ndarray:
    rates = np.zeros((3, 3))
    rates[0, 1], rates[0, 2] = a, b
    return rates_to_generator(rates)


def test_two_exits_published_values():
    # Source: Welton & Ades 2005, Med Decis Making 25(6):633-645; Jones, Epstein &
    # Garcia-Mochon 2017, Med Decis Making 37(7):779-789: a = 0.1, b = 0.05, t = 1 ->
    # stay 0.860708, exit-a 0.092861, exit-b 0.046431.
    P = generator_to_transition(two_exit_generator(0.1, 0.05), 1.0)
    np.testing.assert_allclose(P[0], [0.860708, 0.092861, 0.046431], atol=PUBLISHED_6)
    np.testing.assert_allclose(P[1:], np.eye(3)[1:], atol=1e-15)


@given(a=st.floats(0.0, 5.0), b=st.floats(0.0, 5.0), years=st.floats(0.05, 10.0))
@settings(max_examples=50, deadline=None)
def test_two_exits_closed_form(a, b, years):
    # Source: Welton & Ades 2005 closed form: P_j = r_j / (a + b) (1 - exp(-(a + b) t)).
    P = generator_to_transition(two_exit_generator(a, b), years)
    total = a + b
    leave = -np.expm1(-total * years)
    expected = [1.0 - leave] + ([a / total * leave, b / total * leave] if total else [0.0, 0.0])
    np.testing.assert_allclose(P[0], expected, atol=1e-12)


def test_progressive_three_states_published_values():
    # Source: Welton & Ades 2005; Jones et al. 2017: 1->2->3 with l12 = 0.1, l13 = 0.05,
    # l23 = 0.2: row 1 = 0.860708 / 0.083954 / 0.055338; row 2 = 0.818731 / 0.181269.
    rates = np.array([[0.0, 0.1, 0.05], [0.0, 0.0, 0.2], [0.0, 0.0, 0.0]])
    P = generator_to_transition(rates_to_generator(rates), 1.0)
    np.testing.assert_allclose(P[0], [0.860708, 0.083954, 0.055338], atol=PUBLISHED_6)
    np.testing.assert_allclose(P[1], [0.0, 0.818731, 0.181269], atol=PUBLISHED_6)
    np.testing.assert_allclose(P[2], [0.0, 0.0, 1.0], atol=1e-15)


def test_converting_each_exit_separately_is_wrong():
    # Source: Gidwani & Russell 2020, PharmacoEconomics (doi 10.1007/s40273-020-00937-z):
    # with two exits, converting each rate on its own gives exits 0.0951626 and 0.0487706
    # and a stay of 0.8560668, against 0.860708 with the generator (Welton & Ades 2005).
    separately = chance_within(np.array([0.1, 0.05]))
    stay_separately = 1.0 - separately.sum()
    P = generator_to_transition(two_exit_generator(0.1, 0.05), 1.0)
    assert stay_separately == pytest.approx(0.8560668, abs=PUBLISHED_7)
    assert P[0, 0] - stay_separately == pytest.approx(0.860708 - 0.8560668, abs=PUBLISHED_6)
    assert abs(P[0, 1] - separately[0]) > 2e-3
    assert abs(P[0, 2] - separately[1]) > 2e-3


def test_one_exit_matches_chance_within():
    # A single exit has no competition: expm reduces to p = 1 - exp(-r t) (Fleurence &
    # Hollenbeak 2007).
    G = rates_to_generator(np.array([[0.0, 0.3], [0.0, 0.0]]))
    P = generator_to_transition(G, 2.5)
    assert P[0, 1] == pytest.approx(chance_within(0.3, 2.5), abs=1e-15)


def random_generators(draw_rates: np.ndarray) -> np.ndarray:
    s = draw_rates.shape[-1]
    return rates_to_generator(draw_rates * ~np.eye(s, dtype=bool))


@given(
    arrays(np.float64, (3, 4, 4), elements=st.floats(0.0, 3.0)),
    st.floats(0.05, 3.0),
    st.floats(0.05, 3.0),
)
@settings(max_examples=40, deadline=None)
def test_generator_transition_is_stochastic_and_semigroup(raw, s, t):
    G = random_generators(raw)
    P_s = generator_to_transition(G, s)
    P_t = generator_to_transition(G, t)
    P_st = generator_to_transition(G, s + t)
    # Rows of a transition matrix are probability distributions (common practice).
    assert (P_s >= 0).all() and (P_s <= 1).all()
    np.testing.assert_allclose(P_s.sum(axis=-1), 1.0, atol=1e-12)
    # Chapman-Kolmogorov: P(s + t) = P(s) P(t) for a time-homogeneous chain (common practice).
    np.testing.assert_allclose(P_s @ P_t, P_st, atol=1e-10)


def test_batched_generators_match_one_at_a_time():
    # scipy.linalg.expm per matrix is the reference for the stacked call.
    rng = np.random.default_rng(20261202)
    G = random_generators(rng.uniform(0.0, 1.0, size=(2, 3, 5, 5)))
    P = generator_to_transition(G, np.array([[0.5], [2.0]]))
    for index in np.ndindex(2, 3):
        years = 0.5 if index[0] == 0 else 2.0
        np.testing.assert_allclose(P[index], scipy.linalg.expm(G[index] * years), atol=1e-14)


@pytest.mark.parametrize("largest_rate", [1e-9, 0.5, 5.0, 1e3])
def test_matches_scipy_expm_from_slow_to_stiff(largest_rate):
    # Reference library: scipy.linalg.expm (Pade scaling and squaring). Our uniformized
    # series loses about 2^s eps in the squarings, s = log2(2 x largest rate x years).
    rng = np.random.default_rng(int(largest_rate * 1e9) % 2**32)
    raw = rng.uniform(0.0, largest_rate, size=(50, 6, 6)) * (rng.uniform(size=(50, 6, 6)) < 0.6)
    G = random_generators(raw)
    P = generator_to_transition(G, 1.0)
    tolerance = 1e-15 * max(1.0, 4.0 * largest_rate)
    np.testing.assert_allclose(P, scipy.linalg.expm(G), rtol=0.0, atol=tolerance)


def test_mild_matrix_unaffected_by_a_stiff_neighbour():
    # The batch shares one number of squarings; a mild matrix next to a stiff one still
    # matches scipy.linalg.expm.
    mild = two_exit_generator(0.1, 0.05)
    stiff = two_exit_generator(500.0, 300.0)
    P = generator_to_transition(np.stack([mild, stiff]), 1.0)
    np.testing.assert_allclose(P[0], scipy.linalg.expm(mild), atol=1e-13)
    np.testing.assert_allclose(P[1], scipy.linalg.expm(stiff), atol=1e-13)


def test_no_exits_gives_identity():
    np.testing.assert_array_equal(
        generator_to_transition(np.zeros((2, 3, 3)), 5.0), [np.eye(3)] * 2
    )


def test_rates_to_generator_rows_sum_to_zero():
    rates = np.array([[[0.0, 0.2, 0.1], [0.4, 0.0, 0.0], [0.0, 0.0, 0.0]]])
    G = rates_to_generator(rates)
    assert G.shape == (1, 3, 3)
    np.testing.assert_allclose(np.diagonal(G, axis1=-2, axis2=-1), [[-0.3, -0.4, 0.0]])
    np.testing.assert_allclose(G.sum(axis=-1), 0.0, atol=1e-15)
    assert rates[0, 0, 0] == 0.0  # the input is not modified


# ---------------------------------------------------------------------------------- errors
def raises(*words: str):
    return pytest.raises(ModelError, match=".*".join(re.escape(w) for w in words))


def test_error_negative_rate():
    with raises("chance_within(rate)", "[0, inf)", "got -0.1 at index (1,)"):
        chance_within([0.2, -0.1])


def test_error_rate_not_finite():
    with raises("chance_within(rate)", "got nan"):
        chance_within(float("nan"))


def test_error_rate_not_a_number():
    with raises("chance_within(rate)", "expected a number", "'fast'"):
        chance_within("fast")


def test_error_years_not_positive():
    with raises("chance_within(years)", "(0, inf)", "got 0.0"):
        chance_within(0.1, years=0.0)


def test_error_probability_of_one_has_no_rate():
    with raises("rate_behind(p)", "[0, 1)", "got 1.0"):
        rate_behind(1.0)


def test_error_probability_out_of_range():
    with raises("rate_behind(p)", "got 1.5"):
        rate_behind(1.5)
    with raises("chance_for_period(p)", "[0, 1]", "got -0.2"):
        chance_for_period(-0.2, 1.0, 2.0)


def test_error_rescale_periods():
    with raises("chance_for_period(from_years)", "got 0.0"):
        chance_for_period(0.2, 0.0, 1.0)
    with raises("chance_for_period(to_years)", "got -1.0"):
        chance_for_period(0.2, 1.0, -1.0)


def test_error_relative_risk_negative():
    with raises("with_relative_risk(rr)", "ratio", "got -0.5"):
        with_relative_risk(0.3, -0.5)


def test_error_relative_risk_probability_and_years():
    with raises("with_relative_risk(p)", "got 2.0"):
        with_relative_risk(2.0, 0.5)
    with raises("with_relative_risk(years)", "got -1.0"):
        with_relative_risk(0.3, 0.5, years=-1.0)


def test_error_hazard_ratio_named():
    with raises("with_hazard_ratio(hazard_ratio)", "got -2.0"):
        with_hazard_ratio(0.3, -2.0)


def test_error_odds_ratio_not_positive():
    with raises("with_odds_ratio(odds_ratio)", "(0, inf)", "got 0.0"):
        with_odds_ratio(0.3, 0.0)
    with raises("with_odds_ratio(p)", "got 1.2"):
        with_odds_ratio(1.2, 2.0)


def test_error_survival_zero():
    with raises("rate_behind_survival(survival)", "(0, 1]", "got 0.0"):
        rate_behind_survival(0.0, 5.0)
    with raises("rate_behind_survival(survival)", "got 1.1"):
        rate_behind_survival(1.1, 5.0)
    with raises("rate_behind_survival(years)", "got 0.0"):
        rate_behind_survival(0.5, 0.0)


def test_error_median_survival_not_positive():
    with raises("rate_behind_median(median_years)", "got -3.0"):
        rate_behind_median(-3.0)


def test_error_generator_not_square():
    with raises("generator_to_transition(G)", "(..., S, S)", "(2, 3)"):
        generator_to_transition(np.zeros((2, 3)))
    with raises("rates_to_generator(rates)", "(..., S, S)", "(3,)"):
        rates_to_generator(np.zeros(3))
    with raises("generator_to_transition(G)", "S >= 1", "(4, 0, 0)"):
        generator_to_transition(np.zeros((4, 0, 0)))


def test_error_generator_negative_off_diagonal_names_row():
    G = np.zeros((2, 3, 3))
    G[1, 2, 0], G[1, 2, 2] = -0.1, 0.1
    with raises("generator_to_transition(G)", "row 2 of matrix (1,)", "state 0", "-0.1"):
        generator_to_transition(G)


def test_error_generator_row_sum_names_row():
    G = np.array([[-0.5, 0.5, 0.0], [0.0, -0.25, 0.5], [0.0, 0.0, 0.0]])
    with raises("generator_to_transition(G)", "row 1 sums to 0.25", "sum to 0"):
        generator_to_transition(G)


def test_error_generator_not_finite():
    G = np.array([[-np.inf, np.inf], [0.0, 0.0]])
    with raises("generator_to_transition(G)", "finite", "got -inf at index (0, 0)"):
        generator_to_transition(G)


def test_error_generator_years():
    with raises("generator_to_transition(years)", "got 0.0"):
        generator_to_transition(np.zeros((2, 2)), 0.0)


def test_error_rates_negative_names_row():
    rates = np.zeros((3, 3))
    rates[1, 0] = -0.2
    with raises("rates_to_generator(rates)", "row 1", "state 0", "-0.2"):
        rates_to_generator(rates)


def test_error_rates_diagonal_not_zero():
    rates = np.zeros((2, 3, 3))
    rates[0, 2, 2] = 0.4
    with raises("rates_to_generator(rates)", "row 2 of matrix (0,)", "diagonal", "0.4"):
        rates_to_generator(rates)


# ------------------------------------------------------- batched exponential: routes and guarantees
def stiff_and_gentle_stack(seed: int, n: int = 300, s: int = 6, density: float = 0.5) -> np.ndarray:
    """Random generators with largest rates from 1e-9 to 1e3 per year in one stack."""
    rng = np.random.default_rng(seed)
    scale = 10.0 ** rng.uniform(-9.0, 3.0, size=n)
    raw = rng.uniform(size=(n, s, s)) * (rng.uniform(size=(n, s, s)) < density)
    return random_generators(raw * scale[:, None, None])


@pytest.mark.parametrize("density", [0.2, 0.5, 0.9])
def test_stiff_and_gentle_stack_matches_scipy_expm(density):
    # Reference library: scipy.linalg.expm, matrix by matrix (Higham 2005 / Al-Mohy &
    # Higham 2009 scaling and squaring). Round-off grows with the squarings, about
    # eps x (largest rate x years) for the stiffest matrices.
    G = stiff_and_gentle_stack(int(density * 100), density=density)
    P = generator_to_transition(G, 1.0)
    reference = np.stack([scipy.linalg.expm(g) for g in G])
    scale = np.maximum(1.0, np.abs(G).max(axis=(-2, -1)))
    error = np.abs(P - reference).max(axis=(-2, -1))
    assert (error <= 1e-15 * 4.0 * scale).all(), error.max()
    # Rows are probability distributions (common practice).
    assert (P >= 0).all() and (P <= 1).all()
    np.testing.assert_allclose(P.sum(axis=-1), 1.0, rtol=0.0, atol=1e-12)


def test_each_matrix_is_independent_of_its_neighbours():
    # Route, degree and squarings are chosen per matrix, so on the same block of states a
    # matrix alone gives the same bits as inside a stack; de-duplication relies on it.
    from caredecide.conversions import _stack_exponential

    G = np.concatenate([stiff_and_gentle_stack(7, n=60), stiff_and_gentle_stack(8, density=0.1)])
    together = _stack_exponential(G)
    alone = np.stack([_stack_exponential(g[None])[0] for g in G])
    np.testing.assert_array_equal(together, alone)


def test_unreachable_states_get_exactly_zero():
    # A state that no chain of rates reaches has probability 0 exactly (common practice:
    # expm(G)[i, j] > 0 iff j is reachable from i). Cyclic 0 <-> 1 with exits to 2, and
    # 3 -> 4 separate: from 0, 1 and 2 the states 3 and 4 are unreachable.
    rates = np.zeros((5, 5))
    rates[0, 1], rates[1, 0], rates[1, 2], rates[3, 4] = 0.7, 0.4, 0.3, 0.2
    P = generator_to_transition(rates_to_generator(rates), 1.0)
    np.testing.assert_array_equal(P[:3, 3:], 0.0)
    np.testing.assert_array_equal(P[2], [0.0, 0.0, 1.0, 0.0, 0.0])
    np.testing.assert_array_equal(P[3:, :3], 0.0)
    np.testing.assert_allclose(P, scipy.linalg.expm(rates_to_generator(rates)), atol=1e-15)


def test_state_without_exits_or_entries_keeps_identity_row_and_column():
    # States outside the rates keep their identity rows exactly (common practice).
    G = two_exit_generator(0.1, 0.05)
    padded = np.zeros((5, 5))
    padded[1:4, 1:4] = G
    P = generator_to_transition(padded, 1.0)
    np.testing.assert_array_equal(P[0], [1.0, 0.0, 0.0, 0.0, 0.0])
    np.testing.assert_array_equal(P[4], [0.0, 0.0, 0.0, 0.0, 1.0])
    np.testing.assert_allclose(P[1:4, 1:4], scipy.linalg.expm(G), atol=1e-16)


@given(
    arrays(np.float64, (4, 5, 5), elements=st.floats(0.0, 50.0)),
    arrays(np.bool_, (4, 5, 5)),
    st.floats(0.05, 5.0),
)
@settings(max_examples=60, deadline=None)
def test_any_generator_gives_a_stochastic_matrix_close_to_scipy(raw, keep, years):
    # Invariants (common practice): entries in [0, 1], rows summing to 1; value against
    # scipy.linalg.expm (reference library), for random sparsity patterns.
    G = random_generators(raw * keep)
    P = generator_to_transition(G, years)
    assert (P >= 0).all() and (P <= 1).all()
    np.testing.assert_allclose(P.sum(axis=-1), 1.0, rtol=0.0, atol=1e-12)
    reference = np.stack([scipy.linalg.expm(g * years) for g in G])
    np.testing.assert_allclose(P, reference, rtol=0.0, atol=1e-13 * max(1.0, 250.0 * years))


def test_one_step_closed_form_matches_scipy_and_published_value():
    # Exits that all end in states without exits take the closed form; Welton & Ades 2005
    # published values (a = 0.1, b = 0.05) and scipy.linalg.expm for a stiff row.
    from caredecide.conversions import _one_step_exponential

    G = np.stack([two_exit_generator(0.1, 0.05), two_exit_generator(600.0, 400.0)])
    P = _one_step_exponential(G)
    np.testing.assert_allclose(P[0, 0], [0.860708, 0.092861, 0.046431], atol=PUBLISHED_6)
    np.testing.assert_allclose(P, np.stack([scipy.linalg.expm(g) for g in G]), atol=1e-15)
    assert P[1, 0, 0] == 0.0 and P[1, 0, 1] == pytest.approx(0.6, rel=1e-15)


def test_pade_matches_the_former_uniformization():
    # The former method (uniformization) stays callable as the benchmark reference;
    # the two agree within round-off on gentle and stiff generators.
    from caredecide.conversions import _generator_exponential

    G = stiff_and_gentle_stack(11)
    np.testing.assert_allclose(
        _generator_exponential(G), _generator_exponential(G, "uniformization"), atol=1e-11
    )


def test_unknown_exponential_method_is_refused():
    from caredecide.conversions import _generator_exponential

    with pytest.raises(ValueError, match=r"'taylor' is unknown.*'pade', 'uniformization'"):
        _generator_exponential(np.zeros((2, 2)), "taylor")


def test_pade_coefficients_follow_the_closed_form():
    # Source: Higham 2005, SIAM J Matrix Anal Appl 26(4):1179-1193 (eq. 2.2); the degree-3
    # and degree-13 coefficients as printed in scipy.sparse.linalg's expm.
    from caredecide.conversions import _pade_coefficients

    np.testing.assert_array_equal(_pade_coefficients(3), [120.0, 60.0, 12.0, 1.0])
    assert _pade_coefficients(13)[0] == 64764752532480000.0
    assert _pade_coefficients(13)[12] == 182.0


def test_a_result_outside_round_off_falls_back_to_uniformization(monkeypatch):
    # With a tolerance no result can meet, every matrix takes the uniformization route,
    # which keeps every term non-negative (common practice: the fallback is exercised).
    from caredecide import conversions

    G = stiff_and_gentle_stack(13, n=40)
    monkeypatch.setattr(conversions, "_PADE_ROUND_OFF", -1.0)
    fallen_back = conversions._pade_exponential(G, np.zeros(G.shape, dtype=bool))
    np.testing.assert_array_equal(fallen_back, conversions._uniformized_exponential(G))
