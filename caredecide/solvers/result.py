"""The result of solving a model: :class:`PolicyResult` and per-sweep :class:`SweepRecord`."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from caredecide.objective import Objective

if TYPE_CHECKING:
    from caredecide.structure import PolicyStructure


def summary_repr(name: str, scalars: dict[str, object], arrays: dict[str, object]) -> str:
    """A short repr: scalar fields in the header, then one line per array with its shape.

    Used by result objects that hold arrays over many draws, so typing the object's name in
    a notebook shows what it holds instead of printing every array; an array of one element
    (a total of one draw) is shown as its number.
    """
    header = ", ".join(f"{key}={value!r}" for key, value in scalars.items())
    lines = [f"{name}({header})"]
    for key, value in arrays.items():
        if isinstance(value, np.ndarray) and value.size == 1:  # one draw: show the number
            lines.append(f"  {key}: {value.ravel()[0]:.10g}")
        elif isinstance(value, np.ndarray):
            lines.append(f"  {key}: {value.shape} {value.dtype}")
        elif value is not None:
            lines.append(f"  {key}: {value}")
    return "\n".join(lines)


@dataclass
class SweepRecord:
    """State of a solver after one sweep (recorded with ``record_history=True``).

    Attributes
    ----------
    sweep : int
        1-based sweep (Bellman update or policy improvement) number.
    cycle : int or None
        Cycle whose values the sweep computed (backward induction), else None.
    value : (D, S) float
        Values after the sweep (objective units; present value at the model start).
        Infinite horizon: start-of-cycle convention, before the within-cycle correction.
    policy : (D, S) int
        Greedy policy at that sweep (lowest action index among exact ties).
    residual : (D,) float
        Sup-norm change of the values in this sweep, ``||v_{n+1} - v_n||`` (policy
        iteration: the Bellman residual ``||T v - v||``).
    error_bound : (D,) float
        Bound on the sup-norm distance of ``value`` from the optimal value
        (value and modified policy iteration: ``gamma * residual / (1 - gamma)``, Puterman
        1994 Theorem 6.3.1; policy iteration, where ``residual`` is the Bellman residual
        ``||T v - v||`` of the evaluated policy: ``residual / (1 - gamma)``); 0 for backward
        induction, which is exact.
    q_values : (D, S, A) float or None
        Action values the sweep chose from (``-inf`` where an action is not allowed):
        value iteration and modified policy iteration ``r + gamma P v_{n-1}``; policy
        iteration ``r + gamma P v_n`` of the evaluated policy (its improvement step);
        backward induction the cycle's action values.
    """

    sweep: int
    cycle: int | None
    value: np.ndarray
    policy: np.ndarray
    residual: np.ndarray
    error_bound: np.ndarray
    q_values: np.ndarray | None = None


@dataclass(repr=False)
class PolicyResult:
    """An optimal policy with its values, action gaps and ties, for ``D`` draws.

    ``Tpi`` is the number of cycles ``T`` for a finite horizon, or 1 for an infinite one.

    Attributes
    ----------
    policy : (D, Tpi, S) int
        Chosen action index per draw, cycle and state.
    value : (D, Tpi + 1, S) or (D, 1, S) float
        Optimal value (objective units: QALYs or money) in present value at the model
        start. For a finite horizon ``value[:, t]`` is the value from boundary ``t`` on.
    q_values : (D, Tpi, S, A) float or None
        Action values; ``-inf`` where an action is not allowed. None when solved with
        ``action_values=False`` (finite horizon: only the chosen action's value kept).
    action_gap : (D, Tpi, S) float or None
        Value lost by the next-best allowed action; ``inf`` where there is no choice.
        None with ``action_values=False``.
    next_best_action : (D, Tpi, S) int or None
        The next-best allowed action; -1 where there is no choice. None with
        ``action_values=False``.
    indifferent : (D, Tpi, S) bool
        True where the gap is within the tie tolerance (and the solver's error bound).
    decision_states : (S,) bool
        States where a choice is made (not absorbing, two or more allowed actions).
    method : str
    iterations : int
        Sweeps (backward induction: cycles; value iteration: Bellman updates; policy
        iteration: improvements).
    tolerance : float
        Stopping tolerance as given (relative to the largest |value| when ``relative``).
    relative : bool
    error_bound : (D,) float
        Bound on the sup-norm distance of ``value`` from the optimal value.
    success : bool
    message : str
    objective : Objective
    state_ids, action_ids : tuple of str
    ages : (Tpi + 1,) float or None
        Age at each boundary (finite horizon); None for an infinite horizon.
    discount : tuple of float
        Per-cycle discount factors (outcomes, costs).
    ordered_states : tuple of str
        Clinical order of the states (may be empty).
    history : list of SweepRecord or None
        Per-sweep history when solved with ``record_history=True``.
    transition_form : {"dense", "sparse"}
        How the solver stored the transitions (see :mod:`caredecide.solvers.sparse`).
    transition_rows : scipy.sparse CSR (D A S, S) or None
        The checked sparse rows the solver read (sparse backward induction with
        transitions constant over the cycles; sparse policy or value iteration), handed to
        :func:`caredecide.evaluate.evaluate_policy` (``transition_rows=``) so that the
        base case reads the dense transitions once; None otherwise.
    """

    policy: np.ndarray
    value: np.ndarray
    q_values: np.ndarray | None
    action_gap: np.ndarray | None
    next_best_action: np.ndarray | None
    indifferent: np.ndarray
    decision_states: np.ndarray
    method: str
    iterations: int
    tolerance: float
    relative: bool
    error_bound: np.ndarray
    success: bool
    message: str
    objective: Objective
    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    ages: np.ndarray | None
    discount: tuple[float, float] = (1.0, 1.0)
    ordered_states: tuple[str, ...] = ()
    history: list[SweepRecord] | None = field(default=None, repr=False)
    transition_form: str = "dense"
    """How the solver stored the transitions: "dense" arrays or "sparse" rows (CSR)."""
    transition_rows: Any = field(default=None, repr=False, compare=False)
    """The sparse rows the solver read (see above), or None."""

    @property
    def n_draws(self) -> int:
        return int(self.policy.shape[0])

    def __repr__(self) -> str:
        return summary_repr(
            "PolicyResult",
            {"method": self.method, "success": self.success, "draws": self.n_draws},
            {
                "message": self.message,
                "objective": f"{self.objective.describe()} (values in {self.objective.unit})",
                "sweeps": self.iterations,
                "tolerance": f"{self.tolerance:g} ({'relative' if self.relative else 'absolute'})",
                "error_bound (largest)": f"{float(np.max(self.error_bound)):.3g}",
                "states": ", ".join(self.state_ids),
                "actions": ", ".join(self.action_ids),
                "policy": self.policy,
                "value": self.value,
                "q_values": self.q_values,
                "action_gap": self.action_gap,
                "next_best_action": self.next_best_action,
                "indifferent": self.indifferent,
                "history": None if self.history is None else f"{len(self.history)} sweeps",
            },
        )

    @property
    def finite_horizon(self) -> bool:
        return self.ages is not None

    def value_at_cycle_start(self) -> np.ndarray:
        """(D, Tpi + 1, S) values "as at the start of cycle t" (discounted to boundary t).

        Well defined only when one factor discounts the whole objective: the QALY
        objective, or equal rates for outcomes and costs.

        Raises
        ------
        ValueError
            With differential discounting (no single factor converts present values).
        """
        if not self.finite_horizon:
            return self.value.copy()
        d_o, d_c = self.discount
        if self.objective.kind == "net_benefit" and d_o != d_c:
            raise ValueError(
                "values as at the start of a cycle are not defined with differential "
                f"discounting (per-cycle factors {d_o:g} for outcomes, {d_c:g} for costs); "
                "use the present values at the model start"
            )
        t = np.arange(self.value.shape[1])
        return self.value / (d_o**t)[None, :, None]

    def expected_value(self, start_distribution: np.ndarray) -> np.ndarray:
        """(D,) value of the cohort at the model start: ``value[:, 0] @ start_distribution``."""
        return self.value[:, 0] @ np.asarray(start_distribution, dtype=float)

    def to_frame(self, draw: int = 0) -> pd.DataFrame:
        """Long table of the policy of one draw.

        Returns
        -------
        pandas.DataFrame
            Columns cycle, age (NaN for an infinite horizon), state, action, value
            (present value at the model start, objective units), next_best_action
            (empty where there is no choice), action_gap, indifferent; one row per
            cycle and state. Solved with ``action_values=False``: next_best_action is
            empty and action_gap NaN (not kept).
        """
        n_t, n_s = self.policy.shape[1], self.policy.shape[2]
        cycle = np.repeat(np.arange(n_t), n_s)
        states = np.asarray(self.state_ids, dtype=object)
        actions = np.asarray((*self.action_ids, ""), dtype=object)  # index -1 -> ""
        ages = self.ages[:n_t] if self.ages is not None else np.full(n_t, np.nan)
        nxt, gap = self.next_best_action, self.action_gap  # None: solved without them
        no_choice = np.full(n_t * n_s, -1)
        return pd.DataFrame(
            {
                "cycle": cycle,
                "age": np.repeat(ages, n_s),
                "state": np.tile(states, n_t),
                "action": actions[self.policy[draw].ravel()],
                "value": self.value[draw, :n_t].ravel(),
                "next_best_action": actions[no_choice if nxt is None else nxt[draw].ravel()],
                "action_gap": np.full(n_t * n_s, np.nan) if gap is None else gap[draw].ravel(),
                "indifferent": self.indifferent[draw].ravel(),
            }
        )

    def structure(self, draw: int = 0) -> PolicyStructure:
        """Plain-language summary of the policy of one draw (see :mod:`caredecide.structure`)."""
        from caredecide.structure import summarize_policy

        return summarize_policy(self, draw=draw)


def build_result(
    compiled,
    objective: Objective,
    choice: tuple[np.ndarray, np.ndarray | None, np.ndarray | None, np.ndarray],
    *,
    value: np.ndarray,
    q_values: np.ndarray | None,
    decision_states: np.ndarray,
    ages: np.ndarray | None,
    history: list[SweepRecord] | None,
    **solver: Any,
) -> PolicyResult:
    """Assemble a :class:`PolicyResult` from a greedy choice and the solver's own fields.

    ``choice`` is ``(policy, action_gap, next_best_action, indifferent)`` (the gap and the
    next-best action None when not kept); ``solver``
    holds method, iterations, tolerance, relative, error_bound, success and message.
    """
    policy, gap, next_best, indifferent = choice
    return PolicyResult(
        policy=policy,
        value=value,
        q_values=q_values,
        action_gap=gap,
        next_best_action=next_best,
        indifferent=indifferent,
        decision_states=decision_states,
        objective=objective,
        state_ids=compiled.state_ids,
        action_ids=compiled.action_ids,
        ages=ages,
        discount=compiled.per_cycle_discount(),
        ordered_states=compiled.ordered_states,
        history=history,
        **solver,
    )
