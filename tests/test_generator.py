"""The synthetic cohort generator: reproducibility, invariants, the process it simulates,
the committed sample and its data dictionary."""

from __future__ import annotations

import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from synthetic_cohort import generator
from synthetic_cohort.generator import (
    DATA_DICTIONARY,
    PATIENT_COLUMNS,
    VISIT_COLUMNS,
    CohortDesign,
    fully_observed_design,
    generate_cohort,
    progressive_rates,
)

DATA_DIR = Path(generator.__file__).resolve().parent / "data"


def test_same_seed_gives_identical_cohort():
    first = generate_cohort(n_patients=150, seed=11)
    second = generate_cohort(n_patients=150, seed=11)
    pd.testing.assert_frame_equal(first[0], second[0])
    pd.testing.assert_frame_equal(first[1], second[1])


def test_different_seed_gives_different_cohort():
    patients_a, _ = generate_cohort(n_patients=50, seed=11)
    patients_b, _ = generate_cohort(n_patients=50, seed=12)
    assert not np.allclose(patients_a["baseline_age"], patients_b["baseline_age"])


def test_larger_cohort_starts_with_the_same_patients():
    # One random stream per full chunk of CHUNK_PATIENTS: adding patients leaves the
    # earlier chunks unchanged.
    chunk = generator.CHUNK_PATIENTS
    small, _ = generate_cohort(n_patients=chunk, seed=5)
    large, _ = generate_cohort(n_patients=chunk + 10, seed=5)
    pd.testing.assert_frame_equal(small, large.iloc[:chunk].reset_index(drop=True))
    assert large["patient_id"].is_unique


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 60))
def test_records_are_consistent(seed, n):
    patients, visits = generate_cohort(n_patients=n, seed=seed)
    assert list(patients.columns) == list(PATIENT_COLUMNS)
    assert list(visits.columns) == list(VISIT_COLUMNS)
    assert len(patients) == n
    assert patients["patient_id"].str.fullmatch(r"SYN-\d{5}").all()
    # Exactly one of death / censoring ends each patient's follow-up.
    assert (patients["death_years"].notna() ^ patients["censor_years"].notna()).all()
    assert set(visits["patient_id"]) == set(patients["patient_id"])
    merged = visits.merge(patients, on="patient_id")
    end = merged["death_years"].fillna(merged["censor_years"])
    assert (merged["years_since_entry"] <= end).all()
    groups = visits.groupby("patient_id", sort=False)
    assert (groups["years_since_entry"].min() == 0).all()
    assert (groups["years_since_entry"].diff().dropna() > 0).all()
    # Progressive default process: the observed stage never goes back; treatment never stops.
    stage_number = visits["stage"].str.removeprefix("stage_").astype(int)
    assert (stage_number.groupby(visits["patient_id"]).diff().dropna() >= 0).all()
    assert (visits["treated"].groupby(visits["patient_id"]).diff().dropna() >= 0).all()
    first_treated = visits[visits["treated"] == 1].groupby("patient_id")["years_since_entry"].min()
    starts = patients.set_index("patient_id")["treatment_start_years"].dropna()
    pd.testing.assert_series_equal(
        first_treated.sort_index(), starts.sort_index(), check_names=False
    )


def _state_after_one_year(design: CohortDesign, n: int, seed: int) -> np.ndarray:
    """Shares in each stage and dead at t = 1 year (regular yearly visits, no censoring)."""
    patients, visits = generate_cohort(design, n_patients=n, seed=seed)
    at_one = visits[visits["years_since_entry"] == 1.0]
    stages = at_one["stage"].value_counts().reindex(list(design.stage_ids), fill_value=0)
    dead = (patients["death_years"] < 1.0).sum()
    return np.append(stages.to_numpy(), dead) / n


def test_simulated_process_matches_the_matrix_exponential():
    # Source: Welton & Ades 2005, Med Decis Making 25(6):633-645; Jones, Epstein &
    # Garcia-Mochon 2017, Value in Health (from memory; worked by hand): progressive
    # 1 -> 2 -> 3 with l12 = 0.1, l13 = 0.05, l23 = 0.2 gives row 1 of
    # expm(Q) = 0.860708 / 0.083954 / 0.055338.
    design = fully_observed_design(
        progressive_rates([0.1], [0.05, 0.2]), (1.0, 0.0), follow_up_years=2.0
    )
    n = 20_000
    shares = _state_after_one_year(design, n, seed=7)
    expected = np.array([0.860708, 0.083954, 0.055338])
    # Each share is a binomial proportion: 4 standard errors (false alarm ~ 6e-5 each).
    tolerance = 4 * np.sqrt(expected * (1 - expected) / n)
    assert np.all(np.abs(shares - expected) <= tolerance), (shares, expected, tolerance)


def _one_stage(death_rate: float, **changes) -> CohortDesign:
    """One alive stage, untreated, all entering together, no drop-out unless changed."""
    fixed = {
        "rates": progressive_rates([], [death_rate]),
        "stage_ids": ("stage_1",),
        "start_shares": (1.0,),
        "follow_up_years": 10.0,
        "staggered_entry_years": 0.0,
        "dropout_rate": 0.0,
        "treat_from_stage": None,
    }
    return CohortDesign(**(fixed | changes))


def test_age_dependent_death_follows_the_gompertz_survival():
    # Gompertz hazard c e^{g t} from entry: S(t) = exp(-c (e^{g t} - 1) / g)
    # (Bowers et al. 1997, Actuarial Mathematics, Gompertz law; from memory).
    c, g, age = 0.05, 0.1, 70.0
    design = _one_stage(
        c, death_age_slope=g, reference_age=age, baseline_age_mean=age, baseline_age_sd=0.0
    )
    n = 20_000
    patients, _ = generate_cohort(design, n_patients=n, seed=3)
    t = 5.0
    expected = np.exp(-c * np.expm1(g * t) / g)  # 0.7355... alive at 5 years
    observed = (patients["death_years"].isna() | (patients["death_years"] > t)).mean()
    assert abs(observed - expected) <= 4 * np.sqrt(expected * (1 - expected) / n)


def test_dropout_censors_at_the_exponential_rate():
    # No deaths or progression: follow-up ends by drop-out (rate 0.2/yr) or at 4 years,
    # so P(censored before 4 years) = 1 - exp(-0.8) = 0.550671 (Fleurence & Hollenbeak 2007).
    design = _one_stage(0.0, follow_up_years=4.0, dropout_rate=0.2)
    n = 20_000
    patients, _ = generate_cohort(design, n_patients=n, seed=9)
    assert patients["death_years"].isna().all()
    early = (patients["censor_years"] < 4.0).mean()
    expected = 0.550671
    assert abs(early - expected) <= 4 * np.sqrt(expected * (1 - expected) / n)


def test_treatment_scales_progression_but_not_death():
    # Everyone starts treatment at the entry visit (stage_1 eligible, probability 1): the
    # stage_1 exit rates are then 0.5 x 0.6 = 0.3 (progression) and 0.1 (death, unchanged),
    # so after one year stage_1 holds exp(-0.4) = 0.670320 and the deaths straight from
    # stage_1 are 0.1 / 0.4 x (1 - exp(-0.4)) = 0.082420 (competing exponential risks;
    # Fleurence & Hollenbeak 2007, p = 1 - exp(-r t)). Stage_2 has no death, so these are
    # all deaths within the year.
    design = fully_observed_design(
        progressive_rates([0.5], [0.1, 0.0]), (1.0, 0.0), follow_up_years=1.0
    )
    design = replace(design, treatment_hazard_ratio=0.6, treat_from_stage=0, treat_probability=1)
    n = 20_000
    patients, visits = generate_cohort(design, n_patients=n, seed=13)
    assert (patients["treatment_start_years"] == 0.0).all()
    assert (visits["treated"] == 1).all()
    shares = _state_after_one_year(design, n, seed=13)
    expected = np.array([np.exp(-0.4), 0.0, 0.25 * -np.expm1(-0.4)])
    expected[1] = 1 - expected[0] - expected[2]
    tolerance = 4 * np.sqrt(expected * (1 - expected) / n)  # binomial, 4 standard errors
    assert np.all(np.abs(shares - expected) <= tolerance), (shares, expected, tolerance)


def test_command_line_writes_the_committed_sample(tmp_path):
    generator.main(["--seed", "2026", "--patients", "300", "--out", str(tmp_path)])
    for name in ("patients.csv", "visits.csv", "data_dictionary.csv"):
        assert (tmp_path / name).read_bytes() == (DATA_DIR / name).read_bytes(), name


def _dictionary_tables(text: str) -> dict[str, dict[str, str]]:
    """Column -> meaning listed under each ``## `file.csv` `` heading of the data dictionary."""
    tables: dict[str, dict[str, str]] = {}
    current = None
    for line in text.splitlines():
        heading = re.fullmatch(r"## `(\w+\.csv)`", line.strip())
        if heading:
            current = tables.setdefault(heading.group(1), {})
        elif current is not None and (cell := re.match(r"\| `(\w+)` \| (.*) \|$", line)):
            current[cell.group(1)] = cell.group(2)
    return tables


def test_data_dictionary_columns_match_the_files():
    readme = (DATA_DIR / "README.md").read_text()
    tables = _dictionary_tables(readme)
    assert set(tables) == {"patients.csv", "visits.csv"}
    written = pd.read_csv(DATA_DIR / "data_dictionary.csv")
    for name, columns in tables.items():
        header = (DATA_DIR / name).read_text().splitlines()[0].split(",")
        assert list(columns) == header, name
        # The README, the generator and the written dictionary say the same thing.
        assert columns == DATA_DICTIONARY[name], name
        rows = written[written["file"] == name]
        assert dict(zip(rows["column"], rows["meaning"], strict=True)) == columns, name
    assert "SYNTHETIC DATA" in readme


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"rates": np.zeros((3, 3))}, "rates must have shape"),
        ({"rates": progressive_rates([-0.1, 0.2], [0.1, 0.1, 0.1])}, ">= 0 off the diagonal"),
        ({"rates": np.ones((4, 4))}, "death (last row of rates) is absorbing"),
        ({"start_shares": (0.5, 0.2, 0.2)}, "start_shares"),
        ({"visit_gap_mean": 0.0}, "visit_gap_mean"),
        ({"death_age_slope": -0.1}, "death_age_slope must be >= 0"),
    ],
)
def test_design_rejects_bad_values(change, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        CohortDesign(**change)


def test_progressive_rates_checks_lengths():
    with pytest.raises(ValueError, match="progression needs 2 rates for 3 stages"):
        progressive_rates([0.1], [0.1, 0.1, 0.1])


def test_cohort_needs_a_patient():
    with pytest.raises(ValueError, match="n_patients must be >= 1"):
        generate_cohort(n_patients=0)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--patients", "0"], "--patients must be >= 1, got 0"),
        (["--seed", "-1"], "--seed must be a whole number >= 0, got -1"),
    ],
)
def test_command_line_rejects_bad_values(tmp_path, capsys, argv, message):
    with pytest.raises(SystemExit) as exit_info:
        generator.main([*argv, "--out", str(tmp_path)])
    assert exit_info.value.code == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "patients.csv").exists()
