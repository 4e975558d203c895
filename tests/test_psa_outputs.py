"""Probabilistic outputs: means with intervals per strategy, plane draws, draws.csv
columns, parameters held fixed, and population EVPI/EVPPI."""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.errors import ModelError
from caredecide.modelfile import load_model
from caredecide.uncertainty.psa import analyse_uncertainty
from caredecide.uncertainty.voi import discounted_population, evpi
from synthetic_cohort import MODELS_DIR

DEMO = MODELS_DIR / "demo_progressive.toml"


def test_discounted_population_by_hand():
    # Claxton 1999, J Health Econ 18:341-364; Philips, Claxton & Palmer 2008, Med Decis
    # Making 28(3):287-299 (from memory): population = sum_t N / (1 + r)^t, t = 0..H-1.
    # N = 1000 a year, H = 3 years, r = 3.5%:
    #   1000 (1 + 1/1.035 + 1/1.035^2) = 1000 (1 + 0.9661836 + 0.9335107) = 2899.6943
    assert discounted_population(1000, 3, 0.035) == pytest.approx(2899.6943, abs=1e-3)
    assert discounted_population(500, 1, 0.05) == 500.0  # the first year is not discounted
    assert discounted_population(10, 4, 0.0) == 40.0


def test_population_evpi_of_a_hand_worked_example():
    # Four draws of net benefit for two strategies (invented for the test):
    #   draw:   1   2   3   4     mean
    #   A:     10  14   9  13     11.5
    #   B:     12  11   9  15     11.75  -> B is chosen under current information
    #   max:   12  14   9  15     12.5
    # EVPI = E[max] - max E = 12.5 - 11.75 = 0.75 per person (Claxton 1999, from memory).
    table = np.array([[10.0, 12.0], [14.0, 11.0], [9.0, 9.0], [13.0, 15.0]])
    per_person = evpi(table)
    assert float(per_person) == pytest.approx(0.75, abs=1e-12)
    # 1000 persons a year for 3 years at 3.5%: 2899.6943 persons -> 0.75 x 2899.6943.
    population = per_person.scaled(discounted_population(1000, 3, 0.035))
    assert float(population) == pytest.approx(2174.7707, abs=1e-3)


@pytest.mark.parametrize(
    ("args", "where"),
    [((-1.0, 3, 0.035), "population_per_year"), ((10.0, 0, 0.035), "decision_years"),
     ((10.0, 3, 1.0), "discount_rate"), ((10.0, 2.5, 0.0), "decision_years")],
)  # fmt: skip
def test_population_inputs_are_checked(args, where):
    with pytest.raises(ModelError, match=where):
        discounted_population(*args)


@pytest.fixture(scope="module")
def demo_psa():
    model = load_model(DEMO)
    return model, analyse_uncertainty(model, 150, seed=7)


def test_population_table_scales_the_per_person_values(demo_psa):
    _, psa = demo_psa
    evppi = psa.evppi()
    table = psa.population_value_of_information(2000, 5, 0.035, evppi=evppi)
    persons = discounted_population(2000, 5, 0.035)
    info = psa.evpi()
    assert table["per_person"].iloc[0] == info["evpi"]
    assert table["per_person"].iloc[1] == info["evpi_among_candidates"]
    assert len(table) == 2 + len(evppi)
    np.testing.assert_allclose(table["population"], table["per_person"] * persons)
    assert (table["persons"] == persons).all()


def test_strategy_summary_equals_the_draws(demo_psa):
    _, psa = demo_psa
    summary = psa.strategy_summary(reference="never treat")
    draws = psa.draws_frame()
    names = psa.candidate_names
    assert list(summary["strategy"][: len(names)]) == names
    for k, name in enumerate(names):
        row = summary.iloc[k]
        cost, qalys = draws[f"cost: {name}"], draws[f"qalys: {name}"]
        assert row["mean_cost"] == pytest.approx(cost.mean(), rel=1e-12)
        assert row["mean_qalys"] == pytest.approx(qalys.mean(), rel=1e-12)
        assert (row["cost_low"], row["cost_high"]) == pytest.approx(
            tuple(np.percentile(cost, [2.5, 97.5]))
        )
        # ICER: ratio of the mean differences against the reference (Cantor 1994, Med
        # Decis Making 14(3):259-265; common practice for probabilistic means).
        d_cost = (cost - draws["cost: never treat"]).mean()
        d_qalys = (qalys - draws["qalys: never treat"]).mean()
        if name == "never treat":
            assert np.isnan(row["icer"]) and row["incremental_cost"] == 0
        else:
            assert row["icer"] == pytest.approx(d_cost / d_qalys, rel=1e-9)
    assert summary["probability_best"].iloc[: len(names)].sum() == pytest.approx(1.0)
    last = summary.iloc[-1]
    assert last["mean_cost"] == pytest.approx(draws["optimal_cost"].mean(), rel=1e-12)


def test_unknown_reference_is_refused(demo_psa):
    _, psa = demo_psa
    with pytest.raises(ModelError, match="reference"):
        psa.strategy_summary(reference="nope")


def test_plane_frame_holds_each_candidate_draw(demo_psa):
    _, psa = demo_psa
    plane = psa.plane_frame(max_draws=40)
    assert len(plane) == 40 * len(psa.candidate_names)
    first = plane[plane["strategy"] == psa.candidate_names[1]]
    np.testing.assert_array_equal(first["cost"], psa.candidate_totals[0, :40, 1])


def test_parameters_held_fixed_are_listed(demo_psa):
    model, psa = demo_psa
    expected = {n for n, p in model.parameters.items() if p.distribution is None}
    assert set(psa.fixed_parameters) == expected and expected
    assert not set(psa.fixed_parameters) & set(psa.parameter_names)
    assert psa.summary()["parameters_held_fixed"] == list(psa.fixed_parameters)


def test_icer_interval_by_bootstrap_of_the_draws(demo_psa):
    _, psa = demo_psa
    summary = psa.strategy_summary(reference="never treat")
    again = psa.strategy_summary(reference="never treat")
    # Same seed, same resamples: the interval is reproducible.
    np.testing.assert_array_equal(summary["icer_low"], again["icer_low"])
    rows = summary[summary["icer_low"].notna()]
    assert len(rows)  # the demo's treating policies gain QALYs in every resample
    # The ratio of the means lies inside its bootstrap percentile interval (Briggs,
    # Wonderling & Mooney 1997, Health Econ 6:327-340, from memory).
    assert (rows["icer_low"] <= rows["icer"]).all() and (rows["icer"] <= rows["icer_high"]).all()
    reference = summary.set_index("strategy").loc["never treat"]
    assert np.isnan(reference["icer_low"]) and np.isnan(reference["icer_high"])


def test_icer_bootstrap_equals_resampling_the_draws_one_resample_at_a_time():
    # Non-parametric bootstrap of the ratio of mean differences (Briggs, Wonderling &
    # Mooney 1997, Health Econ 6:327-340, from memory), written out plainly: draw D row
    # indices with replacement, take the mean differences of those rows, their ratio; the
    # percentile interval of the B ratios. The batched weights must give the same
    # resamples in the same order (same generator, same stream of indices).
    from caredecide.uncertainty.psa import ICER_BOOTSTRAP, _icer_interval

    rng = np.random.default_rng(5)
    D = 300
    d_qalys = np.column_stack([np.zeros(D), rng.normal(0.4, 0.3, D), rng.normal(0.0, 1.0, D)])
    d_cost = np.column_stack([np.zeros(D), rng.normal(8000, 3000, D), rng.normal(0, 10, D)])
    low, high = _icer_interval(d_cost, d_qalys, 0, 0.9, seed=7)

    plain = np.random.default_rng(np.random.SeedSequence([7, 1997]))
    ratios, q_means = [], []
    for _ in range(ICER_BOOTSTRAP):
        rows = plain.integers(0, D, size=D)
        q_means.append(d_qalys[rows].mean(axis=0))
        with np.errstate(divide="ignore", invalid="ignore"):  # the reference column: 0 / 0
            ratios.append(d_cost[rows].mean(axis=0) / q_means[-1])
    ratios_table = np.array(ratios)
    assert np.isnan(low[0]) and np.isnan(high[0])  # the reference
    # Column 1 gains QALYs in every resample: bounded, the 5th and 95th percentiles.
    expected = np.percentile(ratios_table[:, 1], [5, 95])
    np.testing.assert_allclose([low[1], high[1]], expected, rtol=1e-12)
    # Column 2's mean QALY difference straddles 0 across resamples: no interval.
    q_low, q_high = np.percentile(np.array(q_means)[:, 2], [5, 95])
    assert q_low < 0 < q_high and np.isnan(low[2]) and np.isnan(high[2])
