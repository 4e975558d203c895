"""Parameter draws for PSA: moments, reproducibility across chunkings, rank correlation."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.errors import ModelError, RunOptionError
from caredecide.uncertainty.sampling import (
    BLOCK_SIZE,
    ParameterSampler,
    block_seed,
    sample_parameters,
)
from tests.conftest import load_dict, small_model_dict

N = 20 * BLOCK_SIZE
K_SE = 4.0  # tolerance: 4 Monte Carlo standard errors (false alarm ~1e-4 per check)


def _model_with(distributions: dict[str, dict], groups: dict | None = None):
    data = small_model_dict()
    for name, spec in distributions.items():
        data["parameters"].setdefault(
            name, {"value": 0.5, "kind": "other", "source": "Synthetic: test"}
        )
        data["parameters"][name]["distribution"] = spec
    if groups:
        data["groups"] = groups
        data["transitions"]["wait"]["well"] = {"sick": "g_sick", "dead": "g_dead", "well": "g_well"}
    return load_dict(data)


def _check_mean_and_variance(x: np.ndarray, mean: float, variance: float) -> None:
    n = x.size
    # Sample mean: se = sd / sqrt(n). Sample variance: se = sqrt((m4 - s^4) / n)
    # (large-sample variance of the sample variance; common practice).
    assert abs(x.mean() - mean) <= K_SE * math.sqrt(variance / n)
    m4 = np.mean((x - x.mean()) ** 4)
    assert abs(x.var(ddof=1) - variance) <= K_SE * math.sqrt((m4 - x.var() ** 2) / n)


# Source: Briggs, Claxton & Sculpher 2006, ch. 4 (from memory): method of moments, so a
# beta/gamma given by mean and se has exactly that mean and standard deviation.
@pytest.mark.parametrize(
    ("spec", "mean", "variance"),
    [
        ({"type": "beta", "mean": 0.8, "se": 0.1}, 0.8, 0.01),  # Beta(12, 3)
        ({"type": "gamma", "mean": 1000.0, "se": 200.0}, 1000.0, 40_000.0),  # Gamma(25, 40)
        # Lognormal moments: mean exp(mu + s^2/2), variance (e^{s^2} - 1) e^{2 mu + s^2}
        # (common textbook result).
        (
            {"type": "lognormal", "meanlog": 0.0, "sdlog": 0.25},
            math.exp(0.25**2 / 2),
            math.expm1(0.25**2) * math.exp(0.25**2),
        ),
        ({"type": "normal", "mean": 3.0, "sd": 2.0}, 3.0, 4.0),
        # Uniform: (a + b)/2, (b - a)^2/12; triangular: (a + c + b)/3,
        # (a^2 + b^2 + c^2 - ab - ac - bc)/18 (common textbook results).
        ({"type": "uniform", "low": 2.0, "high": 5.0}, 3.5, 0.75),
        (
            {"type": "triangular", "low": 0.0, "mode": 1.0, "high": 4.0},
            5.0 / 3.0,
            (16 + 1 - 4) / 18,
        ),
    ],
)
def test_sample_moments_match_distribution(spec, mean, variance):
    model = _model_with({"x": spec})
    draws = sample_parameters(model, N, seed=11)
    assert list(draws.columns) == ["x"]
    _check_mean_and_variance(draws["x"].to_numpy(), mean, variance)


def test_dirichlet_group_moments_and_rows_sum_to_one():
    # Source: Briggs, Ades & Price 2003, Med Decis Making 23(4):341-350: Dirichlet(counts)
    # has mean n_i / N and variance n_i (N - n_i) / (N^2 (N + 1)).
    counts = [30.0, 50.0, 20.0]
    model = _model_with(
        {},
        {
            "row": {
                "members": ["g_sick", "g_dead", "g_well"],
                "counts": counts,
                "source": "Synthetic: test",
            }
        },
    )
    draws = sample_parameters(model, N, seed=5)
    assert list(draws.columns) == ["g_sick", "g_dead", "g_well"]
    np.testing.assert_allclose(draws.sum(axis=1), 1.0, atol=1e-12)
    total = sum(counts)
    for name, n_i in zip(draws.columns, counts, strict=True):
        _check_mean_and_variance(
            draws[name].to_numpy(), n_i / total, n_i * (total - n_i) / (total**2 * (total + 1))
        )


def test_fixed_and_missing_distributions_are_not_sampled():
    model = _model_with(
        {
            "p_sick": {"type": "fixed", "value": 0.1},
            "u_sick": {"type": "beta", "alpha": 6.0, "beta": 4.0},
        }
    )
    assert ParameterSampler.from_model(model).names == ("u_sick",)


def test_same_seed_same_draws_other_seed_other_draws():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    a = sample_parameters(model, 1500, seed=3)
    b = sample_parameters(model, 1500, seed=3)
    c = sample_parameters(model, 1500, seed=4)
    assert a.equals(b)
    assert not np.allclose(a.to_numpy(), c.to_numpy())


def test_block_uses_the_spawned_child_seed():
    # Block b's generator is the b-th child of SeedSequence(seed).spawn(...) (numpy docs).
    model = _model_with({"x": {"type": "uniform", "low": 0.0, "high": 1.0}})
    sampler = ParameterSampler.from_model(model)
    child = np.random.SeedSequence(9).spawn(4)[3]
    assert block_seed(9, 3).spawn_key == child.spawn_key
    expected = np.random.default_rng(child).uniform(0.0, 1.0, size=BLOCK_SIZE)
    np.testing.assert_array_equal(sampler.block(9, 3)[:, 0], expected)


@settings(max_examples=25, deadline=None)
@given(cuts=st.lists(st.integers(min_value=0, max_value=2500), max_size=6))
def test_any_chunking_gives_the_same_draws(cuts):
    model = _model_with(
        {"x": {"type": "gamma", "shape": 2.0, "scale": 3.0}},
        {
            "row": {
                "members": ["g_sick", "g_dead", "g_well"],
                "counts": [3.0, 1.0, 6.0],
                "source": "Synthetic: test",
            }
        },
    )
    sampler = ParameterSampler.from_model(model)
    whole = sampler.draw(17, 0, 2500)
    edges = [0, *sorted(cuts), 2500]
    pieces = [sampler.draw(17, a, b) for a, b in itertools.pairwise(edges)]
    np.testing.assert_array_equal(np.concatenate(pieces), whole)


def test_rank_correlation_keeps_marginals_and_correlates_ranks():
    specs = {
        "a": {"type": "gamma", "mean": 10.0, "se": 3.0},
        "b": {"type": "beta", "mean": 0.3, "se": 0.05},
    }
    model = _model_with(specs)
    plain = ParameterSampler.from_model(model).block(2, 0)
    linked = ParameterSampler.from_model(model, rank_correlation={("a", "b"): 0.7}).block(2, 0)
    # Iman & Conover 1982: values are re-ordered, never changed.
    np.testing.assert_array_equal(np.sort(plain, axis=0), np.sort(linked, axis=0))
    # The target is the correlation of normal scores; for normal variables Spearman's
    # rho is (6 / pi) asin(r / 2) (Pearson 1907; from memory) = 0.6829 for r = 0.7.
    draws = ParameterSampler.from_model(model, rank_correlation={("a", "b"): 0.7}).draw(
        2, 0, 10 * BLOCK_SIZE
    )
    rho = scipy.stats.spearmanr(draws[:, 0], draws[:, 1]).statistic
    assert rho == pytest.approx(6 / math.pi * math.asin(0.35), abs=0.03)


# ---------------------------------------------------------------- one test per refusal
def test_refuses_zero_draws():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(
        RunOptionError,
        match=r"draws = 0 is not allowed; expected a whole number in \[1, 100,000,000\]",
    ):
        sample_parameters(model, 0, seed=1)


def test_refuses_negative_seed():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(
        RunOptionError, match=r"seed = -1 is not allowed; expected a whole number >= 0"
    ):
        sample_parameters(model, 10, seed=-1)


def test_refuses_correlation_with_unknown_parameter():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(ModelError, match=r"rank_correlation\.x\.nope: unknown parameter 'nope'"):
        ParameterSampler.from_model(model, rank_correlation={("x", "nope"): 0.5})


def test_refuses_correlation_with_fixed_parameter():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(ModelError, match=r"'p_sick' has no distribution"):
        ParameterSampler.from_model(model, rank_correlation={("x", "p_sick"): 0.5})


def test_refuses_correlation_with_dirichlet_member():
    model = _model_with(
        {"x": {"type": "normal", "mean": 0.0, "sd": 1.0}},
        {
            "row": {
                "members": ["g_sick", "g_dead", "g_well"],
                "counts": [3.0, 1.0, 6.0],
                "source": "Synthetic: test",
            }
        },
    )
    with pytest.raises(ModelError, match=r"'g_sick' is a Dirichlet group member"):
        ParameterSampler.from_model(model, rank_correlation={("x", "g_sick"): 0.5})


def test_refuses_correlation_outside_minus_one_one():
    model = _model_with(
        {
            "x": {"type": "normal", "mean": 0.0, "sd": 1.0},
            "y": {"type": "normal", "mean": 0.0, "sd": 1.0},
        }
    )
    with pytest.raises(ModelError, match=r"rank_correlation\.x\.y: correlation 1\.5; expected"):
        ParameterSampler.from_model(model, rank_correlation={("x", "y"): 1.5})


def test_refuses_a_pair_that_is_not_two_names():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(ModelError, match=r"expected a pair of two different names"):
        ParameterSampler.from_model(model, rank_correlation={("x", "x"): 0.5})


def test_refuses_correlations_that_are_not_positive_definite():
    normal = {"type": "normal", "mean": 0.0, "sd": 1.0}
    model = _model_with({"x": normal, "y": normal, "z": normal})
    with pytest.raises(ModelError, match=r"do not form a positive definite matrix"):
        ParameterSampler.from_model(
            model, rank_correlation={("x", "y"): 0.9, ("y", "z"): 0.9, ("x", "z"): -0.9}
        )


def test_refuses_a_bad_draw_range():
    model = _model_with({"x": {"type": "normal", "mean": 0.0, "sd": 1.0}})
    with pytest.raises(ModelError, match=r"draw range 5:2; expected 0 <= start <= stop"):
        ParameterSampler.from_model(model).draw(1, 5, 2)
