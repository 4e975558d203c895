"""Helpers that build small CompiledModel arrays directly (no model file), for solver tests.

Holds no tests itself; imported by tests/test_solvers*.py, test_evaluate*.py and others.
"""

from __future__ import annotations

import numpy as np

from caredecide.compiled import CompiledModel


def _with_draw_and_time(array, trailing: int) -> np.ndarray:
    """Add leading (draw, time) axes of length 1 to an array with ``trailing`` core axes."""
    array = np.asarray(array, dtype=float)
    while array.ndim < trailing + 2:
        array = array[None]
    return array


def make_compiled(
    transition,
    *,
    state_qaly=None,
    state_cost=None,
    decision_qaly=None,
    decision_cost=None,
    allowed=None,
    n_cycles: int | None = None,
    start_distribution=None,
    discount_outcomes: float = 0.0,
    discount_costs: float = 0.0,
    within_cycle: str = "start",
    absorbing=None,
    ordered_states: tuple[str, ...] = (),
    state_ids: tuple[str, ...] | None = None,
    action_ids: tuple[str, ...] | None = None,
    cycle_length: float = 1.0,
    start_age: float = 0.0,
    life_years=None,
    move=None,
    state_action_qaly=None,
    state_action_cost=None,
) -> CompiledModel:
    """A CompiledModel from core arrays; missing axes (draw, time) are added with length 1.

    transition: (A, S, S), (Tp, A, S, S) or (D, Tp, A, S, S); state_qaly/cost: (S,),
    (Tq, S) or (D, Tq, S); decision_qaly/cost: (S, A), (Td, S, A) or (D, Td, S, A).
    Absorbing states default to those that keep the whole cohort under every action;
    life-years default to the cycle length in every other state. ``move`` is shaped like
    ``transition``; ``state_action_qaly``/``cost`` like the decision arrays (None: absent).
    """
    P = _with_draw_and_time(transition, 3)
    D = P.shape[0]
    A, S = P.shape[2], P.shape[3]

    def occ(x):
        x = _with_draw_and_time(np.zeros(S) if x is None else x, 1)
        return np.broadcast_to(x, (D, *x.shape[1:])).copy()

    def dec(x):
        x = _with_draw_and_time(np.zeros((S, A)) if x is None else x, 2)
        return np.broadcast_to(x, (D, *x.shape[1:])).copy()

    if absorbing is None:
        diag = np.diagonal(P, axis1=-2, axis2=-1)  # (D, Tp, A, S)
        absorbing = np.all(diag == 1.0, axis=(0, 1, 2))
    return CompiledModel(
        state_ids=state_ids or tuple(f"s{i}" for i in range(S)),
        action_ids=action_ids or tuple(f"a{i}" for i in range(A)),
        transition=P,
        allowed=np.ones((S, A), dtype=bool) if allowed is None else np.asarray(allowed, bool),
        state_qaly=occ(state_qaly),
        state_cost=occ(state_cost),
        decision_qaly=dec(decision_qaly),
        decision_cost=dec(decision_cost),
        life_years=(
            cycle_length * ~np.asarray(absorbing, bool)
            if life_years is None
            else np.asarray(life_years, float)
        ),
        start_distribution=(
            np.eye(S)[0] if start_distribution is None else np.asarray(start_distribution, float)
        ),
        n_cycles=n_cycles,
        cycle_length=cycle_length,
        start_age=start_age,
        discount_outcomes=discount_outcomes,
        discount_costs=discount_costs,
        within_cycle=within_cycle,
        absorbing=np.asarray(absorbing, dtype=bool),
        ordered_states=ordered_states,
        move=None if move is None else _with_draw_and_time(move, 3),
        state_action_qaly=None if state_action_qaly is None else dec(state_action_qaly),
        state_action_cost=None if state_action_cost is None else dec(state_action_cost),
    )


def puterman_two_state(n_cycles: int | None = 5, discount: float = 0.0) -> CompiledModel:
    """Puterman 1994 section 3.1 two-state example as a compiled model (QALY objective).

    s1: a11 (reward 5; stay or go to s2 with probability 0.5 each), a12 (reward 10; to s2);
    s2: a21 (reward -1; stays). s2 allows one action (the second is masked out).
    Rewards sit in decision_qaly so no within-cycle weight touches them.
    """
    P = np.array(
        [
            [[0.5, 0.5], [0.0, 1.0]],  # a11 in s1, a21 in s2
            [[0.0, 1.0], [0.0, 1.0]],  # a12 in s1, (not allowed in s2)
        ]
    )
    reward = np.array([[5.0, 10.0], [-1.0, -1.0]])
    return make_compiled(
        P,
        decision_qaly=reward,
        allowed=[[True, True], [True, False]],
        n_cycles=n_cycles,
        discount_outcomes=discount,
        discount_costs=discount,
        absorbing=[False, False],  # s2 is absorbing but still earns -1: count it as a state
        state_ids=("s1", "s2"),
        action_ids=("a1", "a2"),
    )


def random_mdp(
    rng: np.random.Generator, n_states: int, n_actions: int, n_absorbing: int = 1, n_draws: int = 1
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Random stationary arrays: (D, A, S, S) transitions, (D, S) state reward, (D, S, A).

    The last ``n_absorbing`` states are absorbing with zero reward; some actions are masked.
    """
    P = rng.random((n_draws, n_actions, n_states, n_states)) ** 3
    P /= P.sum(axis=-1, keepdims=True)
    absorbing = np.arange(n_states) >= n_states - n_absorbing
    P[:, :, absorbing] = np.eye(n_states)[absorbing]
    u = rng.uniform(0, 1, (n_draws, n_states))
    u[:, absorbing] = 0
    g = rng.uniform(-1, 1, (n_draws, n_states, n_actions))
    g[:, absorbing] = 0
    return P, u, g
