"""Infinite horizon: display trace and totals of one stationary policy, dense or in CSR.

For a policy ``pi`` with transitions ``P_pi`` (S, S) and reward per cycle ``r`` (S,) the
expected total of a cohort starting at ``m_0`` is ``sum_t d^t m_0 P_pi^t r``:

* discounted (``d < 1``): ``m_0 . x`` with ``(I - d P_pi) x = r`` (a linear solve);
* undiscounted (``d = 1``): finite on the transient states, ``m_0 . x`` restricted to them
  with ``(I - Q) x = r`` (``Q`` the transient block; ``(I - Q)^-1`` is the fundamental
  matrix of the absorbing chain, Kemeny & Snell 1960, Finite Markov Chains, ch. 3); a
  closed class of states the cohort reaches adds ``+inf`` or ``-inf`` by the sign of its
  long-run reward per cycle (its stationary distribution times ``r``), nothing when its
  rewards are all 0, and NaN when reached classes disagree in sign or non-zero rewards
  average 0 in the long run (the total is undefined).

Two forms of the policy's chain hold the same arithmetic: :class:`DenseChain` (the
(D, S, S) rows of the policy, batched numpy solves, draws grouped by their pattern of
moves) and :class:`SparseChain` (each draw's policy rows gathered from the solver's CSR
rows without a dense matrix, sparse LU factorisations shared by every quantity with the
same discount factor, classes of states by ``scipy.sparse.csgraph``). The class analysis
(:func:`chain_classes`) is one piece of code on a sparse graph for both.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from caredecide.limits import DISPLAY_CAP

DISPLAY_ABSORBED = 0.999
"""Infinite horizon: the trace is shown until this share of the cohort is absorbed..."""


def policy_transition(P: np.ndarray, policy: np.ndarray) -> np.ndarray:
    """(D, S, S) rows of ``P`` (D, A, S, S) for the actions of ``policy`` (D, S)."""
    return np.take_along_axis(P, policy[:, None, :, None], axis=1)[:, 0]


def chosen(decision: np.ndarray, policy: np.ndarray) -> np.ndarray:
    """(D, S) entries of ``decision`` (D, S, A) for the actions of ``policy`` (D, S)."""
    return np.take_along_axis(decision, policy[..., None], axis=-1)[..., 0]


def policy_reward(
    parts: tuple[np.ndarray, np.ndarray], P_pi: np.ndarray, policy: np.ndarray
) -> np.ndarray:
    """(D, S) reward of a cycle for the cohort in each state under ``policy`` (D, S).

    ``parts`` = (at_decision (D, S, A), on_arrival (D, A, S)) of
    :func:`caredecide.solvers.bellman.cycle_parts`; ``P_pi`` (D, S, S).
    """
    at_decision, on_arrival = parts
    arrival = np.take_along_axis(on_arrival, policy[..., None], axis=1)  # (D, S, S') by action
    return chosen(at_decision, policy) + np.einsum("dsj,dsj->ds", P_pi, arrival)


class DenseChain:
    """The policy's (D, S, S) transitions as a dense array (numpy, batched over draws)."""

    def __init__(self, P_pi: np.ndarray, policy: np.ndarray) -> None:
        self.P_pi, self.policy = P_pi, policy

    def step(self, m: np.ndarray) -> np.ndarray:
        """Cohort (D, S) one cycle on."""
        return (m[:, None, :] @ self.P_pi)[:, 0]

    def reward(self, parts: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
        """(D, S) reward per cycle of each state under the policy (:func:`policy_reward`)."""
        return policy_reward(parts, self.P_pi, self.policy)

    def patterns(self, starts: np.ndarray):
        """Yield ``(draws, graph)``: draws sharing one pattern of moves and start states
        (``starts`` (D, S) bool), and that pattern as a CSR (S, S) graph."""
        from scipy import sparse

        D = self.P_pi.shape[0]
        moves = self.P_pi > 0
        if D == 1:  # one pattern (np.unique over rows of S^2 bits costs seconds at S = 2,000)
            yield np.zeros(1, dtype=np.intp), sparse.csr_array(moves[0])
            return
        keys = np.packbits(np.concatenate([moves.reshape(D, -1), starts], axis=1), axis=1)
        _, group, inverse = np.unique(keys, axis=0, return_index=True, return_inverse=True)
        for g, first in enumerate(group):
            yield np.flatnonzero(inverse.reshape(-1) == g), sparse.csr_array(moves[first])

    def solve(self, draws: np.ndarray, scale: float, reward: np.ndarray, keep=None):
        """(len(draws), K, Q) solutions of ``(I - scale P_pi) x = reward`` on the states
        ``keep`` (S,) bool (K of them; all when None); ``reward`` (D, S, Q)."""
        S = self.P_pi.shape[-1]
        kept = np.arange(S) if keep is None else np.flatnonzero(keep)
        Q = self.P_pi[np.ix_(draws, kept, kept)]
        return np.linalg.solve(np.eye(kept.size) - scale * Q, reward[np.ix_(draws, kept)])

    def distribution(self, draws: np.ndarray, members: np.ndarray) -> np.ndarray:
        """(len(draws), n) stationary distribution of the closed class ``members`` (n)."""
        n = members.size
        system = np.swapaxes(np.eye(n) - self.P_pi[np.ix_(draws, members, members)], 1, 2)
        system[:, -1, :] = 1.0  # pi (I - P) = 0 with sum pi = 1
        rhs = np.zeros((draws.size, n, 1))
        rhs[:, -1, 0] = 1.0
        return np.linalg.solve(system, rhs)[..., 0]


class SparseChain:
    """The policy's transitions as one CSR (S, S) matrix per draw, gathered from the
    checked CSR rows (D A S, S) the solver read (never a dense S x S matrix)."""

    def __init__(self, rows: Any, policy: np.ndarray, n_actions: int) -> None:
        from scipy import sparse

        D, S = policy.shape
        A = n_actions
        first = (np.arange(D)[:, None] * A + policy) * S + np.arange(S)  # (D, S) row numbers
        self.policy = policy
        self.P = [sparse.csr_array(rows[first[d]]) for d in range(D)]
        for P in self.P:
            P.eliminate_zeros()
        # The cohort of every draw moves by one product with the transposed blocks.
        self._moved = sparse.block_diag([P.T for P in self.P], format="csr")

    def step(self, m: np.ndarray) -> np.ndarray:
        """Cohort (D, S) one cycle on."""
        return (self._moved @ m.reshape(-1)).reshape(m.shape)

    def reward(self, parts: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
        """(D, S) reward per cycle of each state under the policy: the chosen decision part
        plus each row's expected arrival part (one sparse product per draw)."""
        at_decision, on_arrival = parts
        D, S = self.policy.shape
        arrival = np.broadcast_to(on_arrival, (D, on_arrival.shape[1], S))
        expected = np.stack(
            [
                (P @ arrival[d].T)[np.arange(S), self.policy[d]]  # (S, A) picked by action
                for d, P in enumerate(self.P)
            ]
        )
        decision = np.broadcast_to(at_decision, (D, S, at_decision.shape[-1]))
        return chosen(decision, self.policy) + expected

    def patterns(self, starts: np.ndarray):
        """Yield ``(draws, graph)`` per draw: its moves as a CSR (S, S) graph."""
        for d, P in enumerate(self.P):
            yield np.array([d]), P

    def solve(self, draws: np.ndarray, scale: float, reward: np.ndarray, keep=None):
        """As :meth:`DenseChain.solve`: one sparse LU per draw for all the quantities."""
        from scipy import sparse
        from scipy.sparse.linalg import splu

        S = self.policy.shape[1]
        kept = np.arange(S) if keep is None else np.flatnonzero(keep)
        out = np.empty((draws.size, kept.size, reward.shape[-1]))
        for i, d in enumerate(draws):
            block = self.P[d] if keep is None else self.P[d][kept][:, kept]
            system = sparse.eye_array(kept.size, format="csc") - scale * block.tocsc()
            out[i] = splu(sparse.csc_array(system)).solve(np.ascontiguousarray(reward[d][kept]))
        return out

    def distribution(self, draws: np.ndarray, members: np.ndarray) -> np.ndarray:
        """As :meth:`DenseChain.distribution`, by a sparse solve per draw."""
        from scipy import sparse
        from scipy.sparse.linalg import spsolve

        n = members.size
        out = np.empty((draws.size, n))
        for i, d in enumerate(draws):
            block = self.P[d][members][:, members]
            system = (sparse.eye_array(n, format="csr") - block).T.tolil()
            system[n - 1, :] = 1.0  # pi (I - P) = 0 with sum pi = 1
            rhs = np.zeros(n)
            rhs[-1] = 1.0
            out[i] = spsolve(sparse.csc_array(system), rhs)
        return out


def display_trace(chain, start: np.ndarray, absorbing: np.ndarray) -> np.ndarray:
    """(D, T + 1, S) cohort from ``start`` (D, S) until :data:`DISPLAY_ABSORBED` of it is in
    the ``absorbing`` (S,) bool states, or :data:`DISPLAY_CAP` cycles."""
    rows = [start]
    m = start
    while len(rows) <= DISPLAY_CAP and (m[:, ~absorbing].sum(axis=1) > 1 - DISPLAY_ABSORBED).any():
        m = chain.step(m)
        rows.append(m)
    return np.stack(rows, axis=1)


def stationary_totals(
    chain, rewards: dict[str, np.ndarray], scales: dict[str, float], start: np.ndarray
) -> dict[str, np.ndarray]:
    """(D,) expected total ``sum_t d^t m_t . r`` over an infinite horizon, per quantity.

    Parameters
    ----------
    chain : DenseChain or SparseChain
    rewards : dict of str to (D, S) float
        Reward per cycle of each state under the policy.
    scales : dict of str to float
        Per-cycle discount factor ``d`` of each quantity (1: undiscounted).
    start : (D, S) float
        Cohort at the start.

    Quantities with the same factor share one linear solve (several right-hand sides).
    """
    totals: dict[str, np.ndarray] = {}
    for scale in sorted(set(scales.values())):
        names = [name for name in rewards if scales[name] == scale]
        reward = np.stack([rewards[name] for name in names], axis=-1)  # (D, S, Q)
        if scale < 1.0:
            values = chain.solve(np.arange(start.shape[0]), scale, reward)
            block = np.einsum("ds,dsq->dq", start, values)
        else:
            block = _undiscounted(chain, reward, start)
        totals.update(zip(names, block.T, strict=True))
    return totals


def chain_classes(graph: Any, starts: np.ndarray):
    """Classes of states of a chain's moves ``graph`` (CSR (S, S), non-zero = a move).

    Returns
    -------
    label : (S,) int
        Class of each state (strongly connected components).
    closed : (n_classes,) bool
        No move leaves the class.
    reach : (S,) bool
        Reachable from the ``starts`` (S,) bool.
    """
    from scipy.sparse.csgraph import connected_components

    n_classes, label = connected_components(graph, directed=True, connection="strong")
    source = np.repeat(np.arange(graph.shape[0]), np.diff(graph.indptr))
    leaving = label[source] != label[graph.indices]
    closed = np.ones(n_classes, dtype=bool)
    closed[label[source[leaving]]] = False
    return label, closed, reachable(graph, starts)


def reachable(graph: Any, starts: np.ndarray) -> np.ndarray:
    """(S,) bool: states reachable from the ``starts`` (S,) bool along ``graph`` (S, S)
    moves, dense bool or sparse (breadth-first search; the start states included)."""
    from scipy import sparse
    from scipy.sparse.csgraph import breadth_first_order

    S = graph.shape[0]
    moves = sparse.csr_array(graph, dtype=np.int8)
    padded = sparse.block_array(  # node S: a source moving to the starts
        [[moves, None], [sparse.csr_array(np.asarray(starts, dtype=np.int8)[None, :]), None]],
        format="csr",
    )
    padded.resize((S + 1, S + 1))
    order = breadth_first_order(padded, S, directed=True, return_predecessors=False)
    reach = np.zeros(S + 1, dtype=bool)
    reach[order] = True
    return reach[:S]


def _undiscounted(chain, reward: np.ndarray, start: np.ndarray) -> np.ndarray:
    """(D, Q) undiscounted totals of ``reward`` (D, S, Q) (see the module docstring)."""
    D, n_q = reward.shape[0], reward.shape[-1]
    starts = start > 0
    total = np.zeros((D, n_q))
    for draws, graph in chain.patterns(starts):
        label, closed, reach = chain_classes(graph, starts[draws[0]])
        transient = ~closed[label]
        part = np.zeros((draws.size, n_q))
        if transient.any():
            values = chain.solve(draws, 1.0, reward, transient)
            part = np.einsum("ds,dsq->dq", start[np.ix_(draws, np.flatnonzero(transient))], values)
        positive, negative = np.zeros(part.shape, bool), np.zeros(part.shape, bool)
        undefined = np.zeros(part.shape, bool)
        for k in np.flatnonzero(closed):
            members = np.flatnonzero(label == k)
            if not reach[members].any():
                continue
            class_reward = reward[np.ix_(draws, members)]  # (n, m, Q)
            rate = _long_run_reward(chain, draws, members, class_reward)
            positive |= rate > 0
            negative |= rate < 0
            # Non-zero rewards averaging 0 in the long run (+1, -1, +1, ...) never settle.
            undefined |= (rate == 0) & (class_reward != 0).any(axis=1)
        part = np.where(positive, np.inf, part)
        part = np.where(negative, -np.inf, part)
        total[draws] = np.where((positive & negative) | undefined, np.nan, part)
    return total


def _long_run_reward(chain, draws, members, reward: np.ndarray) -> np.ndarray:
    """(n, Q) reward per cycle in the long run of a closed class: ``pi . r`` with ``pi``
    its stationary distribution; 0 within 1e-12 of the largest |reward|."""
    if members.size == 1:
        rate = reward[:, 0]
    else:
        rate = np.einsum("dm,dmq->dq", chain.distribution(draws, members), reward)
    scale = np.abs(reward).max(axis=1)
    return np.where(np.abs(rate) <= 1e-12 * np.maximum(scale, 1.0), 0.0, rate)
