"""Synthetic longitudinal cohort from a known continuous-time multi-state process.

SYNTHETIC DATA ONLY: every patient is simulated; ids are codes (``SYN-00001``), with
no names, places or people behind them.

The process
-----------
Ordered stages ``stage_1 .. stage_K`` plus death (last index). ``rates[i, j]`` is the
transition rate per year from ``i`` to ``j`` (off-diagonal, >= 0; the death column
holds the death rate at ``reference_age``). The death rate is optionally age
dependent, ``mu_i(age) = rates[i, dead] * exp(death_age_slope * (age - reference_age))``
(a Gompertz-type law). After treatment starts, every stage-to-stage rate is multiplied
by ``treatment_hazard_ratio``; death rates are not.

Observation
-----------
Each patient enters at a baseline age, is seen at entry (``years_since_entry = 0``)
and then at visits separated by gamma-distributed gaps (or exactly regular gaps);
the stage is recorded at each visit, death at its exact time. Follow-up ends at the
administrative end of the study (``follow_up_years`` minus a staggered entry delay)
or at random drop-out (exponential), whichever is first: the patient is then
*censored* (known alive at ``censor_years``). Treatment can only start at a visit: an
untreated patient seen in a stage at or after ``treat_from_stage`` starts with
probability ``treat_probability`` at that visit, and ``treated`` is 1 from that visit on.

Simulation is exact (no time grid): the next event is the earliest of a stage change
(exponential with the stage's total rate, destination chosen in proportion to the
rates), death (inverse of the Gompertz cumulative hazard), the next visit and the end
of follow-up; the process is Markov, so clocks are redrawn after every event. Patients
are simulated together (vectorized); the loop is over events.

Run ``python -m synthetic_cohort.generator --seed 2026 --patients 300 --out DIR``.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

SYNTHETIC_NOTE = "SYNTHETIC DATA - simulated patients, not real people"
PATIENT_COLUMNS = (
    "patient_id",
    "baseline_age",
    "treatment_start_years",
    "death_years",
    "censor_years",
)
VISIT_COLUMNS = ("patient_id", "years_since_entry", "stage", "treated")
DEATH_STATE = "dead"
CHUNK_PATIENTS = 1000
"""Patients per random stream: results do not depend on how the cohort is split."""


def progressive_rates(progression: list[float], death: list[float]) -> np.ndarray:
    """Rate matrix of an ordered progressive process (stage k -> k + 1, any stage -> death).

    Parameters
    ----------
    progression : list of float, length K - 1
        Rate per year from stage ``k`` to ``k + 1``.
    death : list of float, length K
        Death rate per year in each stage (at the reference age).

    Returns
    -------
    numpy.ndarray, shape (K + 1, K + 1)
        Off-diagonal rates per year; zero diagonal; death is the last index.
    """
    n_stages = len(death)
    if len(progression) != n_stages - 1:
        raise ValueError(
            f"progression needs {n_stages - 1} rates for {n_stages} stages, got {len(progression)}"
        )
    rates = np.zeros((n_stages + 1, n_stages + 1))
    rates[np.arange(n_stages - 1), np.arange(1, n_stages)] = progression
    rates[:n_stages, n_stages] = death
    return rates


@dataclass(frozen=True, eq=False)
class CohortDesign:
    """The process and how it is observed (all times in years).

    The defaults describe an invented, synthetic scenario of our own.
    """

    rates: np.ndarray = field(
        default_factory=lambda: progressive_rates([0.30, 0.25], [0.02, 0.05, 0.15])
    )
    """(K + 1, K + 1) rates per year between stages and to death (last index)."""
    stage_ids: tuple[str, ...] = ("stage_1", "stage_2", "stage_3")
    start_shares: tuple[float, ...] = (0.6, 0.3, 0.1)
    """Share of patients in each stage at entry (sums to 1)."""
    death_age_slope: float = 0.0
    """Per year of age; 0 = death rates independent of age."""
    reference_age: float = 60.0
    baseline_age_mean: float = 60.0
    baseline_age_sd: float = 8.0
    baseline_age_range: tuple[float, float] = (30.0, 90.0)
    visit_gap_mean: float = 0.8
    visit_gap_shape: float | None = 4.0
    """Gamma shape of the gaps between visits; ``None`` = exactly regular visits."""
    follow_up_years: float = 6.0
    staggered_entry_years: float = 3.0
    """Entry delay ~ Uniform(0, this): the administrative end comes earlier for late entrants."""
    dropout_rate: float = 0.05
    """Random drop-out rate per year (0 = none)."""
    treatment_hazard_ratio: float = 0.6
    treat_from_stage: int | None = 1
    """0-based stage index from which treatment may start; ``None`` = never treated."""
    treat_probability: float = 0.5
    """Probability that an eligible untreated patient starts treatment at a visit."""

    def __post_init__(self) -> None:
        rates = np.asarray(self.rates, dtype=float)
        size = len(self.stage_ids) + 1
        if rates.shape != (size, size):
            raise ValueError(f"rates must have shape {(size, size)}, got {rates.shape}")
        off_diagonal = rates[~np.eye(size, dtype=bool)]
        if np.any(off_diagonal < 0) or not np.all(np.isfinite(rates)):
            raise ValueError("rates must be finite and >= 0 off the diagonal")
        if np.any(rates[-1] != 0):
            raise ValueError("death (last row of rates) is absorbing: its rates must be 0")
        if len(self.start_shares) != len(self.stage_ids) or not np.isclose(
            sum(self.start_shares), 1.0
        ):
            raise ValueError("start_shares needs one share per stage, summing to 1")
        if self.death_age_slope < 0:
            raise ValueError(f"death_age_slope must be >= 0, got {self.death_age_slope}")
        if self.visit_gap_mean <= 0 or self.follow_up_years <= 0:
            raise ValueError("visit_gap_mean and follow_up_years must be > 0")
        object.__setattr__(self, "rates", rates)

    @property
    def n_stages(self) -> int:
        return len(self.stage_ids)


def fully_observed_design(
    rates: np.ndarray,
    start_shares: tuple[float, ...],
    *,
    follow_up_years: float,
    visit_every_years: float = 1.0,
) -> CohortDesign:
    """A design observed at exactly regular visits, without drop-out or treatment.

    Everyone enters together, so no follow-up ends inside a visit interval when
    ``follow_up_years`` is a multiple of ``visit_every_years``; stages are named
    ``stage_1 .. stage_K`` after the shape of ``rates`` ((K + 1, K + 1)).
    """
    n_stages = np.asarray(rates).shape[0] - 1
    return CohortDesign(
        rates=rates,
        stage_ids=tuple(f"stage_{k + 1}" for k in range(n_stages)),
        start_shares=start_shares,
        visit_gap_mean=visit_every_years,
        visit_gap_shape=None,
        follow_up_years=follow_up_years,
        staggered_entry_years=0.0,
        dropout_rate=0.0,
        treat_from_stage=None,
    )


@dataclass
class _Chunk:
    """Per-patient simulation state of one chunk (arrays of shape (n,))."""

    rng: np.random.Generator
    time: np.ndarray
    stage: np.ndarray
    treated: np.ndarray
    active: np.ndarray
    next_visit: np.ndarray
    end: np.ndarray
    age: np.ndarray
    treatment_start: np.ndarray
    death: np.ndarray
    censor: np.ndarray
    visits: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = field(
        default_factory=list
    )


def generate_cohort(
    design: CohortDesign | None = None, *, n_patients: int = 300, seed: int = 2026
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Simulate a synthetic cohort.

    Parameters
    ----------
    design : CohortDesign, optional
        Process and observation scheme; the default synthetic scenario when omitted.
    n_patients : int
        Number of patients (>= 1).
    seed : int
        Seed of the ``numpy.random.SeedSequence``; one child stream per chunk of
        :data:`CHUNK_PATIENTS` patients.

    Returns
    -------
    patients : pandas.DataFrame
        One row per patient, columns :data:`PATIENT_COLUMNS`; times in years since
        entry, NaN where not applicable (exactly one of death/censor is set).
    visits : pandas.DataFrame
        One row per visit, columns :data:`VISIT_COLUMNS`, sorted by patient and time.
    """
    design = design or CohortDesign()
    if n_patients < 1:
        raise ValueError(f"n_patients must be >= 1, got {n_patients}")
    n_chunks = -(-n_patients // CHUNK_PATIENTS)
    streams = np.random.SeedSequence(seed).spawn(n_chunks)
    patient_frames, visit_frames = [], []
    for index, stream in enumerate(streams):
        first = index * CHUNK_PATIENTS
        size = min(CHUNK_PATIENTS, n_patients - first)
        patients, visits = _simulate_chunk(design, np.random.default_rng(stream), first, size)
        patient_frames.append(patients)
        visit_frames.append(visits)
    return (
        pd.concat(patient_frames, ignore_index=True),
        pd.concat(visit_frames, ignore_index=True),
    )


def _simulate_chunk(
    design: CohortDesign, rng: np.random.Generator, first: int, size: int
) -> tuple[pd.DataFrame, pd.DataFrame]:
    low, high = design.baseline_age_range
    age = np.clip(rng.normal(design.baseline_age_mean, design.baseline_age_sd, size), low, high)
    entry_delay = rng.uniform(0.0, design.staggered_entry_years, size)
    dropout = (
        rng.exponential(1.0 / design.dropout_rate, size)
        if design.dropout_rate > 0
        else np.full(size, np.inf)
    )
    chunk = _Chunk(
        rng=rng,
        time=np.zeros(size),
        stage=rng.choice(design.n_stages, size=size, p=np.asarray(design.start_shares)),
        treated=np.zeros(size, dtype=bool),
        active=np.ones(size, dtype=bool),
        next_visit=np.zeros(size),
        end=np.minimum(design.follow_up_years - entry_delay, dropout),
        age=age,
        treatment_start=np.full(size, np.nan),
        death=np.full(size, np.nan),
        censor=np.full(size, np.nan),
    )
    _visit(design, chunk, np.arange(size))  # the entry visit at time 0
    while chunk.active.any():
        _next_event(design, chunk)

    ids = np.array([f"SYN-{first + i + 1:05d}" for i in range(size)])
    patients = pd.DataFrame(
        {
            "patient_id": ids,
            "baseline_age": chunk.age,
            "treatment_start_years": chunk.treatment_start,
            "death_years": chunk.death,
            "censor_years": chunk.censor,
        }
    )
    who, when, stage, treated = (np.concatenate(parts) for parts in zip(*chunk.visits, strict=True))
    order = np.lexsort((when, who))
    stage_names = np.asarray(design.stage_ids)
    visits = pd.DataFrame(
        {
            "patient_id": ids[who[order]],
            "years_since_entry": when[order],
            "stage": stage_names[stage[order]],
            "treated": treated[order].astype(int),
        }
    )
    return patients, visits


def _visit(design: CohortDesign, chunk: _Chunk, who: np.ndarray) -> None:
    """Record a visit of ``who`` at their ``next_visit``; start treatment; book the next."""
    rng = chunk.rng
    chunk.time[who] = chunk.next_visit[who]
    if design.treat_from_stage is not None:
        eligible = ~chunk.treated[who] & (chunk.stage[who] >= design.treat_from_stage)
        starts = who[eligible & (rng.random(who.size) < design.treat_probability)]
        chunk.treated[starts] = True
        chunk.treatment_start[starts] = chunk.time[starts]
    chunk.visits.append(
        (who.copy(), chunk.time[who].copy(), chunk.stage[who].copy(), chunk.treated[who].copy())
    )
    if design.visit_gap_shape is None:
        gaps = np.full(who.size, design.visit_gap_mean)
    else:
        shape = design.visit_gap_shape
        gaps = rng.gamma(shape, design.visit_gap_mean / shape, who.size)
    chunk.next_visit[who] = chunk.time[who] + gaps


def _next_event(design: CohortDesign, chunk: _Chunk) -> None:
    """Advance every active patient to their next event (stage change, death, visit, end)."""
    rng = chunk.rng
    who = np.flatnonzero(chunk.active)
    n_stages = design.n_stages
    stage = chunk.stage[who]
    now = chunk.time[who]

    stage_rates = design.rates[stage, :n_stages].copy()  # (n, K) stage-to-stage rates
    stage_rates[chunk.treated[who]] *= design.treatment_hazard_ratio
    leave_rate = stage_rates.sum(axis=1)
    with np.errstate(divide="ignore"):
        to_stage_change = rng.exponential(1.0, who.size) / leave_rate

    # Gompertz-type death hazard c * exp(g s) from now: invert H(s) = c (e^{g s} - 1) / g.
    slope = design.death_age_slope
    hazard_now = design.rates[stage, n_stages] * np.exp(
        slope * (chunk.age[who] + now - design.reference_age)
    )
    unit = rng.exponential(1.0, who.size)
    with np.errstate(divide="ignore"):
        to_death = unit / hazard_now if slope == 0 else np.log1p(slope * unit / hazard_now) / slope

    # Order matters on ties: a visit booked exactly at the end of follow-up still happens.
    candidates = np.stack(
        [chunk.next_visit[who], now + to_stage_change, now + to_death, chunk.end[who]]
    )
    event = np.argmin(candidates, axis=0)  # 0 visit, 1 stage change, 2 death, 3 end
    when = candidates[event, np.arange(who.size)]

    changed = event == 1
    if changed.any():
        cumulative = np.cumsum(stage_rates[changed] / leave_rate[changed, None], axis=1)
        draw = chunk.rng.random(int(changed.sum()))[:, None]
        chunk.stage[who[changed]] = np.minimum((draw > cumulative).sum(axis=1), n_stages - 1)
        chunk.time[who[changed]] = when[changed]
    died = who[event == 2]
    chunk.death[died] = when[event == 2]
    chunk.active[died] = False
    visited = who[event == 0]
    if visited.size:
        _visit(design, chunk, visited)
    ended = who[event == 3]
    chunk.censor[ended] = chunk.end[ended]
    chunk.active[ended] = False


DATA_DICTIONARY = {
    "patients.csv": {
        "patient_id": "synthetic patient code (SYN-00001 ...); no real person",
        "baseline_age": "age in years at entry",
        "treatment_start_years": "years since entry when treatment started (at a visit); "
        "empty if never treated",
        "death_years": "exact years since entry at death; empty if not observed to die",
        "censor_years": "years since entry when follow-up ended alive (end of study or "
        "drop-out); empty if the patient died",
    },
    "visits.csv": {
        "patient_id": "synthetic patient code, as in patients.csv",
        "years_since_entry": "time of the visit in years since entry (first visit at 0)",
        "stage": "stage observed at the visit (stage_1 mildest ... stage_3 most severe)",
        "treated": "1 if on treatment from this visit on (treatment starts at a visit), else 0",
    },
}


DICTIONARY_FILE = "data_dictionary.csv"


def dictionary_frame() -> pd.DataFrame:
    """The data dictionary as a table: one row per column of each file (file, column, meaning)."""
    rows = [
        (name, column, meaning)
        for name, columns in DATA_DICTIONARY.items()
        for column, meaning in columns.items()
    ]
    return pd.DataFrame(rows, columns=["file", "column", "meaning"])


def write_cohort(
    patients: pd.DataFrame, visits: pd.DataFrame, out: Path
) -> tuple[Path, Path, Path]:
    """Write ``patients.csv``, ``visits.csv`` (times rounded to 4 decimals) and the data
    dictionary ``data_dictionary.csv`` (file, column, meaning) into ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    paths = (out / "patients.csv", out / "visits.csv", out / DICTIONARY_FILE)
    patients.to_csv(paths[0], index=False, float_format="%.4f")
    visits.to_csv(paths[1], index=False, float_format="%.4f")
    dictionary_frame().to_csv(paths[2], index=False)
    return paths


def main(argv: list[str] | None = None) -> None:
    """Entry point: ``python -m synthetic_cohort.generator --seed S --patients N --out DIR``."""
    parser = argparse.ArgumentParser(description=f"Generate a synthetic cohort ({SYNTHETIC_NOTE}).")
    parser.add_argument("--seed", type=int, default=2026, help="random seed (>= 0)")
    parser.add_argument("--patients", type=int, default=300, help="number of patients (>= 1)")
    parser.add_argument(
        "--out", type=Path, required=True, help="folder for the CSV files and data dictionary"
    )
    args = parser.parse_args(argv)
    if args.patients < 1:
        parser.error(f"--patients must be >= 1, got {args.patients}")
    if args.seed < 0:
        parser.error(f"--seed must be a whole number >= 0, got {args.seed}")
    patients, visits = generate_cohort(n_patients=args.patients, seed=args.seed)
    for path in write_cohort(patients, visits, args.out):
        print(f"wrote {path} ({SYNTHETIC_NOTE})")


if __name__ == "__main__":
    main()
