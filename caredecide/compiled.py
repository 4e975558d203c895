"""The one array representation every solver and analysis uses.

A model plus a batch of ``D`` parameter sets compiles (``caredecide.compile``) to a
:class:`CompiledModel`. Shapes use these letters:

``D``  draws (parameter sets) in the batch;
``T``  cycles in the horizon (``n_cycles``); a time axis of length 1 means "the same
       every cycle" and is broadcast;
``A``  actions; ``S`` health states.

Arrays
------
transition : (D, Tp, A, S, S) float64, Tp in {1, T}
    ``transition[d, t, a, s, s2]`` = probability of moving from ``s`` to ``s2`` during
    cycle ``t`` when action ``a`` is taken at the start of cycle ``t``. Rows of actions
    not allowed in ``s`` hold a self-loop (they are masked out by ``allowed``).
allowed : (S, A) bool
    Whether action ``a`` may be chosen in state ``s``. Absorbing states allow every
    action with identical outcomes (no decision is made there).
state_qaly : (D, Tq, S) float64, Tq in {1, T + 1}
    QALYs accrued per cycle spent in ``s`` (utility weight x cycle length in years),
    evaluated at cycle boundary ``t`` = 0..T. Subject to the within-cycle method.
state_cost : (D, Tq, S) float64
    Costs per cycle spent in ``s``; subject to the within-cycle method.
decision_qaly : (D, Td, S, A) float64, Td in {1, T}
    QALYs gained (negative: lost) when action ``a`` is taken in ``s`` at cycle ``t``
    (one-off QALY loss). Charged at the decision, not corrected within cycle.
decision_cost : (D, Td, S, A) float64
    One-off cost of taking ``a`` plus the action's per-cycle cost, charged at the
    decision (start of cycle ``t``).
life_years : (S,) float64
    Life-years per cycle in ``s`` (cycle length for alive states, 0 for dead ones).
start_distribution : (S,) float64
    Cohort proportions at cycle 0; sums to 1.

Discounting and within-cycle weights are *not* folded into these arrays: the solver
applies them (see :func:`occupancy_weights` and :func:`discount_factors`), so outcomes
and costs are discounted exactly at their own rates.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

WITHIN_CYCLE_METHODS = ("start", "end", "trapezoid", "simpson")


@dataclass(frozen=True)
class CompiledModel:
    """Arrays of a model for a batch of parameter sets (see the module docstring)."""

    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    transition: np.ndarray
    allowed: np.ndarray
    state_qaly: np.ndarray
    state_cost: np.ndarray
    decision_qaly: np.ndarray
    decision_cost: np.ndarray
    life_years: np.ndarray
    start_distribution: np.ndarray
    n_cycles: int | None
    """Number of cycles; ``None`` means an infinite horizon (stationary model)."""
    cycle_length: float = 1.0
    """Years per cycle."""
    start_age: float = 0.0
    discount_outcomes: float = 0.0
    """Annual discount rate for QALYs and life-years."""
    discount_costs: float = 0.0
    """Annual discount rate for costs."""
    within_cycle: str = "start"
    state_labels: tuple[str, ...] = ()
    action_labels: tuple[str, ...] = ()
    absorbing: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    """(S,) bool: states the cohort never leaves."""
    ordered_states: tuple[str, ...] = ()
    """States in their clinical order (e.g. stages), for structure summaries; may be empty."""
    state_groups: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    """Where each state comes from when the model declares attributes or tunnels
    (:mod:`caredecide.expand`): ``"state"`` -> declared state id, attribute name -> value
    name, tunnel name -> step (``"0"``, ``"1"``, ``"2+"``); each tuple has S entries, ``""``
    where a state does not carry the attribute or tunnel. Empty for a flat model."""

    @property
    def n_draws(self) -> int:
        return int(self.transition.shape[0])

    @property
    def n_states(self) -> int:
        return len(self.state_ids)

    @property
    def n_actions(self) -> int:
        return len(self.action_ids)

    @property
    def is_stationary(self) -> bool:
        """True when no array varies with the cycle."""
        return (
            self.transition.shape[1] == 1
            and self.state_qaly.shape[1] == 1
            and self.state_cost.shape[1] == 1
            and self.decision_qaly.shape[1] == 1
            and self.decision_cost.shape[1] == 1
        )

    def ages(self) -> np.ndarray:
        """(T + 1,) age at each cycle boundary (finite horizon only)."""
        if self.n_cycles is None:
            raise ValueError("an infinite-horizon model has no age axis")
        return self.start_age + self.cycle_length * np.arange(self.n_cycles + 1)

    def per_cycle_discount(self) -> tuple[float, float]:
        """Per-cycle discount factors (outcomes, costs): ``(1 + r) ** -cycle_length``."""
        return (
            (1.0 + self.discount_outcomes) ** -self.cycle_length,
            (1.0 + self.discount_costs) ** -self.cycle_length,
        )

    def take_draws(self, index: slice | np.ndarray) -> CompiledModel:
        """A compiled model holding only the selected draws (views where possible)."""
        from dataclasses import replace

        return replace(
            self,
            transition=self.transition[index],
            state_qaly=self.state_qaly[index],
            state_cost=self.state_cost[index],
            decision_qaly=self.decision_qaly[index],
            decision_cost=self.decision_cost[index],
        )


def occupancy_weights(method: str, n_cycles: int) -> np.ndarray:
    """Weights of the cohort occupancy at boundaries 0..T for a within-cycle method.

    Parameters
    ----------
    method : {"start", "end", "trapezoid", "simpson"}
        Start-of-cycle (left Riemann sum), end-of-cycle (right sum), half-cycle
        correction (trapezoid rule) or Simpson's 1/3 rule (Elbasha & Chhatwal 2016,
        Med Decis Making 36(1):115-131). Simpson's rule needs an even number of
        cycles; for an odd number the last three intervals use Simpson's 3/8 rule.
    n_cycles : int
        Number of cycles ``T`` (>= 1).

    Returns
    -------
    numpy.ndarray
        (T + 1,) weights; the total reward is ``sum_t w[t] * d^t * m_t . u_t``.
    """
    if method not in WITHIN_CYCLE_METHODS:
        raise ValueError(
            f"within-cycle method {method!r} is unknown; expected one of {WITHIN_CYCLE_METHODS}"
        )
    if n_cycles < 1:
        raise ValueError(f"n_cycles must be >= 1, got {n_cycles}")
    w = np.ones(n_cycles + 1)
    if method == "start":
        w[-1] = 0.0
    elif method == "end":
        w[0] = 0.0
    elif method == "trapezoid":
        w[0] = w[-1] = 0.5
    else:
        w = _simpson_weights(n_cycles)
    return w


def _simpson_weights(n: int) -> np.ndarray:
    w = np.zeros(n + 1)
    if n == 1:  # a single interval: Simpson's rule is undefined, use the trapezoid
        w[:] = 0.5
        return w
    even = n if n % 2 == 0 else n - 3
    if even > 0:
        w[0 : even + 1 : 2] += 2.0 / 3.0
        w[1:even:2] += 4.0 / 3.0
        w[0] -= 1.0 / 3.0
        w[even] -= 1.0 / 3.0
    if n % 2 == 1:  # Simpson's 3/8 rule on the last three intervals
        w[even : even + 4] += np.array([3.0, 9.0, 9.0, 3.0]) / 8.0
    return w
