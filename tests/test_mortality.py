"""Background mortality: Gompertz-Makeham and life tables."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from caredecide.errors import ModelError
from caredecide.model import MortalitySpec
from caredecide.mortality import (
    background_probability,
    gompertz_makeham_q,
    life_table_q,
    read_life_table,
)
from synthetic_cohort import MODELS_DIR

# Illustrative Life Table constants (Bowers et al. 1997, Actuarial Mathematics; from memory).
A, B, C = 0.0007, 5e-5, 10**0.04


def test_gompertz_makeham_matches_illustrative_life_table():
    q = gompertz_makeham_q(A, B, C, np.array([30.0, 60.0, 90.0]))
    # Source: Bowers et al. 1997, Actuarial Mathematics 2nd ed., Illustrative Life Table
    # (Makeham law A = 0.0007, B = 0.00005, c = 10^0.04; values from memory).
    np.testing.assert_allclose(q, [0.0015289, 0.0137604, 0.188774], atol=5e-7)


def test_gompertz_makeham_two_half_years_compose_to_one_year():
    # Survival multiplies over consecutive intervals (common practice: S(x, x+1) =
    # S(x, x+0.5) S(x+0.5, x+1)).
    first = gompertz_makeham_q(A, B, C, 60.0, 0.5)
    second = gompertz_makeham_q(A, B, C, 60.5, 0.5)
    whole = gompertz_makeham_q(A, B, C, 60.0, 1.0)
    assert (1 - first) * (1 - second) == pytest.approx(1 - whole, rel=1e-12)


def test_life_table_reproduces_its_rows_and_splits_a_year_at_constant_hazard():
    ages = np.arange(50.0, 60.0)
    q = np.linspace(0.01, 0.05, ages.size)
    np.testing.assert_allclose(life_table_q(ages, q, ages, 1.0), q, rtol=1e-12)
    # Constant hazard within a year: half a year gives 1 - sqrt(1 - q) (Fleurence &
    # Hollenbeak 2007: p_new = 1 - (1 - p)^(t_new / t_old)).
    half = life_table_q(ages, q, ages, 0.5)
    np.testing.assert_allclose(half, 1 - np.sqrt(1 - q), rtol=1e-12)
    # Past the last row the last hazard continues.
    assert life_table_q(ages, q, 70.0, 1.0) == pytest.approx(q[-1], rel=1e-12)


def test_life_table_row_of_one_kills_everyone_reaching_it():
    ages = np.array([90.0, 91.0, 92.0])
    q = np.array([0.2, 0.3, 1.0])
    out = life_table_q(ages, q, np.array([91.5, 92.0, 95.0]), 1.0)
    np.testing.assert_array_equal(out, [1.0, 1.0, 1.0])


@given(st.floats(0.0, 0.5), st.floats(0.0, 0.5), st.floats(0.05, 2.0))
def test_life_table_cycle_probabilities_compose(q1, q2, h):
    # Survival over [x, x + 2h] = survival over [x, x + h] x survival over [x + h, x + 2h]
    # (common practice: survival multiplies over consecutive intervals).
    ages = np.array([60.0, 61.0, 62.0])
    q = np.array([q1, q2, 0.4])
    both = life_table_q(ages, q, 60.0, 2 * h)
    first = life_table_q(ages, q, 60.0, h)
    second = life_table_q(ages, q, 60.0 + h, h)
    assert 1 - both == pytest.approx((1 - first) * (1 - second), rel=1e-9, abs=1e-12)


def test_demo_life_table_reads_and_matches_its_law():
    ages, q = read_life_table(MODELS_DIR / "demo_life_table.csv")
    assert ages[0] == 40 and ages[-1] == 110 and q[-1] == 1.0
    # The synthetic table was generated from the same constants, rounded to 6 decimals.
    np.testing.assert_allclose(q[:-1], gompertz_makeham_q(A, B, C, ages[:-1]), atol=5e-7)


def test_background_probability_uses_the_spec():
    spec = MortalitySpec(gompertz_makeham=(A, B, C))
    np.testing.assert_allclose(
        background_probability(spec, np.array([30.0]), 1.0), [0.0015289], atol=5e-7
    )


def test_life_table_with_wrong_columns_names_file_and_columns(tmp_path):
    path = tmp_path / "life.csv"
    path.write_text("age,qx\n50,0.01\n")
    with pytest.raises(ModelError) as info:
        read_life_table(path)
    message = str(info.value)
    assert "life.csv" in message and "'qx'" in message and "annual_probability" in message


def test_life_table_probability_outside_unit_interval_names_row_and_value(tmp_path):
    path = tmp_path / "life.csv"
    path.write_text("age,annual_probability\n50,0.01\n51,1.5\n")
    with pytest.raises(ModelError) as info:
        read_life_table(path)
    assert "row 3 (age 51)" in str(info.value) and "1.5" in str(info.value)


def test_life_table_with_a_gap_in_ages_names_the_ages(tmp_path):
    path = tmp_path / "life.csv"
    path.write_text("age,annual_probability\n50,0.01\n52,0.02\n")
    with pytest.raises(ModelError, match="got 50 then 52"):
        read_life_table(path)
