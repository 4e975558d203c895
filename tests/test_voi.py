"""Tests of EVPI and regression EVPPI.

Sources: EVPI definition, Claxton 1999, J Health Econ 18:341-364 (from memory);
regression EVPPI, Strong, Oakley & Brennan 2014, Med Decis Making 34(3):311-326;
E[max(0, X)] = sigma phi(mu/sigma) + mu Phi(mu/sigma) for X ~ N(mu, sigma^2): the
normal linear loss integral (Raiffa & Schlaifer 1961, Applied Statistical Decision
Theory; from memory), a common textbook result. Draws are synthetic.
"""

from __future__ import annotations

import copy
import pickle

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.stats import norm

from caredecide.errors import ModelError
from caredecide.uncertainty.voi import EVPIResult, bspline_matrix, evpi, evppi_regression


def expected_positive_part(mu: float, sigma: float) -> float:
    """E[max(0, X)], X ~ N(mu, sigma^2): normal linear loss integral (from memory)."""
    return sigma * norm.pdf(mu / sigma) + mu * norm.cdf(mu / sigma)


def test_evpi_two_strategies_by_hand():
    # Source: Claxton 1999 (from memory): EVPI = E[max_k NB] - max_k E[NB].
    nb = np.array([[10.0, 25.0], [20.0, 15.0], [30.0, 35.0], [40.0, 20.0]])
    # Means: strategy 0 (10+20+30+40)/4 = 25, strategy 1 (25+15+35+20)/4 = 23.75 -> k* = 0.
    # Per-draw max: 25, 20, 35, 40 -> mean 120/4 = 30. EVPI = 30 - 25 = 5.
    # Opportunity loss: 15, 0, 5, 0 (mean 5); deviations 10, -5, 0, -5 -> sum sq 150,
    # sample variance 150/3 = 50, SE = sqrt(50)/sqrt(4) = 3.5355339.
    result = evpi(nb)
    assert result == pytest.approx(5.0)
    assert result.standard_error == pytest.approx(np.sqrt(50.0) / 2.0)
    assert result.best_strategy == 0
    np.testing.assert_allclose(result.expected_net_benefit, [25.0, 23.75])
    assert result.per_person
    assert isinstance(result, float) and result.value == 5.0


def test_evpi_scaled_to_population():
    result = evpi([[10.0, 25.0], [20.0, 15.0], [30.0, 35.0], [40.0, 20.0]]).scaled(1000.0)
    assert result == pytest.approx(5000.0)
    assert result.standard_error == pytest.approx(1000.0 * np.sqrt(50.0) / 2.0)
    assert not result.per_person


def test_evpi_result_survives_copy_and_pickle():
    result = evpi([[1.0, 0.0], [0.0, 2.0], [3.0, 1.0]])
    for clone in (copy.deepcopy(result), pickle.loads(pickle.dumps(result))):
        assert clone == result and clone.standard_error == result.standard_error


def test_evpi_normal_closed_form():
    # Two strategies, incremental NB X ~ N(mu, sigma^2):
    # EVPI = E[max(0, X)] - max(0, mu) (normal linear loss integral, from memory).
    rng = np.random.default_rng(20261202)
    mu, sigma, n = 150.0, 1000.0, 200_000
    x = rng.normal(mu, sigma, n)
    result = evpi(np.column_stack([np.zeros(n), x]))
    exact = expected_positive_part(mu, sigma) - max(0.0, mu)
    assert exact == pytest.approx(328.42, abs=0.005)  # the closed form, worked by hand
    assert abs(result - exact) < 4.0 * result.standard_error


def test_evpi_zero_when_one_strategy_always_best():
    rng = np.random.default_rng(1)
    base = rng.normal(size=(100, 1))
    nb = np.hstack([base, base + 1.0, base - 2.0])
    assert evpi(nb) == 0.0


def test_evpi_single_strategy_is_zero():
    assert evpi(np.arange(5.0)[:, None]) == 0.0


_nb = arrays(
    np.float64,
    st.tuples(st.integers(1, 40), st.integers(1, 4)),
    elements=st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False),
)


@settings(max_examples=200, deadline=None)
@given(_nb)
def test_evpi_is_non_negative(nb):
    # Common practice: perfect information cannot be worth less than nothing.
    assert evpi(nb) >= 0.0


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=5), st.integers(1, 50))
def test_evpi_zero_for_identical_draws(row, n):
    # No uncertainty: every draw the same -> EVPI = 0 exactly.
    nb = np.tile(np.array(row), (n, 1))
    assert evpi(nb) == 0.0


@settings(max_examples=100, deadline=None)
@given(_nb, st.floats(-1e5, 1e5, allow_nan=False))
def test_evpi_unchanged_by_a_common_shift_per_draw(nb, shift):
    # Adding the same amount to every strategy in a draw changes no decision (common practice).
    shifts = shift * np.linspace(-1.0, 1.0, nb.shape[0])[:, None]
    assert evpi(nb + shifts) == pytest.approx(evpi(nb), abs=1e-6 * (1 + np.abs(nb).max()))


# --- EVPPI ------------------------------------------------------------------------------


def _linear_gaussian(n: int, seed: int):
    """INB = mu + phi1 + phi2 + noise with independent normal parts (synthetic)."""
    rng = np.random.default_rng(seed)
    mu, s1, s2, s3 = 200.0, 1000.0, 800.0, 600.0
    phi1, phi2 = rng.normal(0.0, s1, n), rng.normal(0.0, s2, n)
    inb = mu + phi1 + phi2 + rng.normal(0.0, s3, n)
    return np.column_stack([np.zeros(n), inb]), phi1, phi2, (mu, s1, s2, s3)


def test_evppi_linear_gaussian_one_parameter():
    # E[INB | phi1] = mu + phi1 ~ N(mu, s1^2), so EVPPI = E[max(0, .)] - max(0, mu):
    # 1000 phi(0.2) + 200 Phi(0.2) - 200 = 391.04 + 115.85 - 200 = 306.89 (normal linear
    # loss integral, from memory; method: Strong et al. 2014).
    nb, phi1, _, (mu, s1, _, _) = _linear_gaussian(20_000, seed=11)
    result = evppi_regression(nb, phi1, method="spline")
    exact = expected_positive_part(mu, s1) - mu
    assert exact == pytest.approx(306.8946, abs=1e-3)
    assert abs(result.value - exact) < 4.0 * result.standard_error
    assert result.r_squared[0] == pytest.approx(s1**2 / (s1**2 + 800.0**2 + 600.0**2), abs=0.02)


def test_evppi_linear_effect_uses_two_degrees_of_freedom():
    # A straight line lies in the penalty's null space: GCV picks a near-linear fit.
    nb, phi1, _, _ = _linear_gaussian(20_000, seed=12)
    result = evppi_regression(nb, phi1, method="spline")
    assert 2.0 <= result.effective_degrees_of_freedom[0] < 4.0
    assert result.message == ""


@pytest.mark.parametrize("method", ["additive", "tensor", "auto"])
def test_evppi_linear_gaussian_parameter_group(method):
    # E[INB | phi1, phi2] = mu + phi1 + phi2 ~ N(mu, s1^2 + s2^2) (normal linear loss
    # integral, from memory): sigma = hypot(1000, 800) = 1280.62 -> EVPPI = 417.11.
    nb, phi1, phi2, (mu, s1, s2, _) = _linear_gaussian(20_000, seed=13)
    result = evppi_regression(nb, np.column_stack([phi1, phi2]), method=method)
    exact = expected_positive_part(mu, np.hypot(s1, s2)) - mu
    assert exact == pytest.approx(417.11, abs=0.005)
    assert abs(result.value - exact) < 4.0 * result.standard_error
    assert result.method == ("tensor" if method == "auto" else method)


def test_evppi_matches_scipy_smoothing_spline():
    # Reference library: scipy.interpolate.make_smoothing_spline (GCV), nonlinear effect.
    # The parameter is an evenly spaced (shuffled) design: scipy 1.17's GCV search was
    # seen to fail on some random designs with near-tied abscissae (spacing ~1e-7).
    rng = np.random.default_rng(5)
    n = 2000
    phi = rng.permutation(np.linspace(-2.0, 2.0, n))
    inb = 800.0 * np.sin(2.0 * phi) + 300.0 * phi**2 - 200.0 + rng.normal(0.0, 500.0, n)
    nb = np.column_stack([np.zeros(n), inb, 0.5 * inb + rng.normal(0.0, 200.0, n)])
    ours = evppi_regression(nb, phi, method="spline")
    ref = evppi_regression(nb, phi, method="smoothing_spline")
    assert ours.value == pytest.approx(ref.value, rel=0.01)
    np.testing.assert_allclose(ours.fitted, ref.fitted, atol=0.05 * inb.std())


def test_evppi_regression_error_by_posterior_draws():
    # Strong et al. 2014: resample the spline coefficients from their posterior. The
    # error is positive, reproducible from the seed and of the order of the Monte Carlo
    # error for this design (the fit has ~2 degrees of freedom of noise to carry).
    nb, phi1, _, _ = _linear_gaussian(5000, seed=14)
    plain = evppi_regression(nb, phi1)
    assert np.isnan(plain.regression_standard_error)
    first = evppi_regression(nb, phi1, posterior_samples=200, seed=3)
    again = evppi_regression(nb, phi1, posterior_samples=200, seed=3)
    assert first.regression_standard_error == again.regression_standard_error
    assert 0.1 * first.standard_error < first.regression_standard_error < 10 * first.standard_error
    assert first.value == plain.value  # sampling never changes the estimate


def test_evppi_regression_error_not_for_scipy_reference():
    nb, phi1, _, _ = _linear_gaussian(500, seed=15)
    result = evppi_regression(nb, phi1, method="smoothing_spline", posterior_samples=10)
    assert np.isnan(result.regression_standard_error)
    assert "no posterior draws" in result.message


def test_evppi_of_independent_parameter_is_small():
    # Two strategies: EVPPI = mean(max(0, f)) - max(0, mean f) <= mean|f - mean f| <= sd(f),
    # and a linear smoother of pure noise has sd(f) ~ sigma sqrt(edf / D) (common practice).
    rng = np.random.default_rng(3)
    n, sigma = 20_000, 1000.0
    nb = np.column_stack([np.zeros(n), rng.normal(0.0, sigma, n)])
    result = evppi_regression(nb, rng.normal(size=n))
    bound = 3.0 * sigma * np.sqrt(result.effective_degrees_of_freedom[0] / n)  # ~ 43
    assert result.value <= bound
    assert result.value < 0.05 * result.evpi  # EVPI ~ 400
    assert result.r_squared[0] < 0.01


def test_evppi_of_determining_parameter_equals_evpi():
    # INB a smooth function of phi alone: E[INB | phi] = INB, so EVPPI = EVPI.
    rng = np.random.default_rng(7)
    n = 4000
    phi = rng.normal(size=n)
    inb = 1000.0 * (phi**2 - 1.0) + 300.0 * np.sin(3.0 * phi)
    result = evppi_regression(np.column_stack([np.zeros(n), inb]), phi)
    assert result.value == pytest.approx(float(result.evpi), rel=0.01)


def test_tensor_captures_interaction_additive_does_not():
    # INB = 1000 phi1 phi2 - 250 is fully determined by the pair (EVPPI = EVPI) but has no
    # additive part worth much: the additive smoother's documented limit.
    rng = np.random.default_rng(8)
    n = 4000
    phi = rng.normal(0.5, 1.0, (n, 2))
    nb = np.column_stack([np.zeros(n), 1000.0 * phi[:, 0] * phi[:, 1] - 250.0])
    tensor = evppi_regression(nb, phi, method="tensor")
    additive = evppi_regression(nb, phi, method="additive")
    assert tensor.value == pytest.approx(float(tensor.evpi), rel=0.01)
    assert additive.value < 0.8 * float(additive.evpi)


def test_evppi_with_a_strategy_identical_to_the_reference():
    # A column equal to the reference has zero incremental NB: fitted 0, no warning.
    nb, phi1, _, _ = _linear_gaussian(2000, seed=16)
    three = np.column_stack([nb, nb[:, 0]])
    result = evppi_regression(three, phi1)
    assert np.all(result.fitted[:, 2] == 0.0)
    assert result.message == ""
    assert result.value == pytest.approx(evppi_regression(nb, phi1).value)


def test_evppi_discrete_parameter():
    # A parameter with 3 values: E[INB | phi] is the group mean; the spline (ridge-held
    # bases with no draws) reproduces the group means.
    rng = np.random.default_rng(9)
    n = 3000
    phi = rng.integers(0, 3, n).astype(float)
    means = np.array([-500.0, 100.0, 400.0])
    inb = means[phi.astype(int)] + rng.normal(0.0, 300.0, n)
    result = evppi_regression(np.column_stack([np.zeros(n), inb]), phi)
    group_means = np.array([inb[phi == v].mean() for v in range(3)])
    np.testing.assert_allclose(result.fitted[:, 1], group_means[phi.astype(int)], atol=0.02 * 300.0)


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 10_000), st.integers(2, 4))
def test_evppi_not_above_evpi(seed, n_strategies):
    # EVPPI <= EVPI (Strong et al. 2014); allowed estimation slack: 1% of EVPI.
    rng = np.random.default_rng(seed)
    n = 300
    phi = rng.normal(size=n)
    scale = rng.uniform(0.5, 2.0, n_strategies)
    nb = rng.normal(size=(n, n_strategies)) * scale + np.outer(phi, rng.normal(size=n_strategies))
    result = evppi_regression(nb, phi)
    assert 0.0 <= result.value <= 1.01 * float(result.evpi) + 1e-12
    fitted = result.fitted
    assert fitted.shape == nb.shape and np.all(fitted[:, 0] == 0.0)
    if n_strategies == 2:  # the bound used in the independence test holds exactly
        assert result.value <= fitted[:, 1].std() + 1e-9


# --- one error test per validation rule ----------------------------------------------


def test_error_net_benefit_not_2d():
    with pytest.raises(ModelError, match=r"net_benefit: expected a 2-D .* got shape \(3,\)"):
        evpi(np.ones(3))


def test_error_net_benefit_not_numeric():
    with pytest.raises(ModelError, match=r"net_benefit: expected a .* array of numbers"):
        evpi([["a", "b"]])


def test_error_net_benefit_nan_names_draw():
    nb = np.ones((4, 2))
    nb[2, 1] = np.nan
    with pytest.raises(ModelError, match=r"net_benefit\[draw 2, column 1\]: value nan"):
        evpi(nb)


def test_error_evppi_needs_two_strategies():
    with pytest.raises(ModelError, match="at least 1 draw and 2 strategies"):
        evppi_regression(np.ones((100, 1)), np.ones(100))


def test_error_covariate_length():
    with pytest.raises(ModelError, match=r"covariates: expected shape \(100,\) or \(100, p\)"):
        evppi_regression(np.ones((100, 2)), np.ones(99))


def test_error_covariate_nan():
    phi = np.linspace(0.0, 1.0, 100)
    phi[5] = np.inf
    with pytest.raises(ModelError, match=r"covariates\[draw 5, column 0\]: value inf"):
        evppi_regression(np.ones((100, 2)), phi)


def test_error_unknown_method():
    with pytest.raises(ModelError, match="unknown EVPPI method 'loess'"):
        evppi_regression(np.ones((100, 2)), np.linspace(0, 1, 100), method="loess")


def test_error_spline_with_two_parameters():
    with pytest.raises(ModelError, match="method 'spline' takes one parameter, got 2"):
        evppi_regression(np.ones((100, 2)), np.ones((100, 2)), method="spline")


def test_error_tensor_with_four_parameters():
    with pytest.raises(ModelError, match="method 'tensor' takes 2 or 3 parameters, got 4"):
        evppi_regression(np.ones((5000, 2)), np.ones((5000, 4)), method="tensor")


def test_error_too_few_draws():
    # 5 basis functions need 10 draws each: 40 draws are too few.
    with pytest.raises(ModelError, match=r"40 draws are too few .* expected at least 50 draws"):
        evppi_regression(np.ones((40, 2)), np.linspace(0, 1, 40))


def test_error_basis_size_too_small():
    with pytest.raises(ModelError, match="basis_size: expected at least 5 basis functions, got 3"):
        evppi_regression(np.ones((100, 2)), np.linspace(0, 1, 100), basis_size=3)


def test_error_basis_size_too_large_for_draws():
    with pytest.raises(ModelError, match=r"100 draws are too few .* with 12 basis functions"):
        evppi_regression(np.ones((100, 2)), np.linspace(0, 1, 100), basis_size=12)


def test_error_smoothing_spline_needs_distinct_values():
    phi = np.repeat([0.0, 1.0, 2.0], 40)
    with pytest.raises(ModelError, match="at least 5 distinct parameter values, got 3"):
        evppi_regression(np.ones((120, 2)), phi, method="smoothing_spline")


@pytest.mark.parametrize("samples", [1, -3, 2.5])
def test_error_posterior_samples(samples):
    with pytest.raises(ModelError, match=r"posterior_samples: expected 0 .* or an integer >= 2"):
        evppi_regression(np.ones((100, 2)), np.linspace(0, 1, 100), posterior_samples=samples)


def test_error_scaled_negative_population():
    with pytest.raises(ModelError, match="population: expected a finite number >= 0"):
        evpi(np.ones((3, 2))).scaled(-5.0)


def test_evpi_result_is_float_subclass():
    assert issubclass(EVPIResult, float)


@settings(max_examples=80, deadline=None)
@given(
    st.lists(st.floats(0.01, 0.99), min_size=0, max_size=8),
    st.integers(0, 3),
    st.integers(0, 2**32 - 1),
)
def test_bspline_matrix_equals_scipy_bspline(interior, derivative, seed):
    # Reference library: scipy.interpolate.BSpline (design_matrix and derivative), on
    # clamped cubic knot vectors with repeated interior knots, at random points, every
    # knot and both ends (the right end belongs to the last interval in both).
    from scipy.interpolate import BSpline

    inner = np.sort(np.round(np.asarray(interior), 2))  # rounding makes repeated knots
    knots = np.concatenate([np.zeros(4), inner, np.ones(4)])
    if np.any(np.bincount(np.searchsorted(np.unique(knots), knots))[1:-1] > 3):
        return  # an interior knot repeated 4 times cuts the basis in two
    rng = np.random.default_rng(seed)
    x = np.concatenate([rng.uniform(0, 1, 20), knots])
    m = knots.size - 4
    if derivative == 0:
        expected = BSpline.design_matrix(x, knots, 3).toarray()
    else:
        try:
            expected = BSpline(knots, np.eye(m), 3).derivative(derivative)(x)
        except ValueError:  # scipy refuses a derivative across a repeated interior knot
            assume(False)
    got = bspline_matrix(x, knots, derivative=derivative)
    scale = max(1.0, float(np.abs(expected).max()))
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9 * scale)
