"""Per-sweep traces for teaching (caredecide.convergence): checked against the two-state
example of Puterman 1994 and a plain value-iteration loop written here."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as hst

from caredecide.convergence import (
    race_methods,
    stopping_bound,
    trace_sweeps,
    two_state_example,
)
from caredecide.errors import RunOptionError
from caredecide.objective import Objective
from tests.test_solvers_models import puterman_two_state

QALYS = Objective("qalys", 0.0)


def _plain_value_iteration(gamma: float, epsilon: float) -> tuple[int, np.ndarray]:
    """Value iteration on Puterman 1994 section 3.1 written out by hand, from v0 = 0."""
    v = np.zeros(2)
    for n in range(1, 10_000):
        new = np.array(
            [
                max(5 + gamma * (0.5 * v[0] + 0.5 * v[1]), 10 + gamma * v[1]),
                -1 + gamma * v[1],
            ]
        )
        if np.abs(new - v).max() < epsilon * (1 - gamma) / (2 * gamma):
            return n, new
        v = new
    raise AssertionError("no convergence")


def test_value_iteration_on_the_two_state_example_stops_after_162_sweeps():
    # Puterman 1994, Markov Decision Processes, section 6.3: eps = 0.01, gamma = 0.95,
    # v0 = 0 -> 162 iterations (from memory); the plain loop above agrees.
    trace = trace_sweeps(two_state_example(0.95), QALYS, "value_iteration", epsilon=0.01)
    sweeps, v = _plain_value_iteration(0.95, 0.01)
    assert trace.sweeps == sweeps == 162
    assert trace.value[-1] == pytest.approx(v, abs=1e-12)
    # Exact values (Puterman 1994, section 6.1 example, from memory): v(s2) = -1/(1-g) = -20,
    # v(s1) = (5 - 0.5 * 20 g) / (1 - 0.5 g) = -8.5714 at g = 0.95; within eps / 2.
    assert trace.value[-1] == pytest.approx([-4.5 / 0.525, -20.0], abs=0.005)
    assert trace.bound == pytest.approx(0.01 * 0.05 / 1.9)
    assert trace.residual is not None and trace.residual[-1] < trace.bound <= trace.residual[-2]


def test_the_first_sweeps_hold_hand_derived_action_values():
    # From the rewards and moves of Puterman 1994 section 3.1, v0 = 0, gamma = 0.95.
    trace = trace_sweeps(two_state_example(0.95), QALYS, "value_iteration")
    assert trace.action_values(1, "s1")["value"].tolist() == pytest.approx([5.0, 10.0])
    assert trace.action_gap(1, "s1") == pytest.approx(5.0)
    assert trace.action_values(2, "s1")["value"].tolist() == pytest.approx([9.275, 9.05])
    assert trace.action_gap(2, "s1") == pytest.approx(0.225)
    assert trace.action_gap(2, "s2") is None  # one allowed action: no choice
    assert np.isnan(trace.cells_changed()[0])
    assert trace.cells_changed()[1:3].tolist() == [1.0, 0.0]
    assert trace.stable_from() == 2
    assert trace.choices(2)["changed"].tolist() == [True]


def test_backward_induction_has_no_residual_bound_or_epsilon():
    # Finite horizon 5 of Puterman 1994 section 3.1 (no discounting): the last cycle
    # chooses a12 (10 > 5), the one before a11 (9.5 > 9): hand-derived from its rewards.
    trace = trace_sweeps(puterman_two_state(5, 0.0), QALYS, "backward_induction")
    assert trace.sweeps == 5
    assert trace.residual is None and trace.bound is None and trace.epsilon is None
    assert trace.cycle is not None and trace.cycle.tolist() == [4, 3, 2, 1, 0]
    assert trace.value[0].tolist() == pytest.approx([10.0, -1.0])
    assert trace.value[1].tolist() == pytest.approx([9.5, -2.0])
    assert trace.choices(1)["action"].tolist() == ["a2"]
    assert trace.choices(2)["action"].tolist() == ["a1"]
    frame = trace.to_frame()
    assert "residual" not in frame and "bound" not in frame
    assert frame["cells_changed"].isna().tolist() == [True, False, False, False, False]


def test_the_three_methods_reach_the_same_policy_with_their_own_sweep_counts():
    race = race_methods(two_state_example(0.95), QALYS, epsilon=0.01)
    assert race.same_policy
    frame = race.to_frame()
    assert frame["sweeps"].tolist()[:2] == [162, 2]
    assert race.traces["policy_iteration"].epsilon is None
    assert race.traces["policy_iteration"].bound is None


@settings(max_examples=20)
@given(gamma=hst.floats(0.5, 0.99), epsilon=hst.floats(1e-6, 1.0))
def test_value_iteration_sweeps_agree_with_the_plain_loop(gamma, epsilon):
    # The stopping rule of Puterman 1994 section 6.3 applied by hand (common practice).
    trace = trace_sweeps(two_state_example(gamma), QALYS, "value_iteration", epsilon=epsilon)
    assert trace.sweeps == _plain_value_iteration(trace.gamma, epsilon)[0]
    assert trace.bound == pytest.approx(stopping_bound(epsilon, trace.gamma))


def test_bad_options_are_refused_naming_them():
    with pytest.raises(RunOptionError, match="epsilon"):
        trace_sweeps(two_state_example(), QALYS, "value_iteration", epsilon=0.0)
    with pytest.raises(RunOptionError, match="method"):
        trace_sweeps(two_state_example(), QALYS, "guessing")
    with pytest.raises(RunOptionError, match="gamma"):
        two_state_example(1.5)
    trace = trace_sweeps(two_state_example(), QALYS, "policy_iteration")
    with pytest.raises(RunOptionError, match="sweep"):
        trace.action_values(trace.sweeps + 1, "s1")
    with pytest.raises(RunOptionError, match="state"):
        trace.action_values(1, "s9")
