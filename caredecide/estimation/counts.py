"""Transition probabilities per cycle from regular-interval observations.

With the state observed once per cycle, the transitions out of state ``i`` are a
multinomial sample: the maximum-likelihood probability is ``p_ij = n_ij / n_i`` and the
uncertainty about the row is a Dirichlet distribution with parameters ``n_ij + prior``
(Briggs, Ades & Price 2003, Med Decis Making 23(4):341-350: mean ``a_j / A``, variance
``a_j (A - a_j) / (A^2 (A + 1))`` with ``A = sum_j a_j``).

Transitions are counted over windows one cycle long (:func:`one_cycle_windows`): from a
visit to a visit one cycle later (within ``tolerance`` x cycle), or to a death within the
cycle, for deaths and survivors alike; deaths carry the stated correction for survivors
whose state one cycle on was not seen. Windows without a known end are counted in
``n_skipped`` - the panel estimator (:mod:`caredecide.estimation.panel`) uses every
interval.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from caredecide.errors import ModelError
from caredecide.estimation.records import CENSORED, DEATH, OBSERVED, CohortRecords

TREATMENT_GROUPS = {"untreated": False, "treated": True}


@dataclass(frozen=True, eq=False)
class CountEstimate:
    """Count-based estimate of the per-cycle transition matrix of one treatment group.

    Attributes
    ----------
    counts : (S, S) float
        ``counts[i, j]`` = observed one-cycle transitions from ``i`` to ``j`` (the death
        row, last, is all zero).
    prior : float
        Pseudo-count added to each entry of an alive row for the Dirichlet (0 = none).
    """

    state_ids: tuple[str, ...]
    group: str
    counts: np.ndarray
    prior: float
    cycle_years: float
    n_patients: int
    n_skipped: int
    source: str

    @property
    def n_transitions(self) -> int:
        """Observed one-cycle transitions used."""
        return int(self.counts.sum())

    @property
    def row_totals(self) -> np.ndarray:
        """(S,) transitions observed out of each state (``n_i``)."""
        return self.counts.sum(axis=1)

    def probabilities(self) -> np.ndarray:
        """(S, S) maximum-likelihood probabilities per cycle ``n_ij / n_i``.

        Rows with no observation are NaN; the death row is the absorbing row (1 on the
        diagonal).
        """
        with np.errstate(invalid="ignore", divide="ignore"):
            p = self.counts / self.row_totals[:, None]
        p[-1] = 0.0
        p[-1, -1] = 1.0
        return p

    def dirichlet_alpha(self) -> np.ndarray:
        """(S - 1, S) Dirichlet parameters ``counts + prior`` of each alive row."""
        return self.counts[:-1] + self.prior

    def dirichlet_mean(self) -> np.ndarray:
        """(S - 1, S) Dirichlet means ``a_ij / A_i`` (NaN for rows with no data)."""
        alpha = self.dirichlet_alpha()
        with np.errstate(invalid="ignore", divide="ignore"):
            return alpha / alpha.sum(axis=1, keepdims=True)

    def standard_errors(self) -> np.ndarray:
        """(S - 1, S) Dirichlet standard deviations ``sqrt(a (A - a) / (A^2 (A + 1)))``."""
        alpha = self.dirichlet_alpha()
        total = alpha.sum(axis=1, keepdims=True)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(alpha * (total - alpha) / (total**2 * (total + 1.0)))

    def table(self) -> pd.DataFrame:
        """One row per (from, to) pair of the alive rows with data: count, ``n_ij / n_i``
        and the Dirichlet standard error."""
        size = len(self.state_ids)
        start, end = np.divmod(np.arange((size - 1) * size), size)
        has_data = self.dirichlet_alpha().sum(axis=1)[start] > 0
        start, end = start[has_data], end[has_data]
        return pd.DataFrame(
            {
                "group": self.group,
                "from": np.asarray(self.state_ids)[start],
                "to": np.asarray(self.state_ids)[end],
                "count": self.counts[start, end],
                "probability": self.probabilities()[start, end],
                "se": self.standard_errors()[start, end],
            }
        )


@dataclass(frozen=True)
class CycleWindows:
    """One-cycle windows cut from the records: where a patient was at a visit and where
    one cycle later (all arrays (W,)).

    ``weight`` is 1 for a window ending at a visit one cycle later and ``observable``
    for a death within the cycle (see :func:`one_cycle_windows`).
    """

    start_state: np.ndarray
    end_state: np.ndarray
    weight: np.ndarray
    treated: np.ndarray
    patient: np.ndarray
    n_skipped: int
    observable: float


def one_cycle_windows(
    records: CohortRecords, cycle_years: float = 1.0, *, tolerance: float = 0.1
) -> CycleWindows:
    """Non-overlapping one-cycle windows per patient, deaths and survivors alike.

    A window starts at a visit (state ``i``, time ``t``). It ends in state ``j`` when a
    later visit falls within ``t + cycle +/- tolerance x cycle``, or in death when the
    patient died by ``t + cycle``; the next window starts at that visit (or at the first
    visit after ``t + cycle`` when none fell in the band). A window whose patient was
    alive past the band but never seen in it has no known end state, and one censored
    before its end is left out: both are counted in ``n_skipped``.

    Deaths are always seen (their time is exact), a survivor's state only when a visit
    happens to fall in the band: counting both alike would overstate death whenever
    visits are irregular. The stated correction: each death is weighted by ``observable``,
    the share of the windows known to survive the band that had a visit in it (visits
    scheduled without regard to the patient's health; common practice for
    missing-at-random outcomes: inverse probability weighting, from memory). With visits
    exactly one cycle apart ``observable`` is 1 and every weight is 1.
    """
    if not cycle_years > 0:
        raise ModelError(f"cycle_years is {cycle_years}; expected a number of years > 0")
    if not 0 <= tolerance < 1:
        raise ModelError(f"tolerance is {tolerance}; expected a fraction in [0, 1)")
    slack = tolerance * cycle_years
    death = records.death_index
    order = np.lexsort((np.arange(records.n_intervals), records.patient))
    patient = records.patient[order]
    starts = np.flatnonzero(np.r_[True, patient[1:] != patient[:-1]])
    ends = np.r_[starts[1:], patient.size]
    rows: list[tuple[int, int, bool, bool, int]] = []  # (from, to, is_death, treated, patient)
    skipped, seen, unseen = 0, 0, 0
    for first, last in zip(starts, ends, strict=True):
        index = order[first:last]
        years = records.years[index]
        visit_time = np.r_[0.0, np.cumsum(years)]  # start of each interval, then its end
        kind = records.end_kind[index]
        final_time, final_kind = visit_time[-1], kind[-1]
        # Visits: the start of every interval, and the end of the last when observed.
        times = visit_time[:-1]
        states = records.start_state[index]
        treated = records.treated[index]
        if final_kind == OBSERVED:
            times = np.r_[times, final_time]
            states = np.r_[states, records.end_state[index][-1]]
            treated = np.r_[treated, treated[-1]]
        k = 0
        while k < times.size:
            followed = k + 1 < times.size or (final_kind != OBSERVED and final_time > times[k])
            if not followed and final_kind != DEATH:
                break  # the last visit: nothing after it, not a window
            goal = times[k] + cycle_years
            band = np.flatnonzero(np.abs(times - goal) <= slack)
            band = band[band > k]
            died_by_goal = final_kind == DEATH and final_time <= goal
            if band.size and not (died_by_goal and final_time < times[band[0]]):
                j = band[0]
                rows.append((states[k], states[j], False, treated[k], patient[first]))
                seen += 1
                k = j
                continue
            if died_by_goal:
                rows.append((states[k], death, True, treated[k], patient[first]))
                break
            alive_past_band = times[-1] > goal + slack or (
                final_kind != CENSORED and final_time > goal + slack
            )
            if alive_past_band:
                unseen += 1
            skipped += 1
            later = np.flatnonzero(times >= goal)
            if not later.size:
                break
            k = later[0]
    observable = seen / (seen + unseen) if seen + unseen else 1.0
    table = np.array(rows, dtype=float).reshape(-1, 5)
    is_death = table[:, 2].astype(bool)
    return CycleWindows(
        start_state=table[:, 0].astype(int),
        end_state=table[:, 1].astype(int),
        weight=np.where(is_death, observable, 1.0),
        treated=table[:, 3].astype(bool),
        patient=table[:, 4].astype(int),
        n_skipped=skipped,
        observable=float(observable),
    )


def estimate_counts(
    records: CohortRecords,
    cycle_years: float = 1.0,
    *,
    prior: float = 0.0,
    tolerance: float = 0.1,
) -> list[CountEstimate]:
    """Count-based estimates, one per treatment group present (untreated, treated).

    Parameters
    ----------
    records : CohortRecords
    cycle_years : float
        Cycle length in years; intervals of this length are counted.
    prior : float
        Dirichlet pseudo-count added to every entry of each alive row (>= 0).
    tolerance : float
        See :func:`transition_counts`.

    Returns
    -------
    list of CountEstimate

    Raises
    ------
    ModelError
        When no interval is one cycle long, or ``prior`` < 0.
    """
    if not prior >= 0:
        raise ModelError(f"prior is {prior}; expected a pseudo-count >= 0")
    windows = one_cycle_windows(records, cycle_years, tolerance=tolerance)
    if not windows.weight.size:
        raise ModelError(
            f"none of the {records.n_intervals} observation intervals gives a window of one "
            f"cycle ({cycle_years} years +/- {tolerance:.0%}); expected visits about one "
            "cycle apart (use the panel method for irregular visits)",
            file=records.source,
        )
    n_states = records.n_states
    pair_index = windows.start_state * n_states + windows.end_state
    estimates = []
    for group, flag in TREATMENT_GROUPS.items():  # two groups, not a loop over states
        chosen = windows.treated == flag
        if not chosen.any():
            continue
        counts = np.bincount(
            pair_index[chosen], weights=windows.weight[chosen], minlength=n_states * n_states
        )
        estimates.append(
            CountEstimate(
                state_ids=records.state_ids,
                group=group,
                counts=counts.reshape(n_states, n_states).astype(float),
                prior=float(prior),
                cycle_years=float(cycle_years),
                n_patients=int(np.unique(windows.patient[chosen]).size),
                n_skipped=windows.n_skipped if group == "untreated" else 0,
                source=records.source,
            )
        )
    return estimates
