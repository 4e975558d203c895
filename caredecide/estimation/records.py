"""Patient records (visits + optional patient table) -> observation intervals.

Both estimators work on *intervals*: consecutive pairs of observations of one patient.
Each interval starts in an observed alive state at a visit and ends in one of three ways:

``OBSERVED``  the state at the next visit (an alive stage, or the death state written
              as a visit row: "known dead by then", exact time unknown);
``DEATH``     an exact death time from the patient table (``death_years``);
``CENSORED``  known alive at ``censor_years`` (end of follow-up), state unknown.

Files are data: read with pandas, size-limited, never executed. Every problem names
the file, the row (1-based, header = row 1), the column, the value and what was
expected; all problems are reported at once.
"""

from __future__ import annotations

import io
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.guarded import read_limited_bytes
from caredecide.limits import MAX_RECORDS_FILE_BYTES

OBSERVED, DEATH, CENSORED = 0, 1, 2
DEATH_STATE = "dead"
MAX_FILE_BYTES = MAX_RECORDS_FILE_BYTES
VISIT_COLUMNS = ("patient_id", "years_since_entry", "stage")
PATIENT_COLUMNS = ("patient_id", "death_years", "censor_years")


@dataclass(frozen=True, eq=False)
class CohortRecords:
    """Observation intervals of a cohort (all arrays shape (N,), one entry per interval).

    Attributes
    ----------
    state_ids : tuple of str
        Alive states in clinical order, then the death state (last).
    patient : (N,) int
        Patient index (0-based, into ``patient_ids``).
    start_state : (N,) int
        Index of the alive state observed at the start of the interval.
    end_state : (N,) int
        Index of the state at the end (``OBSERVED``) or of the death state (``DEATH``);
        -1 when ``CENSORED``.
    years : (N,) float
        Interval length in years (> 0; 0 only for an exact death at the time of the
        patient's last visit).
    treated : (N,) bool
        On treatment during the interval (the ``treated`` flag of its start visit).
    end_kind : (N,) int
        ``OBSERVED``, ``DEATH`` or ``CENSORED``.
    """

    state_ids: tuple[str, ...]
    patient_ids: tuple[str, ...]
    patient: np.ndarray
    start_state: np.ndarray
    end_state: np.ndarray
    years: np.ndarray
    treated: np.ndarray
    end_kind: np.ndarray
    source: str
    """The file(s) the records came from, for parameter sources."""

    @property
    def n_states(self) -> int:
        return len(self.state_ids)

    @property
    def death_index(self) -> int:
        return len(self.state_ids) - 1

    @property
    def n_patients(self) -> int:
        return len(self.patient_ids)

    @property
    def n_intervals(self) -> int:
        return int(self.years.size)

    def subset(self, mask: np.ndarray) -> CohortRecords:
        """The records restricted to the intervals where ``mask`` (shape (N,)) is true."""
        from dataclasses import replace

        return replace(
            self,
            patient=self.patient[mask],
            start_state=self.start_state[mask],
            end_state=self.end_state[mask],
            years=self.years[mask],
            treated=self.treated[mask],
            end_kind=self.end_kind[mask],
        )


def natural_key(text: str) -> list[object]:
    """Sort key that puts ``stage_2`` before ``stage_10``."""
    return [int(part) if part.isdigit() else part for part in re.split(r"(\d+)", text)]


def read_csv_limited(path: Path | str) -> pd.DataFrame:
    """Read a CSV data file after checking its size (strings kept as text)."""
    path = Path(path)
    data = read_limited_bytes(path, MAX_RECORDS_FILE_BYTES, what="a CSV file of records")
    if not data.strip():
        raise ModelError("the file is empty; expected a CSV file with a header row", file=str(path))
    try:
        return pd.read_csv(io.BytesIO(data), dtype={"patient_id": str, "stage": str}, comment=None)
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError, OverflowError) as error:
        raise ModelError(f"not a readable CSV file: {error}", file=str(path)) from None


def load_records(
    visits_path: Path | str,
    patients_path: Path | str | None = None,
    *,
    states: list[str] | tuple[str, ...] | None = None,
    death_state: str = DEATH_STATE,
) -> CohortRecords:
    """Read ``visits.csv`` (and optionally ``patients.csv``) into observation intervals.

    See :func:`records_from_frames` for the rules; file names appear in every message.
    """
    visits = read_csv_limited(visits_path)
    patients = None if patients_path is None else read_csv_limited(patients_path)
    return records_from_frames(
        visits,
        patients,
        states=states,
        death_state=death_state,
        visits_file=str(visits_path),
        patients_file=None if patients_path is None else str(patients_path),
    )


def _numeric(frame: pd.DataFrame, column: str) -> np.ndarray:
    return pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)


def _row_problems(
    bad: np.ndarray, frame: pd.DataFrame, column: str, expected: str, file: str
) -> list[Problem]:
    """One problem per offending row (at most 5, then a count), naming row and value."""
    rows = np.flatnonzero(bad)
    problems = [
        Problem(
            where=f"row {row + 2}, column {column}",
            message=f"value {frame[column].iloc[row]!r}; expected {expected}",
            file=file,
        )
        for row in rows[:5]
    ]
    if rows.size > 5:
        problems.append(
            Problem(
                where=f"column {column}",
                message=f"{rows.size - 5} more rows like these",
                file=file,
            )
        )
    return problems


def _first_problems(
    indices: np.ndarray, file: str, describe: Callable[[int], tuple[str, str]]
) -> list[Problem]:
    """Problems for the first 5 offending indices; ``describe(i) -> (where, message)``."""
    return [Problem(*describe(int(i)), file=file) for i in indices[:5]]


def records_from_frames(
    visits: pd.DataFrame,
    patients: pd.DataFrame | None = None,
    *,
    states: list[str] | tuple[str, ...] | None = None,
    death_state: str = DEATH_STATE,
    visits_file: str = "visits.csv",
    patients_file: str | None = "patients.csv",
) -> CohortRecords:
    """Turn visit and patient tables into observation intervals.

    Parameters
    ----------
    visits : pandas.DataFrame
        Columns ``patient_id``, ``years_since_entry`` (>= 0), ``stage`` and optionally
        ``treated`` (0/1). A ``stage`` equal to ``death_state`` means "known dead at this
        visit" and must be the patient's last row.
    patients : pandas.DataFrame, optional
        Columns ``patient_id``, ``death_years``, ``censor_years`` (empty = not
        applicable; not both). Without it, follow-up ends at each patient's last visit.
    states : sequence of str, optional
        Alive states in clinical order; default: the stages seen, in natural order.
    death_state : str
        Name of the death state (last in ``state_ids``).

    Returns
    -------
    CohortRecords

    Raises
    ------
    ModelError
        Listing every problem: missing columns, bad values, unknown stages, duplicate
        visit times, visits after death, deaths/censoring before the last visit,
        patients missing from the patient table, conflicting death records (a death
        given twice, or a censoring time for a patient the visits record as dead).
    """
    problems: list[Problem] = []
    missing = [c for c in VISIT_COLUMNS if c not in visits.columns]
    if missing:
        raise ModelError(
            f"missing column(s) {missing}; expected columns {list(VISIT_COLUMNS)} "
            f"(and optionally 'treated')",
            file=visits_file,
        )
    if len(visits) == 0:
        raise ModelError("no visit rows; expected at least one visit", file=visits_file)
    ids = visits["patient_id"].astype("string")
    problems += _row_problems(
        ids.isna().to_numpy() | (ids.str.strip() == "").fillna(True).to_numpy(),
        visits,
        "patient_id",
        "a non-empty patient code",
        visits_file,
    )
    times = _numeric(visits, "years_since_entry")
    problems += _row_problems(
        ~np.isfinite(times) | (times < 0),
        visits,
        "years_since_entry",
        "a finite number of years >= 0",
        visits_file,
    )
    stage_text = visits["stage"].astype("string").fillna("").to_numpy(dtype=object)
    if states is None:
        alive = sorted({s for s in stage_text if s and s != death_state}, key=natural_key)
    else:
        alive = list(states)
        if death_state in alive:
            raise ModelError(
                f"states {alive} include the death state {death_state!r}; list alive states only",
                file=visits_file,
            )
    state_ids = (*alive, death_state)
    code = {name: index for index, name in enumerate(state_ids)}
    stage = np.array([code.get(s, -1) for s in stage_text], dtype=int)
    problems += _row_problems(stage < 0, visits, "stage", f"one of {list(state_ids)}", visits_file)
    if "treated" in visits.columns:
        treated_values = _numeric(visits, "treated")
        problems += _row_problems(
            ~np.isin(treated_values, (0.0, 1.0)), visits, "treated", "0 or 1", visits_file
        )
        treated = treated_values == 1.0
    else:
        treated = np.zeros(len(visits), dtype=bool)
    if problems:
        raise ModelError(problems)

    patient_ids, patient = np.unique(ids.to_numpy(dtype=object).astype(str), return_inverse=True)
    order = np.lexsort((times, patient))
    patient, times, stage, treated = patient[order], times[order], stage[order], treated[order]
    rows = order + 2  # file row numbers (header is row 1)
    same_patient = patient[1:] == patient[:-1]
    death_index = len(state_ids) - 1

    def name(i: int) -> str:
        return str(patient_ids[patient[i]])

    duplicate = np.flatnonzero(same_patient & (times[1:] == times[:-1]))
    problems += _first_problems(
        duplicate,
        visits_file,
        lambda i: (
            f"row {rows[i + 1]}",
            f"patient {name(i)} has two visits at {times[i]} years; "
            "expected one row per visit time",
        ),
    )
    after_death = np.flatnonzero(same_patient & (stage[:-1] == death_index))
    problems += _first_problems(
        after_death,
        visits_file,
        lambda i: (
            f"row {rows[i + 1]}",
            f"patient {name(i)} has a visit at {times[i + 1]} years after being recorded "
            f"{death_state!r} at {times[i]} years; expected no visit after death",
        ),
    )
    dead_first = np.flatnonzero(np.r_[True, ~same_patient] & (stage == death_index))
    problems += _first_problems(
        dead_first,
        visits_file,
        lambda i: (
            f"row {rows[i]}",
            f"patient {name(i)} is {death_state!r} at the first visit; expected an alive stage",
        ),
    )
    if problems:
        raise ModelError(problems)

    pair = np.flatnonzero(same_patient)
    intervals = {
        "patient": patient[pair],
        "start_state": stage[pair],
        "end_state": stage[pair + 1],
        "years": times[pair + 1] - times[pair],
        "treated": treated[pair],
        "end_kind": np.full(pair.size, OBSERVED),
    }
    source = visits_file
    if patients is not None:
        tail = _follow_up_intervals(
            patients,
            patient_ids,
            patient,
            times,
            stage,
            treated,
            death_index,
            death_state,
            patients_file or "patients.csv",
        )
        for key in intervals:
            intervals[key] = np.concatenate([intervals[key], tail[key]])
        source = f"{visits_file} + {patients_file}"
    return CohortRecords(
        state_ids=state_ids,
        patient_ids=tuple(str(p) for p in patient_ids),
        source=source,
        **intervals,
    )


def _follow_up_intervals(
    patients: pd.DataFrame,
    patient_ids: np.ndarray,
    patient: np.ndarray,
    times: np.ndarray,
    stage: np.ndarray,
    treated: np.ndarray,
    death_index: int,
    death_state: str,
    file: str,
) -> dict[str, np.ndarray]:
    """Intervals from each patient's last visit to death or censoring (patient table)."""
    missing = [c for c in PATIENT_COLUMNS if c not in patients.columns]
    if missing:
        raise ModelError(
            f"missing column(s) {missing}; expected columns {list(PATIENT_COLUMNS)}", file=file
        )
    problems: list[Problem] = []
    table_ids = (
        patients["patient_id"].astype("string").fillna("").to_numpy(dtype=object).astype(str)
    )
    death = _numeric(patients, "death_years")
    censor = _numeric(patients, "censor_years")
    for column, values in (("death_years", death), ("censor_years", censor)):
        text_given = patients[column].notna().to_numpy()
        problems += _row_problems(
            (text_given & ~np.isfinite(values)) | (values < 0),
            patients,
            column,
            "empty or a finite number of years >= 0",
            file,
        )
    problems += _row_problems(
        np.isfinite(death) & np.isfinite(censor),
        patients,
        "censor_years",
        "empty when death_years is given (a patient either died or was censored)",
        file,
    )
    unique_ids, counts = np.unique(table_ids, return_counts=True)
    repeated = np.flatnonzero(counts > 1)
    problems += _first_problems(
        repeated,
        file,
        lambda i: (
            "column patient_id",
            f"patient {unique_ids[i]} appears {counts[i]} times; expected one row per patient",
        ),
    )
    if problems:
        raise ModelError(problems)

    lookup = pd.Series(np.arange(len(table_ids)), index=table_ids)
    position = lookup.reindex(patient_ids).to_numpy()
    absent = np.flatnonzero(np.isnan(position))
    if absent.size:
        raise ModelError(
            _first_problems(
                absent,
                file,
                lambda i: (
                    "column patient_id",
                    f"patient {patient_ids[i]} has visits but no row here; expected every patient "
                    "of the visits file",
                ),
            )
        )
    position = position.astype(int)
    last = np.r_[patient[1:] != patient[:-1], True]  # last visit row of each patient
    last_time, last_stage, last_treated = times[last], stage[last], treated[last]
    death_at, censor_at = death[position], censor[position]
    recorded_dead = last_stage == death_index

    problems = []
    for column, values in (("death_years", death_at), ("censor_years", censor_at)):
        early = np.flatnonzero(np.isfinite(values) & (values < last_time))

        def describe(i: int, c: str = column, v: np.ndarray = values) -> tuple[str, str]:
            return (
                f"patient {patient_ids[i]}, column {c}",
                f"value {v[i]} is before the last visit at {last_time[i]} years; expected a time "
                "at or after the last visit",
            )

        problems += _first_problems(
            early,
            file,
            describe,
        )
    twice = np.flatnonzero(recorded_dead & np.isfinite(death_at))
    problems += _first_problems(
        twice,
        file,
        lambda i: (
            f"patient {patient_ids[i]}, column death_years",
            f"the visits file already records {death_state!r} at {last_time[i]} years and "
            f"death_years is {death_at[i]}; give the death once",
        ),
    )
    alive_after_death = np.flatnonzero(recorded_dead & np.isfinite(censor_at))
    problems += _first_problems(
        alive_after_death,
        file,
        lambda i: (
            f"patient {patient_ids[i]}, column censor_years",
            f"value {censor_at[i]} says alive at the end of follow-up, but the visits file "
            f"records {death_state!r} at {last_time[i]} years; expected censor_years empty "
            "for a patient who died",
        ),
    )
    if problems:
        raise ModelError(problems)

    # A censoring time equal to the last visit adds nothing (known alive then). A death
    # at the visit time itself (times rounded in the file) is kept: its contribution
    # sum_k P_rk(0) q_k,dead = q_r,dead is the death rate of the observed state.
    died = np.isfinite(death_at) & ~recorded_dead
    censored = np.isfinite(censor_at) & ~recorded_dead & (censor_at > last_time)
    index = np.flatnonzero(died | censored)
    ends = np.where(died, death_at, censor_at)[index]
    return {
        "patient": index,
        "start_state": last_stage[index],
        "end_state": np.where(died[index], death_index, -1),
        "years": ends - last_time[index],
        "treated": last_treated[index],
        "end_kind": np.where(died[index], DEATH, CENSORED),
    }


def require_deaths(records: CohortRecords, *, patients_given: bool) -> None:
    """Refuse records with no death at all when no patients file was given.

    Without deaths every estimated death rate is 0: immortal patients. Deaths come from
    a patients file (``death_years``) or from visit rows in the death state.

    Raises
    ------
    ModelError
        Naming the visits file and what to add.
    """
    if patients_given or bool((records.end_kind == DEATH).any()):
        return
    raise ModelError(
        f"the records hold no deaths and no patients file was given, so every death rate "
        f"would be 0 (immortal patients); expected --patients PATIENTS.csv (columns "
        f"patient_id, death_years, censor_years) or visit rows in the death state "
        f"{records.state_ids[-1]!r}",
        file=records.source,
    )
