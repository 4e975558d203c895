"""Reading patient records into observation intervals, and one error test per rule."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from caredecide.errors import ModelError
from caredecide.estimation import load_records, records_from_frames
from caredecide.estimation import records as records_module
from caredecide.estimation.records import CENSORED, DEATH, OBSERVED


def visits_frame(**changes) -> pd.DataFrame:
    frame = pd.DataFrame(
        {
            "patient_id": ["SYN-1", "SYN-1", "SYN-1", "SYN-2", "SYN-2"],
            "years_since_entry": [0.0, 0.8, 2.0, 0.0, 1.1],
            "stage": ["stage_1", "stage_2", "stage_2", "stage_1", "stage_1"],
            "treated": [0, 0, 1, 0, 0],
        }
    )
    for column, (row, value) in changes.items():
        frame[column] = frame[column].astype(object)
        frame.loc[row, column] = value
    return frame


def patients_frame(**changes) -> pd.DataFrame:
    frame = pd.DataFrame(
        {
            "patient_id": ["SYN-1", "SYN-2"],
            "death_years": [2.5, np.nan],
            "censor_years": [np.nan, 3.0],
        }
    )
    for column, (row, value) in changes.items():
        frame[column] = frame[column].astype(object)
        frame.loc[row, column] = value
    return frame


def test_intervals_from_visits_and_patient_table():
    records = records_from_frames(visits_frame(), patients_frame())
    assert records.state_ids == ("stage_1", "stage_2", "dead")
    assert records.n_patients == 2
    # Visit pairs first (sorted by patient and time), then last visit -> death / censoring.
    np.testing.assert_array_equal(records.patient, [0, 0, 1, 0, 1])
    np.testing.assert_array_equal(records.start_state, [0, 1, 0, 1, 0])
    np.testing.assert_array_equal(records.end_state, [1, 1, 0, 2, -1])
    np.testing.assert_allclose(records.years, [0.8, 1.2, 1.1, 0.5, 1.9])
    np.testing.assert_array_equal(records.treated, [False, False, False, True, False])
    np.testing.assert_array_equal(records.end_kind, [OBSERVED, OBSERVED, OBSERVED, DEATH, CENSORED])


def test_unsorted_rows_give_the_same_intervals():
    shuffled = visits_frame().sample(frac=1.0, random_state=3)
    a = records_from_frames(visits_frame())
    b = records_from_frames(shuffled)
    np.testing.assert_array_equal(a.start_state, b.start_state)
    np.testing.assert_allclose(a.years, b.years)


def test_explicit_state_order_is_kept():
    records = records_from_frames(visits_frame(), states=["stage_1", "stage_2", "stage_3"])
    assert records.state_ids == ("stage_1", "stage_2", "stage_3", "dead")


def test_stage_10_sorts_after_stage_2():
    frame = visits_frame(stage=(2, "stage_10"))
    assert records_from_frames(frame).state_ids == ("stage_1", "stage_2", "stage_10", "dead")


def test_load_records_reads_the_committed_sample():
    from synthetic_cohort.generator import __file__ as generator_file

    data = __import__("pathlib").Path(generator_file).parent / "data"
    records = load_records(data / "visits.csv", data / "patients.csv")
    assert records.n_patients == 300
    assert records.state_ids == ("stage_1", "stage_2", "stage_3", "dead")
    assert "visits.csv" in records.source and "patients.csv" in records.source


# --- one test per validation rule: the message names the place, the value, the need ----


@pytest.mark.parametrize(
    ("visits", "expected"),
    [
        (visits_frame().drop(columns="stage"), r"missing column\(s\) \['stage'\]"),
        (visits_frame().iloc[:0], "no visit rows"),
        (
            visits_frame(patient_id=(1, " ")),
            "row 3, column patient_id: value ' '; expected a non-empty",
        ),
        (visits_frame(years_since_entry=(1, -1.0)), "row 3, column years_since_entry: value -1.0"),
        (
            visits_frame(years_since_entry=(1, "soon")),
            "row 3, column years_since_entry: value 'soon'",
        ),
        (visits_frame(stage=(4, "")), r"row 6, column stage: value ''; expected one of"),
        (visits_frame(treated=(0, 2)), "row 2, column treated: value 2; expected 0 or 1"),
        (visits_frame(years_since_entry=(1, 2.0)), "patient SYN-1 has two visits at 2.0 years"),
        (visits_frame(stage=(1, "dead")), "has a visit at 2.0 years after being recorded 'dead'"),
        (visits_frame(stage=(3, "dead")), "patient SYN-2 is 'dead' at the first visit"),
    ],
)
def test_bad_visits_are_reported(visits, expected):
    with pytest.raises(ModelError, match=expected) as error:
        records_from_frames(visits, visits_file="my_visits.csv")
    assert "my_visits.csv" in str(error.value)


def test_unknown_stage_with_explicit_states():
    with pytest.raises(ModelError, match=r"value 'stage_2'; expected one of \['stage_1', 'dead'\]"):
        records_from_frames(visits_frame(), states=["stage_1"])


def test_states_must_not_include_death():
    with pytest.raises(ModelError, match="include the death state 'dead'; list alive states only"):
        records_from_frames(visits_frame(), states=["stage_1", "dead"])


@pytest.mark.parametrize(
    ("patients", "expected"),
    [
        (patients_frame().drop(columns="censor_years"), r"missing column\(s\) \['censor_years'\]"),
        (patients_frame(death_years=(0, "never")), "row 2, column death_years: value 'never'"),
        (patients_frame(censor_years=(1, -2.0)), "row 3, column censor_years: value -2.0"),
        (
            patients_frame(censor_years=(0, 3.0)),
            "row 2, column censor_years: value 3.0; expected empty when death_years",
        ),
        (patients_frame(patient_id=(1, "SYN-1")), "patient SYN-1 appears 2 times"),
        (patients_frame(patient_id=(1, "SYN-9")), "patient SYN-2 has visits but no row here"),
        (
            patients_frame(death_years=(0, 1.0)),
            "patient SYN-1, column death_years: value 1.0 is before the last visit at 2.0",
        ),
        (
            patients_frame(censor_years=(1, 0.5)),
            "patient SYN-2, column censor_years: value 0.5 is before the last visit at 1.1",
        ),
    ],
)
def test_bad_patient_table_is_reported(patients, expected):
    with pytest.raises(ModelError, match=expected) as error:
        records_from_frames(visits_frame(), patients, patients_file="my_patients.csv")
    assert "my_patients.csv" in str(error.value)


def test_death_given_twice_is_an_error():
    visits = visits_frame(stage=(2, "dead"))
    with pytest.raises(
        ModelError, match=r"already records 'dead' at 2\.0 years and death_years is 2\.5"
    ):
        records_from_frames(visits, patients_frame())


def test_censoring_a_patient_recorded_dead_is_an_error():
    visits = visits_frame(stage=(2, "dead"))
    patients = patients_frame(death_years=(0, np.nan), censor_years=(0, 4.0))
    with pytest.raises(
        ModelError,
        match=r"my_patients\.csv: patient SYN-1, column censor_years: value 4\.0 says alive at "
        r"the end of follow-up, but the visits file records 'dead' at 2\.0 years",
    ):
        records_from_frames(visits, patients, patients_file="my_patients.csv")


def test_death_at_the_last_visit_time_is_kept_and_censoring_there_is_not():
    # Times are rounded in files: a death at the time of the last visit is still an exact
    # death (an interval of length 0); a censoring time there adds nothing.
    patients = patients_frame(death_years=(0, 2.0), censor_years=(1, 1.1))
    records = records_from_frames(visits_frame(), patients)
    tail = records.end_kind != OBSERVED
    np.testing.assert_array_equal(records.end_kind[tail], [DEATH])
    np.testing.assert_array_equal(records.years[tail], [0.0])
    np.testing.assert_array_equal(records.start_state[tail], [1])


def test_file_size_limit(tmp_path, monkeypatch):
    path = tmp_path / "visits.csv"
    visits_frame().to_csv(path, index=False)
    monkeypatch.setattr(records_module, "MAX_RECORDS_FILE_BYTES", 10)
    with pytest.raises(
        ModelError, match=r"visits.csv: the file is larger than the limit of 10 bytes"
    ):
        load_records(path)


def test_unreadable_csv(tmp_path):
    path = tmp_path / "visits.csv"
    path.write_bytes(b'patient_id,years_since_entry,stage\n"SYN-1,0,stage_1\n')
    with pytest.raises(ModelError, match=r"visits\.csv: not a readable CSV file"):
        load_records(path)


def test_missing_file():
    with pytest.raises(ModelError, match=r"no/such/visits\.csv: file not found; expected a CSV"):
        load_records("no/such/visits.csv")
