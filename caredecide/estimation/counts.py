"""Transition probabilities per cycle from regular-interval observations.

With the state observed once per cycle, the transitions out of state ``i`` are a
multinomial sample: the maximum-likelihood probability is ``p_ij = n_ij / n_i`` and the
uncertainty about the row is a Dirichlet distribution with parameters ``n_ij + prior``
(Briggs, Ades & Price 2003, Med Decis Making 23(4):341-350: mean ``a_j / A``, variance
``a_j (A - a_j) / (A^2 (A + 1))`` with ``A = sum_j a_j``).

Only intervals one cycle long (within ``tolerance`` x cycle) are counted; a death at
an exact time counts as a transition to death when it falls within one cycle of the
last visit. Other intervals (irregular gaps, censored ends) are left out and counted in
``n_skipped`` - use the panel estimator (:mod:`caredecide.estimation.panel`) for them.
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


def transition_counts(
    records: CohortRecords, cycle_years: float = 1.0, *, tolerance: float = 0.1
) -> tuple[np.ndarray, np.ndarray]:
    """Which intervals are one cycle long, and the state pair of each.

    Parameters
    ----------
    records : CohortRecords
    cycle_years : float
        Cycle length in years (> 0).
    tolerance : float
        Accepted deviation of an interval from one cycle, as a fraction of the cycle.

    Returns
    -------
    usable : (N,) bool
        Intervals counted: observed ends ``|years - cycle| <= tolerance x cycle``, exact
        deaths within ``(1 + tolerance)`` cycles of the last visit.
    pair_index : (N,) int
        ``start_state * S + end_state`` (meaningful where ``usable``).
    """
    if not cycle_years > 0:
        raise ModelError(f"cycle_years is {cycle_years}; expected a number of years > 0")
    if not 0 <= tolerance < 1:
        raise ModelError(f"tolerance is {tolerance}; expected a fraction in [0, 1)")
    slack = tolerance * cycle_years
    one_cycle = np.abs(records.years - cycle_years) <= slack
    within = records.years <= cycle_years + slack
    usable = ((records.end_kind == OBSERVED) & one_cycle) | ((records.end_kind == DEATH) & within)
    usable &= records.end_kind != CENSORED
    return usable, records.start_state * records.n_states + records.end_state


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
    usable, pair_index = transition_counts(records, cycle_years, tolerance=tolerance)
    if not usable.any():
        raise ModelError(
            f"none of the {records.n_intervals} observation intervals is one cycle "
            f"({cycle_years} years +/- {tolerance:.0%}) long; expected regular visits "
            "(use the panel method for irregular visits)",
            file=records.source,
        )
    n_states = records.n_states
    estimates = []
    for group, flag in TREATMENT_GROUPS.items():  # two groups, not a loop over states
        in_group = records.treated == flag
        chosen = usable & in_group
        if not chosen.any():
            continue
        counts = np.bincount(pair_index[chosen], minlength=n_states * n_states)
        estimates.append(
            CountEstimate(
                state_ids=records.state_ids,
                group=group,
                counts=counts.reshape(n_states, n_states).astype(float),
                prior=float(prior),
                cycle_years=float(cycle_years),
                n_patients=int(np.unique(records.patient[chosen]).size),
                n_skipped=int((in_group & ~usable).sum()),
                source=records.source,
            )
        )
    return estimates
