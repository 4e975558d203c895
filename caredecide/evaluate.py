"""Policy evaluation: cohort trace and totals for any policy (optimal or fixed).

The same arithmetic as the solvers (rewards from
:func:`caredecide.solvers.bellman.cycle_parts`): for a policy ``pi`` the cohort ``m_t``
(row vector over states, at boundary ``t`` before the decision) moves as
``m_{t+1} = m_t P_t[pi_t]`` (the decision-time move is part of ``P_t``) and each total is

    sum_{t<T} sum_s m_t(s) (now_t(s, pi_t(s)) + sum_s' P_t[pi_t(s)](s, s') arrival_t(pi_t(s), s'))

(one-off charges and start occupancy after the move; end occupancy), so for the optimal
policy ``outcome.value`` equals ``result.value[:, 0] @ start``. Infinite horizon
(:mod:`caredecide.stationary_totals`): totals by a linear solve ``(I - d P_pi) x = r_pi``
per discount factor (outcomes at ``d_o``, costs at ``d_c``); undiscounted totals by the
same solve restricted to the transient states (infinite when a closed class keeps
earning). The trace is shown over a display horizon until 99.9% of the cohort is
absorbed, or a cap. A finite-horizon model
the solver keeps in sparse rows (large, few moves per state, few draws:
:func:`caredecide.solvers.sparse.choose_form`) is traced with the same sparse rows
(:func:`caredecide.solvers.sparse.sparse_trace_and_flows`); an infinite-horizon one
gathers the policy's rows in CSR for its display trace, totals and classes of states
(one sparse LU per draw and discount factor).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.compiled import ROW_SUM_TOLERANCE, STATIONARY_METHODS, CompiledModel
from caredecide.limits import DISPLAY_CAP  # noqa: F401 (re-exported: cycles shown at most)
from caredecide.objective import Objective
from caredecide.solvers import kernels
from caredecide.solvers.bellman import (
    SolverError,
    check_compiled,
    combine,
    cycle_parts,
    kernel_arrays,
    raise_bad_row,
    transition_at,
    weight_table,
)
from caredecide.solvers.finite import terminal_present_value
from caredecide.solvers.result import summary_repr
from caredecide.solvers.sparse import (
    compiled_form,
    given_rows,
    sparse_trace_and_flows,
)
from caredecide.solvers.sparse import transition_rows as read_transition_rows
from caredecide.stationary_totals import (
    DISPLAY_ABSORBED,  # noqa: F401 (re-exported)
    DenseChain,
    SparseChain,
    display_trace,
    stationary_totals,
)
from caredecide.stationary_totals import policy_reward as _policy_reward
from caredecide.stationary_totals import policy_transition as _policy_transition

_QUANTITIES = ("life_years", "qalys", "costs")


@dataclass(repr=False)
class PolicyTotals:
    """Totals of a policy for ``D`` draws, without its cohort trace and flows.

    Attributes as in :class:`PolicyOutcome` (each (D,) float): ``life_years``, ``qalys``,
    ``costs``, their ``*_undiscounted`` forms, ``net_monetary_benefit``, ``value``.
    """

    life_years: np.ndarray
    qalys: np.ndarray
    costs: np.ndarray
    life_years_undiscounted: np.ndarray
    qalys_undiscounted: np.ndarray
    costs_undiscounted: np.ndarray
    net_monetary_benefit: np.ndarray
    value: np.ndarray
    objective: Objective

    def __repr__(self) -> str:
        return summary_repr(
            "PolicyTotals",
            {"draws": int(self.value.shape[0])},
            {"objective": self.objective.describe(), "qalys": self.qalys, "costs": self.costs,
             "value": self.value},
        )  # fmt: skip


@dataclass(repr=False)
class PolicyOutcome(PolicyTotals):
    """Cohort trace and totals of a policy for ``D`` draws (its :class:`PolicyTotals` and more).

    Attributes
    ----------
    trace : (D, T + 1, S) float
        Cohort proportions at boundaries 0..T (display horizon for an infinite horizon).
    life_years, qalys, costs : (D,) float
        Totals per person, discounted to the model start (life-years at the outcome rate).
    life_years_undiscounted, qalys_undiscounted, costs_undiscounted : (D,) float
    net_monetary_benefit : (D,) float
        ``willingness_to_pay * qalys - costs`` (discounted), at the objective's WTP.
    value : (D,) float
        The objective (net benefit or QALYs) including any terminal value.
    flows : dict of str to (D, T + 1) float
        Discounted QALYs, costs and life-years of cycle ``t`` at index ``t`` (one-off
        charges and the cycle's occupancy with the within-cycle weights); the last entry
        (the horizon, where no cycle starts) is 0 for a finite horizon.
    objective : Objective
    state_ids : tuple of str
    ages : (T + 1,) float
        Age at each boundary of the trace.
    finite_horizon : bool
    """

    trace: np.ndarray
    flows: dict[str, np.ndarray]
    state_ids: tuple[str, ...]
    ages: np.ndarray
    finite_horizon: bool

    def __repr__(self) -> str:
        arrays = {
            name: getattr(self, name)
            for name in (
                "trace",
                "life_years",
                "qalys",
                "costs",
                "life_years_undiscounted",
                "qalys_undiscounted",
                "costs_undiscounted",
                "net_monetary_benefit",
                "value",
            )
        }
        return summary_repr(
            "PolicyOutcome",
            {"draws": int(self.value.shape[0]), "finite_horizon": self.finite_horizon},
            {
                "objective": self.objective.describe(),
                "states": ", ".join(self.state_ids),
                **arrays,
                "flows": ", ".join(self.flows),
            },
        )

    def trace_frame(self, draw: int = 0) -> pd.DataFrame:
        """Long cohort trace of one draw: columns cycle, age, state, proportion."""
        n_t, n_s = self.trace.shape[1:]
        return pd.DataFrame(
            {
                "cycle": np.repeat(np.arange(n_t), n_s),
                "age": np.repeat(self.ages, n_s),
                "state": np.tile(np.asarray(self.state_ids, dtype=object), n_t),
                "proportion": self.trace[draw].ravel(),
            }
        )

    def flow_frame(self, draw: int = 0) -> pd.DataFrame:
        """Discounted flows of each cycle of one draw: cycle, age (at its start), life_years,
        qalys, costs."""
        frame = pd.DataFrame({"cycle": np.arange(self.trace.shape[1]), "age": self.ages})
        for name in _QUANTITIES:
            frame[name] = self.flows[name][draw]
        return frame

    def totals_frame(self) -> pd.DataFrame:
        """One row per draw: discounted and undiscounted totals, net benefit and value."""
        columns = {"draw": np.arange(self.value.shape[0])}
        for name in _QUANTITIES:
            columns[name] = getattr(self, name)
            columns[f"{name}_undiscounted"] = getattr(self, f"{name}_undiscounted")
        columns["net_monetary_benefit"] = self.net_monetary_benefit
        columns["value"] = self.value
        return pd.DataFrame(columns)

    def totals(self, draw: int = 0) -> dict[str, float]:
        """Totals of one draw as plain floats (for JSON)."""
        row = self.totals_frame().iloc[draw].to_dict()
        row.pop("draw")
        return {key: float(value) for key, value in row.items()}


def check_policy(compiled: CompiledModel, policy: np.ndarray | int) -> np.ndarray:
    """Broadcast a policy to (D, Tpi, S) int and check every action is allowed.

    Raises
    ------
    SolverError
        Naming the first state and action that is out of range or not allowed.
    """
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    n_t = compiled.n_cycles if compiled.n_cycles is not None else 1
    array = np.asarray(policy)
    if not np.issubdtype(array.dtype, np.integer):
        raise SolverError(f"policy must hold integer action indices; got dtype {array.dtype}")
    try:
        array = np.broadcast_to(array, (D, n_t, S))
    except ValueError:
        raise SolverError(
            f"policy has shape {array.shape}; expected a shape broadcastable to (draws, cycles, "
            f"states) = ({D}, {n_t}, {S})"
        ) from None
    given = array[:1] if array.strides[0] == 0 else array  # one policy shared by every draw
    bad_range = (given < 0) | (given >= A)
    if bad_range.any():
        d, t, s = np.argwhere(bad_range)[0]
        raise SolverError(
            f"policy chooses action index {given[d, t, s]} in state {compiled.state_ids[s]!r} "
            f"(cycle {t}); expected 0..{A - 1} for actions {compiled.action_ids}"
        )
    not_allowed = ~compiled.allowed[np.arange(S), given]
    if not_allowed.any():
        d, t, s = np.argwhere(not_allowed)[0]
        raise SolverError(
            f"policy chooses action {compiled.action_ids[given[d, t, s]]!r} in state "
            f"{compiled.state_ids[s]!r} (cycle {t}), where it is not allowed"
        )
    return array


def evaluate_policy(
    compiled: CompiledModel,
    policy: np.ndarray | int,
    objective: Objective,
    *,
    terminal_value: np.ndarray | float | None = None,
    transition_rows: Any = None,
    transition_form: str = "auto",
) -> PolicyOutcome:
    """Cohort trace and totals of a policy.

    Parameters
    ----------
    compiled : CompiledModel
    policy : int array broadcastable to (D, Tpi, S)
        Action index per draw, cycle and state (``Tpi`` = T, or 1 for an infinite
        horizon); e.g. ``result.policy``, ``0`` ("always the first action"), or a table.
    objective : Objective
    terminal_value : float or array broadcastable to (D, S), optional
        Finite horizon: value of each state at the end of the horizon (as in
        :func:`caredecide.solvers.solve`); added to ``value`` only.
    transition_rows : scipy.sparse CSR (D A S, S), optional
        The checked sparse rows of this model's transitions already read by the solver
        (``PolicyResult.transition_rows``; either horizon); the cohort then moves by them
        and the dense transitions are not read again. Must come from this compiled model
        as it is now (an explicit hand-off, not a cache).
    transition_form : {"auto", "dense", "sparse"}
        Without ``transition_rows``: move the cohort by sparse rows or by the dense
        arrays; "auto" picks as the solver does
        (:func:`caredecide.solvers.sparse.choose_form`). An infinite horizon in the
        sparse form gathers the policy's rows from the CSR rows for its display trace,
        linear solves and classes of states (:mod:`caredecide.stationary_totals`); no
        dense (S, S) matrix is built.

    Returns
    -------
    PolicyOutcome
    """
    form = compiled_form(compiled, transition_form)
    rows = given_rows(compiled, transition_rows)  # the solver's checked rows, if handed over
    sparse = rows is not None or form == "sparse"
    fused = compiled.n_cycles is not None and kernels.available() and not sparse
    check_compiled(compiled, rows=not (fused or sparse))  # those check the rows they read
    policy = check_policy(compiled, policy)
    if compiled.n_cycles is None:
        return _evaluate_infinite(compiled, policy[:, 0], objective, sparse, rows)
    return _evaluate_finite(compiled, policy, objective, terminal_value, sparse, rows)


def _sparse_form(compiled: CompiledModel) -> bool:
    """A finite horizon whose transitions the solver would keep in sparse rows
    (:func:`caredecide.solvers.sparse.choose_form`, "auto"): large, sparse, few draws."""
    return compiled.n_cycles is not None and compiled_form(compiled, "auto") == "sparse"


def _evaluate_finite(
    compiled, policy, objective, terminal_value, sparse, rows=None
) -> PolicyOutcome:
    D, S, T = compiled.n_draws, compiled.n_states, compiled.n_cycles
    if sparse:  # large model with few moves per state: the cohort moves by sparse rows
        trace, flows = sparse_trace_and_flows(compiled, policy, _QUANTITIES, rows)
    elif kernels.available():  # trace and flows fused; the chosen rows gathered
        return _kernel_outcomes(compiled, [policy], objective, terminal_value)[0]
    else:
        trace = np.empty((D, T + 1, S))
        trace[:, 0] = compiled.start_distribution
        for t in range(T):
            P_pi = _policy_transition(transition_at(compiled, t), policy[:, t])
            trace[:, t + 1] = (trace[:, t, None, :] @ P_pi)[:, 0]
        flows = _finite_flows(compiled, policy, trace)
    totals = {name: flow.sum(axis=1) for name, flow in flows.items()}
    terminal = np.einsum(
        "ds,ds->d", trace[:, T], terminal_present_value(compiled, objective, terminal_value)
    )
    return _outcome(compiled, objective, trace, totals, flows, terminal, compiled.ages(), True)


def _finite_flows(compiled, policy, trace) -> dict[str, np.ndarray]:
    """Discounted and undiscounted flows of each cycle (index t; the last entry 0), numpy."""
    D, T = compiled.n_draws, compiled.n_cycles
    flows = {
        f"{name}{suffix}": np.zeros((D, T + 1))
        for name in _QUANTITIES
        for suffix in ("", "_undiscounted")
    }
    for t in range(T):
        m = trace[:, t]
        P_pi = _policy_transition(transition_at(compiled, t), policy[:, t])
        for discount, suffix in ((True, ""), (False, "_undiscounted")):
            parts = cycle_parts(compiled, t, discount, life_years=True)
            for name in _QUANTITIES:
                reward = _policy_reward(parts[name], P_pi, policy[:, t])
                flows[name + suffix][:, t] = np.einsum("ds,ds->d", m, reward)
    return flows


def _compact_policy(policy: np.ndarray) -> np.ndarray:
    """A checked (D, T, S) policy as (Dk, T, S) int32, Dk = 1 when every draw shares it."""
    if policy.shape[0] > 1 and policy.strides[0] == 0:  # broadcast from one policy
        policy = policy[:1]
    return np.ascontiguousarray(policy, dtype=np.int32)


def _fused_pass(compiled, policies, keep: bool):
    """Run the fused evaluation loop over checked policies (each (D, T, S)).

    Returns ``(traces, flows, final)``: traces (K, D, T + 1, S) (None unless ``keep``),
    flows (K, 6, D, T + 1) per cycle (``keep``) or (K, 6, D, 1) totals, and the cohort at
    the horizon (K, D, S). Each draw's transitions are read once for all the policies; the
    cohort, the chosen rows and each cycle's rewards (the arithmetic of
    :func:`caredecide.solvers.bellman.cycle_parts`) are fused; no policy matrix is built.
    """
    D, S, T = compiled.n_draws, compiled.n_states, compiled.n_cycles
    K = len(policies)
    compact = [_compact_policy(policy) for policy in policies]
    sizes = np.array([p.size for p in compact], dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    weights = np.concatenate(
        np.broadcast_arrays(weight_table(compiled), weight_table(compiled, discount=False)),
        axis=-1,
    )
    traces = np.empty((K, D, T + 1, S) if keep else (K, 1, 2, S))
    flows = np.zeros((K, 2 * len(_QUANTITIES), D, T + 1 if keep else 1))
    final = np.empty((K, D, S))
    bad = np.full(4, -1, dtype=np.int64)
    kernels.kernels().evaluate_policies(
        *kernel_arrays(compiled),
        np.ascontiguousarray(compiled.life_years, dtype=float),
        np.ascontiguousarray(weights),
        np.concatenate([p.ravel() for p in compact]),
        offsets,
        np.array([p.shape[0] for p in compact], dtype=np.int64),
        np.ascontiguousarray(compiled.start_distribution, dtype=float),
        ROW_SUM_TOLERANCE,
        bad,
        keep,
        traces,
        flows,
        final,
    )
    raise_bad_row(compiled, bad)
    return (traces if keep else None), flows, final


_FLOW_NAMES = [f"{n}{suffix}" for suffix in ("", "_undiscounted") for n in _QUANTITIES]


def _kernel_outcomes(compiled, policies, objective, terminal_value) -> list[PolicyOutcome]:
    """Outcomes of checked policies (each (D, T, S)) by one fused pass (:func:`_fused_pass`)."""
    traces, flows, final = _fused_pass(compiled, policies, keep=True)
    assert traces is not None
    terminal_part = terminal_present_value(compiled, objective, terminal_value)
    outcomes = []
    for trace, flow, last in zip(traces, flows, final, strict=True):
        by_name = dict(zip(_FLOW_NAMES, flow, strict=True))
        totals = {name: f.sum(axis=1) for name, f in by_name.items()}
        terminal = np.einsum("ds,ds->d", last, terminal_part)
        outcomes.append(
            _outcome(compiled, objective, trace, totals, by_name, terminal, compiled.ages(), True)
        )
    return outcomes


def policy_totals(
    compiled: CompiledModel,
    policies: list[np.ndarray | int],
    objective: Objective,
    *,
    terminal_value: np.ndarray | float | None = None,
) -> list[PolicyTotals]:
    """The totals of :func:`evaluate_policies`, without keeping traces or flows.

    For analyses that read only the totals of many policies on many draws (a
    probabilistic analysis): a finite horizon with the compiled loops keeps two rows of
    the cohort per policy instead of its (D, T + 1, S) trace and (D, T + 1) flows, which
    spares writing (and first touching) that memory. Otherwise the totals of
    :func:`evaluate_policies`.
    """
    if compiled.n_cycles is None or not kernels.available() or compiled.sparse_transition:
        outcomes = evaluate_policies(compiled, policies, objective, terminal_value=terminal_value)
        return [_totals_of(outcome) for outcome in outcomes]
    check_compiled(compiled, rows=False)  # the fused loop checks the rows it reads
    checked = [check_policy(compiled, policy) for policy in policies]
    _, flows, final = _fused_pass(compiled, checked, keep=False)
    terminal_part = terminal_present_value(compiled, objective, terminal_value)
    result = []
    for flow, last in zip(flows, final, strict=True):
        totals = {name: f[:, 0] for name, f in zip(_FLOW_NAMES, flow, strict=True)}
        terminal = np.einsum("ds,ds->d", last, terminal_part)
        benefit, value = _benefit_and_value(objective, totals, terminal)
        result.append(
            PolicyTotals(**totals, net_monetary_benefit=benefit, value=value, objective=objective)
        )
    return result


def _totals_of(outcome: PolicyOutcome) -> PolicyTotals:
    names = [*_FLOW_NAMES, "net_monetary_benefit", "value"]
    return PolicyTotals(
        **{name: getattr(outcome, name) for name in names}, objective=outcome.objective
    )


def evaluate_policies(
    compiled: CompiledModel,
    policies: list[np.ndarray | int],
    objective: Objective,
    *,
    terminal_value: np.ndarray | float | None = None,
) -> list[PolicyOutcome]:
    """:func:`evaluate_policy` for several policies of the same compiled model.

    The same outcomes as one call per policy; with the compiled loops, a finite horizon
    reads each draw's transitions once for all the policies (what a probabilistic
    analysis of several candidate policies needs). Transitions constant over the cycles
    that the solver keeps sparse are read into CSR rows once for all the policies.
    """
    if (
        compiled.n_cycles is None
        or not kernels.available()
        or len(policies) < 2
        or _sparse_form(compiled)
    ):
        rows = None
        if (
            len(policies) > 1
            and compiled.sparse_transition is None  # dense arrays to read from
            and compiled.transition.shape[1] == 1
            and compiled_form(compiled, "auto") == "sparse"
        ):
            rows = read_transition_rows(compiled)  # checked as read, once
        return [
            evaluate_policy(
                compiled, policy, objective, terminal_value=terminal_value, transition_rows=rows
            )
            for policy in policies
        ]
    check_compiled(compiled, rows=False)  # the fused loop checks the rows it reads
    checked = [check_policy(compiled, policy) for policy in policies]
    return _kernel_outcomes(compiled, checked, objective, terminal_value)


def _evaluate_infinite(compiled, policy, objective, sparse: bool, rows=None) -> PolicyOutcome:
    if not compiled.is_stationary:
        raise SolverError("an infinite horizon needs stationary arrays (time axis of length 1)")
    if compiled.within_cycle not in STATIONARY_METHODS:
        raise SolverError(
            f"within-cycle method {compiled.within_cycle!r} needs a finite horizon; expected "
            f"one of {STATIONARY_METHODS} for an infinite horizon"
        )
    D, S = compiled.n_draws, compiled.n_states
    start = np.broadcast_to(compiled.start_distribution, (D, S))
    absorbing = np.asarray(compiled.absorbing, bool)
    if absorbing.shape != (S,):
        absorbing = np.zeros(S, bool)
    d_o, d_c = compiled.per_cycle_discount()
    factor = {"life_years": d_o, "qalys": d_o, "costs": d_c}

    # Large model with few moves per state (the solver's sparse form): the policy's rows
    # gathered from the checked CSR rows (the solver's, or read here); otherwise the
    # policy's dense (D, S, S) rows.
    if sparse:
        if rows is None:
            rows = read_transition_rows(compiled)
        chain: Any = SparseChain(rows, policy, compiled.n_actions)
    else:
        chain = DenseChain(_policy_transition(compiled.transition[:, 0], policy), policy)
    trace = display_trace(chain, start, absorbing)

    rewards, scales, flows = {}, {}, {}
    t = np.arange(trace.shape[1])
    for discount, suffix in ((True, ""), (False, "_undiscounted")):
        parts = cycle_parts(compiled, 0, discount, life_years=True)
        for name in _QUANTITIES:
            per_cycle = chain.reward(parts[name])  # (D, S) at the cycle start
            rewards[name + suffix] = per_cycle
            scales[name + suffix] = factor[name] if discount else 1.0
            if discount:
                flows[name] = np.einsum("dts,ds->dt", trace, per_cycle) * (factor[name] ** t)
    totals = stationary_totals(chain, rewards, scales, start)
    ages = compiled.start_age + compiled.cycle_length * t
    return _outcome(compiled, objective, trace, totals, flows, np.zeros(D), ages, False)


def _benefit_and_value(objective, totals, terminal) -> tuple[np.ndarray, np.ndarray]:
    """(net monetary benefit, objective value) of totals (D,), the terminal part added."""
    wtp = float(objective.willingness_to_pay)
    # WTP 0 must not turn an infinite QALY total into NaN (0 * inf).
    benefit = (wtp * totals["qalys"] if wtp else 0.0) - totals["costs"]
    return benefit, combine(objective, totals["qalys"], totals["costs"]) + terminal


def _outcome(compiled, objective, trace, totals, flows, terminal, ages, finite) -> PolicyOutcome:
    benefit, value = _benefit_and_value(objective, totals, terminal)
    return PolicyOutcome(
        trace=trace,
        life_years=totals["life_years"],
        qalys=totals["qalys"],
        costs=totals["costs"],
        life_years_undiscounted=totals["life_years_undiscounted"],
        qalys_undiscounted=totals["qalys_undiscounted"],
        costs_undiscounted=totals["costs_undiscounted"],
        net_monetary_benefit=benefit,
        value=value,
        flows={name: flows[name] for name in _QUANTITIES},
        objective=objective,
        state_ids=compiled.state_ids,
        ages=np.asarray(ages, dtype=float),
        finite_horizon=finite,
    )
