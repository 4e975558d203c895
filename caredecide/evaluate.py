"""Policy evaluation: cohort trace and totals for any policy (optimal or fixed).

The same arithmetic as the solvers (rewards from
:func:`caredecide.solvers.bellman.cycle_parts`): for a policy ``pi`` the cohort ``m_t``
(row vector over states, at boundary ``t`` before the decision) moves as
``m_{t+1} = m_t P_t[pi_t]`` (the decision-time move is part of ``P_t``) and each total is

    sum_{t<T} sum_s m_t(s) (now_t(s, pi_t(s)) + sum_s' P_t[pi_t(s)](s, s') arrival_t(pi_t(s), s'))

(one-off charges and start occupancy after the move; end occupancy), so for the optimal
policy ``outcome.value`` equals ``result.value[:, 0] @ start``. Infinite horizon: totals
by a batched linear solve ``(I - d P_pi) x = r_pi`` per quantity (outcomes at ``d_o``,
costs at ``d_c``); undiscounted totals by the same solve restricted to the non-absorbing
states (infinite when an absorbing state keeps earning). The trace is shown over a
display horizon until 99.9% of the cohort is absorbed, or a cap. A finite-horizon model
the solver keeps in sparse rows (large, few moves per state, few draws:
:func:`caredecide.solvers.sparse.choose_form`) is traced with the same sparse rows
(:func:`caredecide.solvers.sparse.sparse_trace_and_flows`); an infinite-horizon one
moves its display trace and solves its totals with the policy's rows in CSR (one sparse
LU per draw and quantity).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.compiled import ROW_SUM_TOLERANCE, STATIONARY_METHODS, CompiledModel
from caredecide.limits import DISPLAY_CAP  # (re-exported) at most this many cycles shown
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
from caredecide.solvers.sparse import choose_form, sparse_trace_and_flows

DISPLAY_ABSORBED = 0.999
"""Infinite horizon: the trace is shown until this share of the cohort is absorbed..."""

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


def _policy_transition(P: np.ndarray, policy: np.ndarray) -> np.ndarray:
    """(D, S, S) rows of ``P`` (D, A, S, S) for the actions of ``policy`` (D, S)."""
    return np.take_along_axis(P, policy[:, None, :, None], axis=1)[:, 0]


def _chosen(decision: np.ndarray, policy: np.ndarray) -> np.ndarray:
    """(D, S) entries of ``decision`` (D, S, A) for the actions of ``policy`` (D, S)."""
    return np.take_along_axis(decision, policy[..., None], axis=-1)[..., 0]


def _policy_reward(
    parts: tuple[np.ndarray, np.ndarray], P_pi: np.ndarray, policy: np.ndarray
) -> np.ndarray:
    """(D, S) reward of a cycle for the cohort in each state under ``policy`` (D, S).

    ``parts`` = (at_decision (D, S, A), on_arrival (D, A, S)) of
    :func:`caredecide.solvers.bellman.cycle_parts`; ``P_pi`` (D, S, S).
    """
    at_decision, on_arrival = parts
    arrival = np.take_along_axis(on_arrival, policy[..., None], axis=1)  # (D, S, S') by action
    return _chosen(at_decision, policy) + np.einsum("dsj,dsj->ds", P_pi, arrival)


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
        Finite horizon: the checked sparse rows of this model's transitions already read
        by the solver (``PolicyResult.transition_rows``); the cohort then moves by them
        and the dense transitions are not read again. Must come from this compiled model
        as it is now (an explicit hand-off, not a cache).
    transition_form : {"auto", "dense", "sparse"}
        Finite horizon without ``transition_rows``: move the cohort by sparse rows or by
        the dense arrays; "auto" picks as the solver does
        (:func:`caredecide.solvers.sparse.choose_form`). An infinite horizon in the
        sparse form reads the policy's rows into CSR for its trace and linear solves.

    Returns
    -------
    PolicyOutcome
    """
    form = choose_form(compiled.transition, transition_form)
    given = transition_rows is not None and compiled.n_cycles is not None
    sparse = given or (compiled.n_cycles is not None and form == "sparse")
    fused = compiled.n_cycles is not None and kernels.available() and not sparse
    check_compiled(compiled, rows=not (fused or sparse))  # those check the rows they read
    policy = check_policy(compiled, policy)
    if compiled.n_cycles is None:
        return _evaluate_infinite(compiled, policy[:, 0], objective, form == "sparse")
    rows = transition_rows if given else None
    return _evaluate_finite(compiled, policy, objective, terminal_value, sparse, rows)


def _sparse_form(compiled: CompiledModel) -> bool:
    """A finite horizon whose transitions the solver would keep in sparse rows
    (:func:`caredecide.solvers.sparse.choose_form`, "auto"): large, sparse, few draws."""
    return compiled.n_cycles is not None and choose_form(compiled.transition, "auto") == "sparse"


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
    if compiled.n_cycles is None or not kernels.available():
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
    analysis of several candidate policies needs).
    """
    if (
        compiled.n_cycles is None
        or not kernels.available()
        or len(policies) < 2
        or _sparse_form(compiled)
    ):
        return [
            evaluate_policy(compiled, policy, objective, terminal_value=terminal_value)
            for policy in policies
        ]
    check_compiled(compiled, rows=False)  # the fused loop checks the rows it reads
    checked = [check_policy(compiled, policy) for policy in policies]
    return _kernel_outcomes(compiled, checked, objective, terminal_value)


def _evaluate_infinite(compiled, policy, objective, sparse: bool) -> PolicyOutcome:
    if not compiled.is_stationary:
        raise SolverError("an infinite horizon needs stationary arrays (time axis of length 1)")
    if compiled.within_cycle not in STATIONARY_METHODS:
        raise SolverError(
            f"within-cycle method {compiled.within_cycle!r} needs a finite horizon; expected "
            f"one of {STATIONARY_METHODS} for an infinite horizon"
        )
    D, S = compiled.n_draws, compiled.n_states
    P_pi = _policy_transition(compiled.transition[:, 0], policy)
    start = np.broadcast_to(compiled.start_distribution, (D, S))
    absorbing = np.asarray(compiled.absorbing, bool)
    if absorbing.shape != (S,):
        absorbing = np.zeros(S, bool)
    d_o, d_c = compiled.per_cycle_discount()
    factor = {"life_years": d_o, "qalys": d_o, "costs": d_c}

    # Large model with few moves per state (the solver's sparse form): the policy's rows
    # in CSR for the display trace and the linear solves.
    sparse_pi = _sparse_rows(P_pi) if sparse else None

    # Display trace: one product per cycle until the cohort is absorbed (or the cap).
    rows = [start]
    m = start
    while len(rows) <= DISPLAY_CAP and (m[:, ~absorbing].sum(axis=1) > 1 - DISPLAY_ABSORBED).any():
        if sparse_pi is None:
            m = (m[:, None, :] @ P_pi)[:, 0]
        else:
            m = np.stack([sparse_pi[d].T @ m[d] for d in range(D)])
        rows.append(m)
    trace = np.stack(rows, axis=1)

    totals, flows = {}, {}
    t = np.arange(trace.shape[1])
    for discount, suffix in ((True, ""), (False, "_undiscounted")):
        parts = cycle_parts(compiled, 0, discount, life_years=True)
        for name in _QUANTITIES:
            per_cycle = _policy_reward(parts[name], P_pi, policy)  # (D, S) at the cycle start
            d = factor[name] if discount else 1.0
            totals[name + suffix] = _stationary_total(P_pi, per_cycle, d, start, sparse_pi)
            if discount:
                flows[name] = np.einsum("dts,ds->dt", trace, per_cycle) * (d**t)
    ages = compiled.start_age + compiled.cycle_length * t
    return _outcome(compiled, objective, trace, totals, flows, np.zeros(D), ages, False)


def _sparse_rows(P_pi: np.ndarray) -> list:
    """The CSR form of each draw's policy transitions ``P_pi`` (D, S, S)."""
    from scipy import sparse

    return [sparse.csr_array(P) for P in P_pi]


def _solve_rows(P_pi, sparse_pi, scale, reward, draws, keep=None) -> np.ndarray:
    """Solutions x (len(draws), K) of ``(I - scale P_pi[d]) x = reward[d]`` for ``draws``,
    on the states ``keep`` (S,) bool (K of them; all when None): dense batched, or one
    sparse LU per draw when ``sparse_pi`` (the CSR rows of each draw) is given."""
    S = P_pi.shape[-1]
    keep = np.ones(S, dtype=bool) if keep is None else keep
    if sparse_pi is None:
        Q = P_pi[draws][:, keep][:, :, keep]
        return np.linalg.solve(np.eye(int(keep.sum())) - scale * Q, reward[draws][:, keep, None])[
            ..., 0
        ]
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    kept = np.flatnonzero(keep)
    out = np.empty((len(draws), kept.size))
    for i, d in enumerate(draws):
        Q = sparse_pi[d][kept][:, kept]
        system = (sparse.eye_array(kept.size) - scale * Q).tocsc()
        out[i] = np.asarray(spsolve(system, reward[d][kept]), dtype=float).reshape(-1)
    return out


def _stationary_total(P_pi, reward, discount, start, sparse_pi=None) -> np.ndarray:
    """(D,) expected total ``sum_t d^t m_t . r`` over an infinite horizon.

    Discounted: a linear solve. Undiscounted: the total is finite on the transient
    states (a linear solve restricted to them); a closed class of states the cohort
    reaches (an absorbing state, or states it circles in forever) adds +inf or -inf by
    the sign of its long-run reward per cycle (its stationary distribution times the
    reward), and nothing when its rewards are all 0 (Kemeny & Snell 1960, Finite Markov Chains,
    ch. 3-4: absorption probabilities and the fundamental matrix; from memory). Reached
    classes of opposite signs, or a class whose non-zero rewards average 0 in the long
    run, give NaN: the total is undefined. The classes are found
    from ``P_pi`` itself, once per pattern of non-zero moves (draws usually share one).
    """
    D, S = P_pi.shape[0], P_pi.shape[-1]
    if discount < 1.0:
        values = _solve_rows(P_pi, sparse_pi, discount, reward, np.arange(D))
        return np.einsum("ds,ds->d", start, values)
    from scipy.sparse.csgraph import connected_components

    moves = P_pi > 0
    starts = np.broadcast_to(start, (D, S)) > 0
    if D == 1:  # one pattern (np.unique over rows of S^2 bits costs seconds at S = 2,000)
        group, inverse = np.zeros(1, dtype=np.intp), np.zeros(1, dtype=np.intp)
    else:
        keys = np.packbits(np.concatenate([moves.reshape(D, -1), starts], axis=1), axis=1)
        _, group, inverse = np.unique(keys, axis=0, return_index=True, return_inverse=True)
    total = np.zeros(D)
    for g, first in enumerate(group):
        draws = np.flatnonzero(inverse.reshape(-1) == g)
        graph = moves[first]
        n_classes, label = connected_components(graph, directed=True, connection="strong")
        leaves = label[:, None] != label[None, :]
        closed = np.array(
            [not (graph[label == k] & leaves[label == k]).any() for k in range(n_classes)]
        )
        reach = _reachable(graph, starts[first])
        transient = ~closed[label]
        part = np.zeros(draws.size)
        if transient.any():
            values = _solve_rows(P_pi, sparse_pi, 1.0, reward, draws, transient)
            part = np.einsum(
                "ds,ds->d", np.broadcast_to(start, (D, S))[draws][:, transient], values
            )
        positive, negative = np.zeros(draws.size, bool), np.zeros(draws.size, bool)
        undefined = np.zeros(draws.size, bool)
        for k in np.flatnonzero(closed):
            members = label == k
            if not reach[members].any():
                continue
            class_reward = reward[draws][:, members]
            rate = _long_run_reward(P_pi[draws][:, members][:, :, members], class_reward)
            positive |= rate > 0
            negative |= rate < 0
            # Non-zero rewards averaging 0 in the long run (+1, -1, +1, ...) never settle.
            undefined |= (rate == 0) & (class_reward != 0).any(axis=1)
        part = np.where(positive, np.inf, part)
        part = np.where(negative, -np.inf, part)
        total[draws] = np.where((positive & negative) | undefined, np.nan, part)
    return total


def _reachable(graph: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """(S,) bool: states reachable from the ``starts`` (S,) bool along ``graph`` (S, S)
    bool moves (breadth-first search; the start states included)."""
    from scipy import sparse
    from scipy.sparse.csgraph import breadth_first_order

    S = graph.shape[0]
    padded = np.zeros((S + 1, S + 1), dtype=bool)  # node S: a source moving to the starts
    padded[:S, :S] = graph
    padded[S, :S] = starts
    order = breadth_first_order(
        sparse.csr_array(padded), S, directed=True, return_predecessors=False
    )
    reach = np.zeros(S + 1, dtype=bool)
    reach[order] = True
    return reach[:S]


def _long_run_reward(P_class: np.ndarray, reward: np.ndarray) -> np.ndarray:
    """(D,) reward per cycle in the long run of a closed class: ``pi . r`` with ``pi`` its
    stationary distribution (``pi (I - P) = 0``, ``sum pi = 1``); 0 within 1e-12."""
    n = P_class.shape[-1]
    if n == 1:
        rate = reward[:, 0]
    else:
        system = np.swapaxes(np.eye(n) - P_class, 1, 2).copy()
        system[:, -1, :] = 1.0
        rhs = np.zeros((P_class.shape[0], n, 1))
        rhs[:, -1, 0] = 1.0
        pi = np.linalg.solve(system, rhs)[..., 0]
        rate = np.einsum("ds,ds->d", pi, reward)
    scale = np.abs(reward).max(axis=1) if reward.size else 0.0
    return np.where(np.abs(rate) <= 1e-12 * np.maximum(scale, 1.0), 0.0, rate)


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
