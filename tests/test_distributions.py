"""Parameter distributions: published method-of-moments values, scipy.stats, Monte Carlo."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.distributions import (
    KINDS,
    Distribution,
    beta_from_interval,
    beta_from_mean_se,
    dirichlet_from_counts,
    dirichlet_from_spec,
    distribution_from_spec,
    gamma_from_interval,
    gamma_from_mean_se,
    lognormal_from_interval,
    lognormal_from_mean_se,
    normal_from_interval,
)
from caredecide.errors import DistributionError

# Monte Carlo checks: a sample statistic must lie within K_SE standard errors of its
# expected value (about 1 chance in 1.7 million per check for a normal statistic).
K_SE = 5.0
N_DRAWS = 200_000
Z_95 = scipy.stats.norm.ppf(0.975)

ONE_OF_EACH = [
    {"type": "beta", "alpha": 12, "beta": 3},
    {"type": "gamma", "shape": 25, "scale": 40},
    {"type": "lognormal", "meanlog": -0.3, "sdlog": 0.1},
    {"type": "normal", "mean": -2.0, "sd": 0.5},
    {"type": "uniform", "low": 0.1, "high": 0.4},
    {"type": "triangular", "low": 0.0, "mode": 0.2, "high": 1.0},
]
# Every way of writing a spec: natural parameters, mean and se, an interval, fixed.
EVERY_FORM = [
    *ONE_OF_EACH,
    {"type": "beta", "mean": 0.8, "se": 0.1},
    {"type": "gamma", "mean": 1000, "se": 200},
    {"type": "lognormal", "low": 0.6, "high": 0.9},
    {"type": "lognormal", "mean": 2, "se": 0.5},
    {"type": "normal", "mean": 1, "se": 0.2},
    {"type": "beta", "low": 0.6, "high": 0.9, "level": 0.9},
    {"type": "fixed", "value": 7},
]


# ------------------------------------------------------------------ method of moments
def test_beta_method_of_moments_published_value():
    # Source: Briggs, Claxton & Sculpher 2006, ch. 4 (from memory): m = 0.8, s = 0.1 -> Beta(12, 3).
    alpha, beta = beta_from_mean_se(0.8, 0.1)
    assert (alpha, beta) == pytest.approx((12.0, 3.0), rel=1e-12)
    dist = distribution_from_spec({"type": "beta", "mean": 0.8, "se": 0.1})
    assert dist.kind == "beta"
    assert (dist.params["alpha"], dist.params["beta"]) == pytest.approx((12.0, 3.0), rel=1e-12)


def test_gamma_method_of_moments_published_value():
    # Source: Briggs, Claxton & Sculpher 2006, ch. 4 (from memory): m = 1000, s = 200 ->
    # Gamma(shape 25, scale 40).
    assert gamma_from_mean_se(1000.0, 200.0) == pytest.approx((25.0, 40.0), rel=1e-12)
    dist = distribution_from_spec({"type": "gamma", "mean": 1000, "se": 200})
    assert dist.params == pytest.approx({"shape": 25.0, "scale": 40.0}, rel=1e-12)


def test_lognormal_from_interval_published_formula():
    # Source: Briggs, Claxton & Sculpher 2006, ch. 4 (from memory): log relative risk
    # se = (ln U - ln L) / (2 x 1.96), centred on (ln L + ln U) / 2.
    meanlog, sdlog = lognormal_from_interval(0.6, 0.9)
    assert meanlog == pytest.approx((math.log(0.6) + math.log(0.9)) / 2.0, rel=1e-15)
    # We use the exact normal quantile 1.959964; the published 1.96 is its rounding.
    assert sdlog == pytest.approx((math.log(0.9) - math.log(0.6)) / (2 * Z_95), rel=1e-14)
    assert sdlog == pytest.approx((math.log(0.9) - math.log(0.6)) / (2 * 1.96), rel=2e-5)
    dist = distribution_from_spec({"type": "lognormal", "low": 0.6, "high": 0.9})
    np.testing.assert_allclose(dist.quantile([0.025, 0.975]), [0.6, 0.9], rtol=1e-12)


def test_lognormal_from_mean_se_reproduces_moments():
    # Lognormal moments: mean exp(mu + s^2/2), variance (e^{s^2} - 1) e^{2 mu + s^2};
    # checked against scipy.stats.lognorm.
    meanlog, sdlog = lognormal_from_mean_se(2.5, 0.75)
    reference = scipy.stats.lognorm(sdlog, scale=math.exp(meanlog))
    assert reference.mean() == pytest.approx(2.5, rel=1e-12)
    assert reference.std() == pytest.approx(0.75, rel=1e-12)


def test_interval_level_other_than_95():
    # A 90% interval uses z = 1.644854 (scipy.stats.norm.ppf(0.95)).
    dist = distribution_from_spec({"type": "normal", "low": 1.0, "high": 3.0, "level": 0.9})
    assert dist.params["mean"] == 2.0
    assert dist.params["sd"] == pytest.approx(1.0 / scipy.stats.norm.ppf(0.95), rel=1e-14)
    np.testing.assert_allclose(dist.quantile([0.05, 0.95]), [1.0, 3.0], rtol=1e-12)
    assert normal_from_interval(1.0, 3.0, 0.9) == (dist.params["mean"], dist.params["sd"])


@pytest.mark.parametrize(
    ("kind", "low", "high", "level"),
    [("beta", 0.6, 0.9, 0.95), ("beta", 0.01, 0.99, 0.999999), ("gamma", 100.0, 300.0, 0.9)],
)
def test_interval_matched_numerically(kind, low, high, level):
    # Both quantiles of the fitted distribution hit the interval (scipy.stats ppf).
    spec = {"type": kind, "low": low, "high": high, "level": level}
    dist = distribution_from_spec(spec)
    tail = (1.0 - level) / 2.0
    np.testing.assert_allclose(dist.quantile([tail, 1.0 - tail]), [low, high], rtol=1e-7)
    helper = beta_from_interval if kind == "beta" else gamma_from_interval
    assert tuple(dist.params.values()) == helper(low, high, level)


means = st.floats(0.01, 0.99)
fractions = st.floats(0.01, 0.99)


@settings(deadline=None)
@given(mean=means, fraction=fractions)
def test_fitted_beta_reproduces_mean_and_se(mean, fraction):
    # Any feasible se (s^2 < m(1 - m)) is matched exactly (method of moments).
    se = fraction * math.sqrt(mean * (1.0 - mean))
    alpha_beta = beta_from_mean_se(mean, se)
    dist = Distribution("beta", (("alpha", alpha_beta[0]), ("beta", alpha_beta[1])))
    assert dist.mean() == pytest.approx(mean, rel=1e-9)
    assert math.sqrt(dist.variance()) == pytest.approx(se, rel=1e-9)


@pytest.mark.parametrize("kind", ["gamma", "lognormal"])
@settings(deadline=None)
@given(mean=st.floats(1e-3, 1e6), ratio=st.floats(1e-3, 10.0))
def test_fitted_gamma_and_lognormal_reproduce_mean_and_se(kind, mean, ratio):
    # Method of moments for the gamma (Briggs, Claxton & Sculpher 2006, from memory) and
    # lognormal moments (common practice): the fit has exactly the requested mean and se.
    se = ratio * mean
    dist = distribution_from_spec({"type": kind, "mean": mean, "se": se})
    assert dist.mean() == pytest.approx(mean, rel=1e-9)
    assert math.sqrt(dist.variance()) == pytest.approx(se, rel=1e-9)


# ------------------------------------------------------------- moments and quantiles
@pytest.mark.parametrize("spec", ONE_OF_EACH, ids=[s["type"] for s in ONE_OF_EACH])
def test_mean_variance_support_match_scipy(spec):
    dist = distribution_from_spec(spec)
    reference = dist.scipy()
    assert dist.mean() == pytest.approx(reference.mean(), rel=1e-12)
    assert dist.variance() == pytest.approx(reference.var(), rel=1e-12)
    assert dist.support() == pytest.approx(reference.support())


@pytest.mark.parametrize("spec", ONE_OF_EACH, ids=[s["type"] for s in ONE_OF_EACH])
def test_quantiles_match_scipy(spec):
    # Independent scipy.stats parameterisation of each kind, written out here.
    p = {k: v for k, v in spec.items() if k != "type"}
    reference = {
        "beta": lambda: scipy.stats.beta(p["alpha"], p["beta"]),
        "gamma": lambda: scipy.stats.gamma(p["shape"], scale=p["scale"]),
        "lognormal": lambda: scipy.stats.lognorm(p["sdlog"], scale=math.exp(p["meanlog"])),
        "normal": lambda: scipy.stats.norm(p["mean"], p["sd"]),
        "uniform": lambda: scipy.stats.uniform(p["low"], p["high"] - p["low"]),
        "triangular": lambda: scipy.stats.triang(
            (p["mode"] - p["low"]) / (p["high"] - p["low"]), p["low"], p["high"] - p["low"]
        ),
    }[spec["type"]]()
    q = np.array([[0.0, 0.025, 0.25], [0.5, 0.975, 1.0]])
    result = distribution_from_spec(spec).quantile(q)
    assert result.shape == (2, 3)
    np.testing.assert_allclose(result, reference.ppf(q), rtol=1e-12)


def test_triangular_moments_by_hand():
    # Triangular(0, 0.2, 1): mean (0 + 0.2 + 1)/3 = 0.4; variance
    # (0 + 1 + 0.04 - 0 - 0 - 0.2)/18 = 0.84/18 (common practice formulas).
    dist = distribution_from_spec({"type": "triangular", "low": 0, "mode": 0.2, "high": 1})
    assert dist.mean() == pytest.approx(0.4, rel=1e-15)
    assert dist.variance() == pytest.approx(0.84 / 18.0, rel=1e-14)


def test_fixed_value():
    dist = distribution_from_spec({"type": "fixed", "value": 3})
    assert dist.mean() == 3.0 and dist.variance() == 0.0 and dist.support() == (3.0, 3.0)
    np.testing.assert_array_equal(dist.quantile([0.1, 0.9]), [3.0, 3.0])
    np.testing.assert_array_equal(dist.sample(np.random.default_rng(0), 4), [3.0] * 4)


@pytest.mark.parametrize("spec", ONE_OF_EACH, ids=[s["type"] for s in ONE_OF_EACH])
def test_sample_moments_within_monte_carlo_error(spec):
    dist = distribution_from_spec(spec)
    draws = dist.sample(np.random.default_rng(20261202), N_DRAWS)
    assert draws.shape == (N_DRAWS,)
    lo, hi = dist.support()
    assert ((draws >= lo) & (draws <= hi)).all()
    # se of the sample mean: sqrt(var / n); of the sample variance:
    # var sqrt(2 / (n - 1) + excess kurtosis / n) (common practice).
    variance = dist.variance()
    excess_kurtosis = float(dist.scipy().stats(moments="k"))
    se_mean = math.sqrt(variance / N_DRAWS)
    se_variance = variance * math.sqrt(2.0 / (N_DRAWS - 1) + excess_kurtosis / N_DRAWS)
    assert abs(draws.mean() - dist.mean()) < K_SE * se_mean
    assert abs(draws.var(ddof=1) - variance) < K_SE * se_variance


def test_sampling_is_reproducible_and_uses_the_generator():
    dist = distribution_from_spec({"type": "beta", "alpha": 12, "beta": 3})
    first = dist.sample(np.random.default_rng(7), 1000)
    np.testing.assert_array_equal(first, dist.sample(np.random.default_rng(7), 1000))
    # Same stream as the Generator's own beta method, so runs are reproducible across tools.
    np.testing.assert_array_equal(first, np.random.default_rng(7).beta(12.0, 3.0, size=1000))
    assert not np.array_equal(first, dist.sample(np.random.default_rng(8), 1000))


@pytest.mark.parametrize("spec", EVERY_FORM)
def test_spec_round_trips_unchanged(spec):
    dist = distribution_from_spec(dict(spec))
    assert dist.to_spec() == spec
    assert list(dist.to_spec()) == list(spec)  # key order kept too
    assert distribution_from_spec(dist.to_spec()) == dist
    assert hash(dist) == hash(distribution_from_spec(dist.to_spec()))


def test_direct_construction_gives_natural_spec():
    dist = Distribution("gamma", (("shape", 2.0), ("scale", 3.0)))
    assert dist.to_spec() == {"type": "gamma", "shape": 2.0, "scale": 3.0}


# --------------------------------------------------------------------------- Dirichlet
def test_dirichlet_moments_published_formula():
    # Source: Briggs, Ades & Price 2003, Med Decis Making 23(4):341-350: mean n_i/N,
    # variance n_i (N - n_i) / (N^2 (N + 1)). Counts 10, 5, 5: N = 20; mean 0.5, 0.25, 0.25;
    # variance 10 x 10 / (400 x 21) = 0.0119048 and 5 x 15 / 8400 = 0.0089286.
    group = dirichlet_from_counts({"stable": 10, "worse": 5, "dead": 5})
    assert group.members == ("stable", "worse", "dead")
    np.testing.assert_array_equal(group.alpha, [10.0, 5.0, 5.0])
    np.testing.assert_allclose(group.mean(), [0.5, 0.25, 0.25], rtol=1e-15)
    np.testing.assert_allclose(group.variance(), [100 / 8400, 75 / 8400, 75 / 8400], rtol=1e-14)
    # And scipy.stats.dirichlet agrees.
    np.testing.assert_allclose(group.variance(), scipy.stats.dirichlet(group.alpha).var())


def test_dirichlet_prior_added_to_counts():
    group = dirichlet_from_counts({"stable": 8, "dead": 0}, prior=1.0)
    np.testing.assert_array_equal(group.alpha, [9.0, 1.0])
    np.testing.assert_allclose(group.mean(), [0.9, 0.1])


def test_dirichlet_unobserved_destination_without_prior():
    # Briggs, Ades & Price 2003: mean n_i / N = 0 and variance 0 for n_i = 0; numpy's
    # Generator.dirichlet gives that member 0 in every draw.
    group = dirichlet_from_counts({"stable": 6, "worse": 0, "dead": 2})
    np.testing.assert_allclose(group.mean(), [0.75, 0.0, 0.25])
    np.testing.assert_allclose(group.variance(), [6 * 2 / (64 * 9), 0.0, 2 * 6 / (64 * 9)])
    draws = group.sample(np.random.default_rng(5), 1000)
    assert (draws[:, 1] == 0).all()
    np.testing.assert_allclose(draws.sum(axis=1), 1.0, atol=1e-12)


def test_dirichlet_samples():
    group = dirichlet_from_counts({"stable": 10, "worse": 5, "dead": 5})
    draws = group.sample(np.random.default_rng(3), N_DRAWS)
    assert draws.shape == (N_DRAWS, 3)
    np.testing.assert_allclose(draws.sum(axis=1), 1.0, atol=1e-12)
    se_mean = np.sqrt(group.variance() / N_DRAWS)
    assert (np.abs(draws.mean(axis=0) - group.mean()) < K_SE * se_mean).all()
    again = group.sample(np.random.default_rng(3), N_DRAWS)
    np.testing.assert_array_equal(draws, again)


def test_dirichlet_spec_round_trip():
    spec = {"type": "dirichlet", "counts": {"stable": 10, "dead": 2}}
    group = dirichlet_from_spec(spec)
    assert group.to_spec() == spec
    group.to_spec()["counts"]["stable"] = 99  # a copy: the group is unchanged
    assert group.to_spec() == spec
    built = dirichlet_from_counts({"a": 1, "b": 2}, prior=0.5)
    assert dirichlet_from_spec(built.to_spec()).alpha.tolist() == [1.5, 2.5]
    with pytest.raises(ValueError):
        group.alpha[0] = 1.0  # read-only


# ------------------------------------------------------------------------------ errors
WHERE = "parameters.p_progress.distribution"


def raises(*words: str):
    return pytest.raises(DistributionError, match=".*".join(re.escape(w) for w in words))


def test_error_spec_not_a_table():
    with raises(WHERE, "expected a table", "0.3"):
        distribution_from_spec(0.3, where=WHERE)


def test_error_missing_type():
    with raises(WHERE, "missing key 'type'", "beta"):
        distribution_from_spec({"mean": 0.3, "se": 0.1}, where=WHERE)


def test_error_unknown_type():
    with raises(WHERE, "type = 'weibull' is unknown", ", ".join(KINDS)):
        distribution_from_spec({"type": "weibull", "shape": 1}, where=WHERE)


def test_error_unknown_key():
    with raises(WHERE, "unknown key(s) sigma for a normal", "allowed keys"):
        distribution_from_spec({"type": "normal", "mean": 0, "sigma": 1}, where=WHERE)


def test_error_missing_key():
    with raises(WHERE, "a gamma is given by shape and scale | mean and se", "got mean"):
        distribution_from_spec({"type": "gamma", "mean": 5}, where=WHERE)


def test_error_mixed_forms():
    with raises(WHERE, "a beta is given by", "got alpha, mean"):
        distribution_from_spec({"type": "beta", "alpha": 2, "mean": 0.5}, where=WHERE)


def test_error_value_not_a_number():
    with raises(WHERE, "se = '0.1' is not a number"):
        distribution_from_spec({"type": "beta", "mean": 0.5, "se": "0.1"}, where=WHERE)
    with raises(WHERE, "value = True is not a number"):
        distribution_from_spec({"type": "fixed", "value": True}, where=WHERE)


def test_error_value_not_finite():
    with raises(WHERE, "mean = inf is not finite"):
        distribution_from_spec({"type": "normal", "mean": math.inf, "sd": 1}, where=WHERE)


def test_error_beta_mean_outside_unit_interval():
    with raises(WHERE, "0 < mean < 1", "mean = 1.2"):
        distribution_from_spec({"type": "beta", "mean": 1.2, "se": 0.1}, where=WHERE)


def test_error_beta_se_too_large():
    # s^2 must be < m (1 - m) = 0.25 for m = 0.5 (Briggs, Claxton & Sculpher 2006).
    with raises(WHERE, "mean = 0.5 and se = 0.6 is impossible", "(1 - mean) = 0.25", "se < 0.5"):
        distribution_from_spec({"type": "beta", "mean": 0.5, "se": 0.6}, where=WHERE)


def test_error_se_not_positive():
    for kind in ("beta", "gamma", "lognormal", "normal"):
        with raises(WHERE, "se = 0.0 must be > 0"):
            distribution_from_spec({"type": kind, "mean": 0.5, "se": 0}, where=WHERE)


def test_error_gamma_and_lognormal_mean_not_positive():
    with raises(WHERE, "mean = -5.0 must be > 0", "gamma"):
        distribution_from_spec({"type": "gamma", "mean": -5, "se": 1}, where=WHERE)
    with raises(WHERE, "mean = 0.0 must be > 0", "lognormal"):
        distribution_from_spec({"type": "lognormal", "mean": 0, "se": 1}, where=WHERE)


def test_error_fit_not_representable():
    with raises(WHERE, "mean = 0.5 and se = 1e-300", "floating point cannot hold"):
        beta_from_mean_se(0.5, 1e-300, where=WHERE)
    with raises(WHERE, "a gamma with mean = 1e+300"):
        gamma_from_mean_se(1e300, 1e-300, where=WHERE)


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ({"type": "beta", "alpha": 0, "beta": 3}, ("alpha = 0.0 must be > 0",)),
        ({"type": "beta", "alpha": 2, "beta": -1}, ("beta = -1.0 must be > 0",)),
        ({"type": "gamma", "shape": -2, "scale": 3}, ("shape = -2.0 must be > 0",)),
        ({"type": "gamma", "shape": 2, "scale": -3}, ("scale = -3.0 must be > 0",)),
        ({"type": "lognormal", "meanlog": 0, "sdlog": 0}, ("sdlog = 0.0 must be > 0",)),
        ({"type": "normal", "mean": 0, "sd": -1}, ("sd = -1.0 must be > 0",)),
        ({"type": "uniform", "low": 2, "high": 1}, ("low = 2.0 must be < high = 1.0",)),
        ({"type": "triangular", "low": 1, "mode": 0.5, "high": 2}, ("mode = 0.5", "[1.0, 2.0]")),
        ({"type": "triangular", "low": 1, "mode": 1, "high": 1}, ("low = 1.0 must be < high",)),
    ],
)
def test_error_natural_parameters(spec, words):
    with raises(WHERE, *words):
        distribution_from_spec(spec, where=WHERE)


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ({"type": "normal", "low": 3, "high": 1}, ("low = 3.0 must be < high = 1.0",)),
        ({"type": "normal", "low": 1, "high": 3, "level": 95}, ("level = 95.0", "(0, 1)")),
        ({"type": "lognormal", "low": 0, "high": 0.9}, ("low = 0.0 must be > 0",)),
        ({"type": "beta", "low": 0.5, "high": 1.2}, ("0 < low < high < 1", "[0.5, 1.2]")),
        ({"type": "gamma", "low": -1, "high": 3}, ("low = -1.0 must be > 0",)),
    ],
)
def test_error_interval(spec, words):
    with raises(WHERE, *words):
        distribution_from_spec(spec, where=WHERE)


def test_error_interval_not_matched():
    # An interval narrower than floating point can resolve around 0.5.
    with raises(WHERE, "found no beta whose 0.95 interval", "give mean and se instead"):
        distribution_from_spec({"type": "beta", "low": 0.5, "high": 0.5 + 1e-15}, where=WHERE)


def test_error_quantile_outside_unit_interval():
    dist = distribution_from_spec({"type": "normal", "mean": 0, "sd": 1})
    with raises("quantile", "q = 1.5 must lie in [0, 1]"):
        dist.quantile([0.5, 1.5])
    with raises("quantile", "q = -0.1"):
        dist.quantile(-0.1)


def test_error_sample_arguments():
    dist = distribution_from_spec({"type": "normal", "mean": 0, "sd": 1})
    with raises("sample", "numpy.random.Generator", "RandomState"):
        dist.sample(np.random.RandomState(0), 3)
    with raises("sample", "n = -1 must be a whole number"):
        dist.sample(np.random.default_rng(0), -1)
    with raises("sample", "n = 2.5"):
        dist.sample(np.random.default_rng(0), 2.5)


def test_error_direct_construction():
    with raises("Distribution", "kind 'poisson' is unknown"):
        Distribution("poisson", (("rate", 1.0),))
    with raises("Distribution", "gamma parameters are ('shape', 'scale')", "('shape', 'rate')"):
        Distribution("gamma", (("shape", 1.0), ("rate", 2.0)))
    with raises("Distribution", "alpha = 'x' is not a number"):
        Distribution("beta", (("alpha", "x"), ("beta", 2.0)))


def test_error_scipy_of_fixed():
    with raises("fixed value has no scipy distribution"):
        distribution_from_spec({"type": "fixed", "value": 1}).scipy()


@pytest.mark.parametrize(
    ("counts", "prior", "words"),
    [
        ({"stable": 3}, 0.0, ("at least two destinations",)),
        ([3, 4], 0.0, ("at least two destinations", "[3, 4]")),
        ({"stable": 3, "dead": -1}, 0.0, ("counts.dead = -1.0 must be >= 0",)),
        ({"stable": 0, "dead": 0}, 0.0, ("counts sum to 0 and prior is 0.0", "prior = 1")),
        ({"stable": 3, "dead": 1}, -0.5, ("prior = -0.5 must be >= 0",)),
        ({"stable": 3, "dead": "two"}, 0.0, ("counts.dead = 'two' is not a number",)),
    ],
)
def test_error_dirichlet_counts(counts, prior, words):
    with raises(WHERE, *words):
        dirichlet_from_counts(counts, prior, where=WHERE)


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ({"type": "beta", "counts": {"a": 1, "b": 1}}, ('type = "dirichlet"',)),
        ({"type": "dirichlet", "counts": {"a": 1, "b": 1}, "n": 2}, ("unknown key(s) n",)),
        ({"type": "dirichlet", "prior": 1}, ("missing key 'counts'",)),
    ],
)
def test_error_dirichlet_spec(spec, words):
    with raises(WHERE, *words):
        dirichlet_from_spec(spec, where=WHERE)
