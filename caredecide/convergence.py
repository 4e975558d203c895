"""How a solver reaches its policy, sweep by sweep: the figures a teaching view shows.

One vocabulary: a *sweep* is one pass of a method over every state (backward induction:
one cycle, computed from the cycle after it; value iteration: one Bellman update; policy
iteration and modified policy iteration: one improvement step).

* :func:`trace_sweeps` solves once with the solver's per-sweep history and returns a
  :class:`SweepTrace`: values, choices and action values (Q-values) after every sweep,
  the cells whose choice changed, and for the iterative methods the residual beside the
  stopping bound ``eps (1 - gamma) / (2 gamma)`` of value iteration (Puterman 1994,
  Markov Decision Processes, section 6.3). Backward induction is exact: its trace has
  no residual and no stopping bound (``None``, never 0).
* :func:`race_methods` runs value iteration, policy iteration and modified policy
  iteration on one stationary model (:class:`MethodRace`: sweeps per method, same policy?).
* :func:`two_state_example` is the two-state example of Puterman 1994, section 3.1, as a
  compiled model, for checking the figures against the book.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.objective import Objective
from caredecide.options import check_choice, check_scalar
from caredecide.solvers import solve

TRACED_METHODS = (
    "backward_induction",
    "value_iteration",
    "policy_iteration",
    "modified_policy_iteration",
)
STATIONARY_METHODS = TRACED_METHODS[1:]
METHOD_NAMES = {
    "backward_induction": "Backward induction",
    "value_iteration": "Value iteration",
    "policy_iteration": "Policy iteration",
    "modified_policy_iteration": "Modified policy iteration",
}
MAX_SWEEPS = 5_000
"""Cap on recorded sweeps: the history keeps values and action values of every sweep."""


def stopping_bound(epsilon: float, gamma: float) -> float:
    """``eps (1 - gamma) / (2 gamma)``: value iteration stops once its residual is below.

    Then the greedy policy is eps-optimal (Puterman 1994, section 6.3).
    """
    return epsilon * (1.0 - gamma) / (2.0 * gamma)


def discount_rate_for(gamma: float, cycle_years: float) -> float:
    """The yearly discount rate whose per-cycle factor is ``gamma``: ``gamma^(-1/c) - 1``."""
    check_scalar(gamma, "gamma", float, min_val=0.0, max_val=1.0, include_boundaries="right")
    return float(gamma ** (-1.0 / cycle_years) - 1.0)


@dataclass(frozen=True)
class SweepTrace:
    """Values, choices and action values after each sweep of one method (draw 0).

    ``K`` sweeps, ``S`` states, ``A`` actions. Values are in objective units (QALYs or
    money), present value at the model start.

    Attributes
    ----------
    method : str
        One of :data:`TRACED_METHODS`.
    state_ids, action_ids : tuple of str
    decision_states : (S,) bool
        States with a choice (two or more allowed actions).
    value : (K, S) float
        Values after each sweep.
    policy : (K, S) int
        Chosen action after each sweep (the greedy action of the sweep's action values).
    q_values : (K, S, A) float
        Action values each sweep chose from; ``-inf`` where an action is not allowed.
    cycle : (K,) int or None
        Backward induction: the cycle each sweep computed (sweep 1 = the last cycle).
    residual : (K,) float or None
        Value and modified policy iteration: ``||v_n - v_{n-1}||`` (sup norm); policy
        iteration: the Bellman residual ``||T v_n - v_n||`` of the evaluated policy.
        None for backward induction (exact: nothing to converge).
    gamma : float
        Per-cycle discount factor.
    epsilon : float or None
        The ``eps`` of the stopping rule (value units); None where no ``eps`` is used
        (backward induction; policy iteration stops when no choice changes).
    bound : float or None
        Stopping bound ``eps (1 - gamma) / (2 gamma)``; None where not used.
    converged : bool
        The method met its stopping rule within the sweep cap.
    """

    method: str
    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    decision_states: np.ndarray
    value: np.ndarray
    policy: np.ndarray
    q_values: np.ndarray
    cycle: np.ndarray | None
    residual: np.ndarray | None
    gamma: float
    epsilon: float | None
    bound: float | None
    converged: bool

    @property
    def sweeps(self) -> int:
        """Sweeps the method made (backward induction: the number of cycles)."""
        return int(self.policy.shape[0])

    @property
    def method_name(self) -> str:
        return METHOD_NAMES[self.method]

    def changed(self) -> np.ndarray:
        """(K, S) bool: decision states whose choice differs from the sweep before.

        Sweep 1 has no sweep before it: its row is all False (see :meth:`cells_changed`).
        """
        out = np.zeros(self.policy.shape, dtype=bool)
        out[1:] = (self.policy[1:] != self.policy[:-1]) & self.decision_states
        return out

    def cells_changed(self) -> np.ndarray:
        """(K,) float: number of cells whose choice changed at each sweep; NaN at sweep 1."""
        counts = self.changed().sum(axis=1).astype(float)
        counts[0] = np.nan
        return counts

    def stable_from(self) -> int:
        """The sweep from which no choice changes any more (1 when none ever changes)."""
        changes = np.flatnonzero(self.changed().any(axis=1))
        return int(changes[-1] + 1) if changes.size else 1

    def _index(self, sweep: int) -> int:
        check_scalar(sweep, "sweep", int, min_val=1, max_val=self.sweeps)
        return sweep - 1

    def _state(self, state: str) -> int:
        check_choice(state, "state", self.state_ids)
        return self.state_ids.index(state)

    def action_values(self, sweep: int, state: str) -> pd.DataFrame:
        """The allowed actions of ``state`` at ``sweep``: action, value, chosen, behind.

        ``behind`` is how much less than the chosen action's value each action gives
        (0 for the chosen one). Actions not allowed in the state are left out.
        """
        k, s = self._index(sweep), self._state(state)
        q = self.q_values[k, s]
        allowed = np.isfinite(q)
        chosen = int(self.policy[k, s])
        return pd.DataFrame(
            {
                "action": [a for a, ok in zip(self.action_ids, allowed, strict=True) if ok],
                "value": q[allowed],
                "chosen": (np.arange(q.size) == chosen)[allowed],
                "behind": q[chosen] - q[allowed],
            }
        )

    def action_gap(self, sweep: int, state: str) -> float | None:
        """Value of the chosen action minus the next best at ``sweep``; None without a choice."""
        k, s = self._index(sweep), self._state(state)
        q = np.sort(self.q_values[k, s][np.isfinite(self.q_values[k, s])])
        return float(q[-1] - q[-2]) if q.size >= 2 else None

    def choices(self, sweep: int) -> pd.DataFrame:
        """State, action, value and changed (choice differs from the sweep before) at ``sweep``.

        Decision states only.
        """
        k = self._index(sweep)
        states = np.flatnonzero(self.decision_states)
        return pd.DataFrame(
            {
                "state": [self.state_ids[s] for s in states],
                "action": [self.action_ids[self.policy[k, s]] for s in states],
                "value": self.value[k, states],
                "changed": self.changed()[k, states],
            }
        )

    def to_frame(self) -> pd.DataFrame:
        """One row per sweep: sweep, cycle, residual, bound, cells_changed.

        ``cycle`` only for backward induction; ``residual`` and ``bound`` only where the
        method has them; ``cells_changed`` is empty (NA) at sweep 1.
        """
        frame = pd.DataFrame({"sweep": np.arange(1, self.sweeps + 1)})
        if self.cycle is not None:
            frame["cycle"] = self.cycle
        if self.residual is not None:
            frame["residual"] = self.residual
        if self.bound is not None:
            frame["bound"] = self.bound
        frame["cells_changed"] = pd.array(self.cells_changed(), dtype="Float64").astype("Int64")
        return frame

    def values_frame(self) -> pd.DataFrame:
        """Long table of every sweep's values: sweep, state, value."""
        k, s = self.value.shape
        return pd.DataFrame(
            {
                "sweep": np.repeat(np.arange(1, k + 1), s),
                "state": np.tile(np.asarray(self.state_ids, dtype=object), k),
                "value": self.value.ravel(),
            }
        )

    def to_dict(self) -> dict:
        """Scalars of the trace (JSON-ready): method, sweeps, gamma, epsilon, bound, ..."""
        return {
            "method": self.method,
            "sweeps": self.sweeps,
            "gamma": self.gamma,
            "epsilon": self.epsilon,
            "bound": self.bound,
            "converged": self.converged,
            "stable_from": self.stable_from(),
        }


def trace_sweeps(
    compiled: CompiledModel,
    objective: Objective,
    method: str,
    *,
    epsilon: float = 0.01,
    evaluation_sweeps: int = 20,
    max_sweeps: int = MAX_SWEEPS,
) -> SweepTrace:
    """Solve with ``method`` keeping every sweep, and return the trace of the first draw.

    Parameters
    ----------
    compiled : CompiledModel
        Finite horizon for backward induction, stationary infinite horizon otherwise.
    objective : Objective
    method : str
        One of :data:`TRACED_METHODS`.
    epsilon : float
        ``eps`` of the stopping rule in value units (absolute, not relative to the values),
        > 0. Value iteration starts from ``v_0 = 0``.
    evaluation_sweeps : int
        Partial evaluation sweeps of modified policy iteration per improvement.
    max_sweeps : int
        Cap on sweeps (the trace then says ``converged = False``).

    Raises
    ------
    RunOptionError
        An option out of range.
    SolverError
        A method that does not fit the model's horizon.
    """
    check_choice(method, "method", TRACED_METHODS)
    check_scalar(epsilon, "epsilon", float, min_val=0.0, include_boundaries="neither")
    check_scalar(max_sweeps, "max_sweeps", int, min_val=1, max_val=MAX_SWEEPS)
    result = solve(
        compiled,
        objective,
        method=method,
        tolerance=epsilon,
        relative=False,
        max_iterations=max_sweeps,
        evaluation_sweeps=evaluation_sweeps,
        record_history=True,
    )
    history = result.history or []
    gamma = float(np.asarray(compiled.per_cycle_discount()[0]).ravel()[0])
    uses_epsilon = method in ("value_iteration", "modified_policy_iteration")
    q = [r.q_values for r in history]
    return SweepTrace(
        method=method,
        state_ids=tuple(result.state_ids),
        action_ids=tuple(result.action_ids),
        decision_states=np.asarray(result.decision_states, dtype=bool),
        value=np.stack([r.value[0] for r in history]),
        policy=np.stack([r.policy[0] for r in history]),
        q_values=np.stack([x[0] for x in q if x is not None]),
        cycle=(np.array([r.cycle for r in history]) if method == "backward_induction" else None),
        residual=(
            None
            if method == "backward_induction"
            else np.array([float(r.residual[0]) for r in history])
        ),
        gamma=gamma,
        epsilon=epsilon if uses_epsilon else None,
        bound=stopping_bound(epsilon, gamma) if uses_epsilon else None,
        converged=bool(result.success),
    )


@dataclass(frozen=True)
class MethodRace:
    """The iterative methods side by side on one stationary model.

    Attributes
    ----------
    traces : dict of str to SweepTrace
        Value iteration, policy iteration, modified policy iteration (in that order).
    """

    traces: dict[str, SweepTrace]

    def final_policies(self) -> dict[str, tuple[str, ...]]:
        """Action chosen in every decision state after each method's last sweep."""
        return {
            method: tuple(trace.choices(trace.sweeps)["action"])
            for method, trace in self.traces.items()
        }

    @property
    def same_policy(self) -> bool:
        """True when every method ends with the same choice in every decision state."""
        return len(set(self.final_policies().values())) == 1

    def to_frame(self) -> pd.DataFrame:
        """One row per method: method, sweeps, stable_from, converged, policy (as text)."""
        finals = self.final_policies()
        rows = []
        for method, trace in self.traces.items():
            states = [trace.state_ids[s] for s in np.flatnonzero(trace.decision_states)]
            rows.append(
                {
                    "method": trace.method_name,
                    "sweeps": trace.sweeps,
                    "stable_from": trace.stable_from(),
                    "converged": trace.converged,
                    "policy": ", ".join(
                        f"{s}: {a}" for s, a in zip(states, finals[method], strict=True)
                    ),
                }
            )
        return pd.DataFrame(rows)


def race_methods(
    compiled: CompiledModel,
    objective: Objective,
    *,
    epsilon: float = 0.01,
    evaluation_sweeps: int = 20,
    max_sweeps: int = MAX_SWEEPS,
) -> MethodRace:
    """Trace value, policy and modified policy iteration on one stationary model."""
    return MethodRace(
        {
            method: trace_sweeps(
                compiled,
                objective,
                method,
                epsilon=epsilon,
                evaluation_sweeps=evaluation_sweeps,
                max_sweeps=max_sweeps,
            )
            for method in STATIONARY_METHODS
        }
    )


def two_state_example(gamma: float = 0.95) -> CompiledModel:
    """The two-state example of Puterman 1994, section 3.1, at discount factor ``gamma``.

    s1: action a11 (reward 5; stays or moves to s2 with probability 0.5 each) or a12
    (reward 10; moves to s2); s2: action a21 (reward -1; stays). Rewards are counted once
    per cycle at the decision (QALY objective), so no within-cycle weight touches them.
    Infinite horizon, one-year cycles.
    """
    rate = discount_rate_for(gamma, 1.0)
    check_scalar(rate, "discount rate for gamma", float, min_val=0.0, include_boundaries="neither")
    P = np.array(
        [
            [[0.5, 0.5], [0.0, 1.0]],  # a11 in s1, a21 in s2
            [[0.0, 1.0], [0.0, 1.0]],  # a12 in s1 (not allowed in s2)
        ]
    )[None, None]
    reward = np.array([[5.0, 10.0], [-1.0, -1.0]])[None, None]  # (D, T, S, A)
    return CompiledModel(
        state_ids=("s1", "s2"),
        action_ids=("a11/a21", "a12"),
        transition=P,
        allowed=np.array([[True, True], [True, False]]),
        state_qaly=np.zeros((1, 1, 2)),
        state_cost=np.zeros((1, 1, 2)),
        decision_qaly=reward,
        decision_cost=np.zeros((1, 1, 2, 2)),
        life_years=np.ones(2),
        start_distribution=np.array([1.0, 0.0]),
        n_cycles=None,
        cycle_length=1.0,
        start_age=0.0,
        discount_outcomes=rate,
        discount_costs=rate,
        within_cycle="start",
        absorbing=np.array([False, False]),
    )
