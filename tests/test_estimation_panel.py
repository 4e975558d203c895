"""Maximum-likelihood rates from panel data: closed forms, agreement with the count-based
estimator, interval coverage over repeated synthetic cohorts, and errors."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.conversions import generator_to_transition
from caredecide.errors import ModelError
from caredecide.estimation import (
    estimate_counts,
    estimate_panel,
    records_from_frames,
    transition_structure,
)
from caredecide.estimation.panel import _Intervals, interval_likelihoods, numerical_hessian
from synthetic_cohort.generator import (
    CohortDesign,
    fully_observed_design,
    generate_cohort,
    progressive_rates,
)


def one_stage_records(years: list[float], ends: list[str]) -> object:
    """Patients seen in stage_1 at entry, then dead (exact), censored or seen alive."""
    visits, patients = [], []
    for index, (t, end) in enumerate(zip(years, ends, strict=True)):
        pid = f"SYN-{index:04d}"
        visits.append((pid, 0.0, "stage_1"))
        if end == "seen":
            visits.append((pid, t, "stage_1"))
        patients.append((pid, t if end == "death" else np.nan, t if end == "censor" else np.nan))
    return records_from_frames(
        pd.DataFrame(visits, columns=["patient_id", "years_since_entry", "stage"]),
        pd.DataFrame(patients, columns=["patient_id", "death_years", "censor_years"]),
    )


def test_exact_deaths_and_censoring_give_the_exponential_mle():
    # Constant hazard with exact event times: mu = deaths / person-years, and the observed
    # information d / mu^2 gives se(log mu) = 1 / sqrt(d) (exponential survival MLE;
    # Collett 2015, Modelling Survival Data in Medical Research, ch. 5; from memory).
    # A death at the visit time itself (0 years) contributes the hazard mu and no time.
    years = [0.5, 1.0, 2.0, 3.0, 1.5, 4.0, 2.5, 0.0]
    ends = ["death", "death", "censor", "death", "censor", "censor", "death", "death"]
    estimate = estimate_panel(one_stage_records(years, ends))
    deaths, person_years = 5, sum(years)  # 14.5
    assert estimate.rates()[0] == pytest.approx(deaths / person_years, rel=1e-6)
    assert estimate.standard_errors()[0] == pytest.approx(1 / np.sqrt(deaths), rel=1e-4)
    assert estimate.n_exact_deaths == 5 and estimate.n_censored == 3


def test_panel_status_only_gives_the_rate_from_the_survival_proportion():
    # Everyone seen again after exactly 2 years, 7 of 10 alive: P(alive) = exp(-2 mu) = 0.7,
    # mu = -ln(0.7) / 2 = 0.1783375 (Fleurence & Hollenbeak 2007, r = -ln(1 - p) / t).
    # Deaths recorded at the visit (no exact time) enter as P_alive,dead(2).
    visits = []
    for index in range(10):
        pid = f"SYN-{index:04d}"
        visits += [(pid, 0.0, "stage_1"), (pid, 2.0, "stage_1" if index < 7 else "dead")]
    frame = pd.DataFrame(visits, columns=["patient_id", "years_since_entry", "stage"])
    estimate = estimate_panel(records_from_frames(frame))
    assert estimate.rates()[0] == pytest.approx(0.1783375, rel=1e-6)


@pytest.mark.parametrize("structure", ["forward", "any"])
def test_eigen_and_matrix_exponential_paths_agree(structure):
    # "any" allows moves back, so Q may have complex eigenvalue pairs.
    records = records_from_frames(*reversed(generate_cohort(n_patients=60, seed=1)))
    allowed = transition_structure(3, structure)
    size = records.n_states
    target = np.where(
        records.end_kind == 0, records.end_state, np.where(records.end_kind == 1, size, size + 1)
    )
    intervals = _Intervals(records.treated.astype(int), records.start_state, target, records.years)
    theta = np.random.default_rng(2).normal(-1.5, 0.7, size=(3, int(allowed.sum()) + 1))
    eigen = interval_likelihoods(theta, allowed, True, intervals, method="eigen")
    expm = interval_likelihoods(theta, allowed, True, intervals, method="expm")
    np.testing.assert_allclose(eigen, expm, rtol=1e-10, atol=1e-14)
    assert np.all(eigen > 0)


def test_equal_exit_rates_fall_back_to_the_matrix_exponential():
    # Stage 1 and stage 2 with the same total exit rate make Q defective (a Jordan block):
    # the eigenvector matrix is singular and "auto" must use expm.
    allowed = transition_structure(2, "progressive")
    theta = np.log([[0.2, 0.1, 0.3]])  # exits: stage_1 0.2 + 0.1, stage_2 0.3
    intervals = _Intervals(np.zeros(2, int), np.zeros(2, int), np.array([1, 2]), np.ones(2))
    auto = interval_likelihoods(theta, allowed, False, intervals)
    q = np.array([[-0.3, 0.2, 0.1], [0.0, -0.3, 0.3], [0.0, 0.0, 0.0]])
    p = scipy.linalg.expm(q)
    np.testing.assert_allclose(auto[0], [p[0, 1], p[0, 2]], rtol=1e-12)


def test_numerical_hessian_of_a_quadratic_is_exact():
    matrix = np.array([[2.0, 0.5, 0.0], [0.5, 3.0, -1.0], [0.0, -1.0, 4.0]])

    def quadratic(points):
        return 0.5 * np.einsum("bi,ij,bj->b", points, matrix, points)

    np.testing.assert_allclose(numerical_hessian(quadratic, np.array([0.3, -1.0, 2.0])), matrix)


def _regular_design(rates: np.ndarray) -> CohortDesign:
    return fully_observed_design(rates, (0.5, 0.3, 0.2), follow_up_years=5.0)


def test_fully_observed_panel_matches_the_count_estimator_exactly():
    # Yearly visits, no censoring inside a year, deaths recorded at the next yearly visit:
    # the panel likelihood is prod P_ij(1)^n_ij, maximised over embeddable P, so when the
    # count estimate P^ = n_ij / n_i has a valid generator (logm(P^) with non-negative
    # off-diagonals: checked below), the MLE is Q^ = logm(P^) and expm(Q^) = P^
    # (Kalbfleisch & Lawless 1985, section 3). Tolerance 1e-6: optimiser convergence.
    rates = progressive_rates([0.3, 0.25], [0.05, 0.1, 0.2])
    rates[0, 2] = 0.1  # a skip: "forward" structure
    patients, visits = generate_cohort(_regular_design(rates), n_patients=1500, seed=4)
    last = visits.groupby("patient_id")["years_since_entry"].max()
    died = patients.set_index("patient_id")["death_years"].dropna()
    death_rows = pd.DataFrame(
        {
            "patient_id": died.index,
            "years_since_entry": last[died.index].to_numpy() + 1.0,
            "stage": "dead",
            "treated": 0,
        }
    )
    records = records_from_frames(pd.concat([visits, death_rows], ignore_index=True))
    (counts,) = estimate_counts(records)
    log_p = scipy.linalg.logm(counts.probabilities())
    assert np.all(log_p[~np.eye(4, dtype=bool)] > -1e-12)  # embeddable
    panel = estimate_panel(records, structure="forward")
    np.testing.assert_allclose(panel.transition_matrix(1.0), counts.probabilities(), atol=1e-6)


def test_exact_death_times_agree_with_counts_within_sampling_error():
    # With exact death times the panel estimator uses more information than counts, so
    # the two differ by sampling error only. Both are consistent for P(1 year); the
    # efficient MLE has var(counts - panel) ~ var(counts) - var(panel) <= var(counts)
    # (Hausman 1978, Econometrica 46:1251-1271), so each entry is within 4 Dirichlet
    # standard errors of the count estimate (false alarm < 1e-4 per entry).
    rates = progressive_rates([0.3, 0.25], [0.05, 0.1, 0.2])
    patients, visits = generate_cohort(_regular_design(rates), n_patients=1500, seed=8)
    records = records_from_frames(visits, patients)
    (counts,) = estimate_counts(records)
    panel = estimate_panel(records)
    difference = np.abs(panel.transition_matrix(1.0)[:-1] - counts.probabilities()[:-1])
    assert np.all(difference <= 4 * counts.standard_errors() + 1e-12)


TRUE_DESIGN = (
    CohortDesign()
)  # default synthetic scenario: rates 0.30, 0.25; deaths 0.02, 0.05, 0.15; HR 0.6
TRUE_LOG_PARAMETERS = np.log([0.30, 0.02, 0.25, 0.05, 0.15, 0.6])


@pytest.mark.slow
def test_wald_intervals_cover_the_true_rates_at_the_nominal_rate():
    # 40 synthetic cohorts of 250 patients from known rates (5 rates + hazard ratio).
    # Coverage per parameter is Binomial(40, 0.95) if the intervals are right; the 6
    # parameters of one cohort are nearly independent, so the pooled coverage of 240
    # intervals has sd ~ sqrt(0.95 x 0.05 / 240) = 0.0141; we allow 3 sd = 0.042 (and,
    # conservatively for residual dependence, no parameter may cover fewer than 33/40:
    # P(Binomial(40, 0.95) <= 32) = 0.0027). Seeds are fixed, so the test is
    # deterministic; these bounds say a correct estimator passes for almost every seed.
    replications, hits = 40, []
    for seed in range(replications):  # loop over replications, not states
        patients, visits = generate_cohort(TRUE_DESIGN, n_patients=250, seed=1000 + seed)
        estimate = estimate_panel(records_from_frames(visits, patients))
        low, high = estimate.confidence_intervals(0.95)
        truth = np.exp(TRUE_LOG_PARAMETERS)
        hits.append((low <= truth) & (truth <= high))
    hits = np.array(hits)
    assert abs(hits.mean() - 0.95) <= 0.042, hits.mean(axis=0)
    assert hits.sum(axis=0).min() >= 33, hits.sum(axis=0)


def test_estimates_are_close_to_the_truth_on_the_committed_sample():
    from pathlib import Path

    from synthetic_cohort import generator

    data = Path(generator.__file__).parent / "data"
    records = records_from_frames(
        pd.read_csv(data / "visits.csv"), pd.read_csv(data / "patients.csv")
    )
    estimate = estimate_panel(records)
    z = (estimate.log_parameters - TRUE_LOG_PARAMETERS) / estimate.standard_errors()
    assert np.all(np.abs(z) < 3.5), z  # invented true values: data/README.md
    assert estimate.converged


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 10_000), cycle=st.sampled_from([0.25, 1.0, 2.0]))
def test_sampled_transition_matrices_are_stochastic(seed, cycle):
    patients, visits = generate_cohort(n_patients=120, seed=seed)
    estimate = estimate_panel(records_from_frames(visits, patients), treatment_effect=False)
    draws = estimate.sample_transition_matrices(np.random.default_rng(seed), 50, cycle)
    assert draws.shape == (50, 4, 4)
    np.testing.assert_allclose(draws.sum(axis=-1), 1.0, atol=1e-12)
    assert np.all(draws >= 0)
    np.testing.assert_allclose(
        estimate.transition_matrix(cycle), generator_to_transition(estimate.generator(), cycle)
    )


def test_draws_for_probabilistic_analysis_follow_the_asymptotic_normal():
    # The draws of the log parameters are N(theta^, inverse observed information) (Wald
    # asymptotics, common practice): sample means within 4 standard errors of theta^,
    # sample covariance within 4 standard errors of each entry (the variance of a sample
    # covariance is (s_ij^2 + s_ii s_jj) / n for normal data; common practice).
    patients, visits = generate_cohort(n_patients=300, seed=21)
    estimate = estimate_panel(records_from_frames(visits, patients))
    cov = estimate.covariance
    assert np.all(np.isfinite(cov))
    n = 20_000
    draws = estimate.sample_log_parameters(np.random.default_rng(3), n)
    sd = np.sqrt(np.diag(cov))
    assert np.all(np.abs(draws.mean(axis=0) - estimate.log_parameters) <= 4 * sd / np.sqrt(n))
    sample = np.cov(draws, rowvar=False)
    bound = 4 * np.sqrt((cov**2 + np.outer(np.diag(cov), np.diag(cov))) / n)
    assert np.all(np.abs(sample - cov) <= bound)
    # Correlations are kept: the fitted rates are not independent.
    assert np.abs(cov[~np.eye(cov.shape[0], dtype=bool)]).max() > 0.01 * sd.max() ** 2


def test_treated_generator_scales_only_stage_to_stage_rates():
    patients, visits = generate_cohort(n_patients=200, seed=5)
    estimate = estimate_panel(records_from_frames(visits, patients))
    untreated, treated = estimate.generator(False), estimate.generator(True)
    hr = estimate.hazard_ratio()
    np.testing.assert_allclose(treated[:3, 3], untreated[:3, 3])  # death rates unchanged
    np.testing.assert_allclose(treated[[0, 1], [1, 2]], hr * untreated[[0, 1], [1, 2]])
    np.testing.assert_allclose(treated.sum(axis=1), 0.0, atol=1e-12)
    table = estimate.table()
    assert list(table["parameter"]) == [
        "rate stage_1 -> stage_2",
        "rate stage_1 -> dead",
        "rate stage_2 -> stage_3",
        "rate stage_2 -> dead",
        "rate stage_3 -> dead",
        "hazard ratio on treatment",
    ]


def test_transition_structures():
    np.testing.assert_array_equal(
        transition_structure(2, "progressive"),
        [[False, True, True], [False, False, True], [False, False, False]],
    )
    np.testing.assert_array_equal(
        transition_structure(2, "any"),
        [[False, True, True], [True, False, True], [False, False, False]],
    )


# --- errors -------------------------------------------------------------------------


def test_unknown_structure_is_an_error():
    with pytest.raises(ModelError, match="transition structure 'backward' is unknown"):
        transition_structure(3, "backward")


def test_impossible_observed_transition_is_an_error():
    frame = pd.DataFrame(
        {
            "patient_id": ["SYN-1", "SYN-1"],
            "years_since_entry": [0.0, 1.0],
            "stage": ["stage_2", "stage_1"],
        }
    )
    with pytest.raises(
        ModelError, match=r"observed transition stage_2 -> stage_1 \(patient SYN-1; 1 such"
    ):
        estimate_panel(records_from_frames(frame), structure="progressive")
    assert estimate_panel(records_from_frames(frame), structure="any").converged


def test_treatment_effect_needs_treated_intervals():
    records = one_stage_records([1.0, 2.0], ["death", "censor"])
    with pytest.raises(ModelError, match="a treatment effect was requested but no interval"):
        estimate_panel(records, treatment_effect=True)


def test_allowed_matrix_must_fit_the_states():
    records = one_stage_records([1.0, 2.0], ["death", "censor"])
    with pytest.raises(
        ModelError, match=r"allowed transitions have shape \(3, 3\); expected \(2, 2\)"
    ):
        estimate_panel(records, allowed=np.ones((3, 3), dtype=bool))


def test_records_without_intervals_are_an_error():
    frame = pd.DataFrame(
        {"patient_id": ["SYN-1"], "years_since_entry": [0.0], "stage": ["stage_1"]}
    )
    with pytest.raises(ModelError, match="no observation intervals"):
        estimate_panel(records_from_frames(frame))


def test_a_rate_without_events_gets_no_standard_error():
    # Nobody dies: the likelihood rises toward rate 0, so no Wald interval exists.
    estimate = estimate_panel(one_stage_records([1.0, 2.0, 3.0], ["censor"] * 3))
    assert estimate.rates()[0] < 1e-6
    assert np.isnan(estimate.standard_errors()[0])
    assert "no events seen" in estimate.message
    draws = estimate.sample_transition_matrices(np.random.default_rng(0), 5)
    np.testing.assert_allclose(draws[:, 0, 0], 1.0, atol=1e-5)


@settings(max_examples=5, deadline=None)
@given(scale=st.floats(0.1, 12.0), seed=st.integers(0, 1000))
def test_changing_the_time_unit_rescales_the_rates(scale, seed):
    # Measuring time in other units (x scale) divides every rate by scale and leaves the
    # hazard ratio and the log-scale standard errors unchanged (invariance of the MLE).
    patients, visits = generate_cohort(n_patients=150, seed=seed)
    base = estimate_panel(records_from_frames(visits, patients))
    visits = visits.assign(years_since_entry=visits["years_since_entry"] * scale)
    patients = patients.assign(
        death_years=patients["death_years"] * scale, censor_years=patients["censor_years"] * scale
    )
    scaled = estimate_panel(records_from_frames(visits, patients))
    # Rates seen with no events sit at the lower bound in both fits: compare the others.
    finite = np.isfinite(base.standard_errors())
    shift = np.zeros(base.log_parameters.size)
    shift[: base.n_rates] = np.log(scale)
    np.testing.assert_allclose(
        scaled.log_parameters[finite], (base.log_parameters - shift)[finite], atol=2e-4
    )
    np.testing.assert_allclose(
        scaled.standard_errors()[finite], base.standard_errors()[finite], rtol=1e-3
    )
    assert scaled.log_likelihood == pytest.approx(
        base.log_likelihood - base.n_exact_deaths * np.log(scale), rel=1e-6
    )


def test_panel_recovers_the_rates_of_a_generated_cohort_with_irregular_visits():
    # The same generated cohort as the count test: the panel MLE's log rates lie within
    # 3.5 standard errors of the generating rates (invented, synthetic_cohort defaults).
    design = CohortDesign(treat_from_stage=None)
    patients, visits = generate_cohort(design, n_patients=3000, seed=7)
    estimate = estimate_panel(records_from_frames(visits, patients), treatment_effect=False)
    z = (estimate.log_parameters - TRUE_LOG_PARAMETERS[:5]) / estimate.standard_errors()
    assert np.all(np.abs(z) < 3.5), z
