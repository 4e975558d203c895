"""The policy frontier over willingness to pay: which policy is optimal for which WTP.

For a fixed policy ``pi`` with (discounted) costs ``C_pi`` and QALYs ``E_pi`` the net
monetary benefit is a straight line in the willingness to pay ``lambda``:
``NMB_pi(lambda) = lambda E_pi - C_pi`` (Stinnett & Mullahy 1998, Med Decis Making
18(2 Suppl):S68-S80). The optimal policy of the MDP maximises the value of every state,
hence of the cohort, so the optimal net benefit is the upper envelope

    V*(lambda) = max_pi NMB_pi(lambda),

a convex, piecewise-linear function. Each policy on the envelope is optimal on one
interval of ``lambda`` (a convex set: the set where one line is the maximum of lines),
and neighbouring intervals meet where the two lines cross, at
``lambda = (C_b - C_a) / (E_b - E_a)``: the ICER of ``b`` against ``a`` (Cantor 1994,
Med Decis Making 14(3):259-265).

Method
------
1. **Grid.** Solve the model at ``G`` values of ``lambda`` in ONE batch: net benefit is
   linear in the QALY arrays, so draw ``g`` of the batch holds the QALY arrays scaled by
   ``lambda_g`` and the batch is solved at a willingness to pay of 1
   (:func:`caredecide.sensitivity.variation.compiled_over_willingness_to_pay`). Each
   grid policy is evaluated by :func:`caredecide.evaluate.evaluate_policy`. Policies
   with the same totals (they differ only where the cohort never is) are one line.
2. **Root.** Between neighbouring grid values with different lines ``a`` (left) and
   ``b`` (right), the crossing of the two lines is found by Brent's method
   (:func:`scipy.optimize.brentq`) on ``NMB_a(lambda) - NMB_b(lambda)``, which changes
   sign in the bracket because ``a`` is optimal at its left end and ``b`` at its right.
3. **Check.** The model is solved again at every crossing (one batch). If the optimal
   policy there beats both lines (by more than a tolerance), a policy the grid missed
   has been found: the bracket splits in two at the crossing and step 2 repeats.
   Otherwise the crossing is a switch point. Each round is one batched solve, and
   there are finitely many policies, so the refinement ends with every policy on the
   envelope between the range's ends: nothing is lost between grid values.

The result lists each distinct optimal policy, its WTP interval, costs, QALYs and
life-years, how it was found (grid or refinement) and a plain-language summary.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from caredecide.compiled import CompiledModel
from caredecide.errors import ModelError, Problem
from caredecide.objective import Objective
from caredecide.sensitivity.variation import compiled_over_willingness_to_pay
from caredecide.solvers import PolicyResult, solve
from caredecide.strategies import evaluate_policies

DEFAULT_GRID = 21
"""Grid values of the willingness to pay solved in the first batch."""
MAX_ROUNDS = 60
"""Refinement rounds at most (each one batched solve)."""
RELATIVE_TOLERANCE = 1e-9
"""Net benefits closer than this (relative to |lambda E| + |C|) count as equal."""
FOUND_GRID = "grid"
FOUND_REFINEMENT = "refinement (between grid values)"


@dataclass
class PolicyFrontier:
    """Optimal policies over a range of willingness to pay.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per interval, in increasing WTP: ``policy`` (label P1, P2, ...),
        ``wtp_from``, ``wtp_to`` (money per QALY), ``cost``, ``qalys``, ``life_years``
        (discounted, per person), their ``*_undiscounted`` twins,
        ``net_monetary_benefit_from`` / ``_to`` (at the ends of the interval),
        ``found_by`` and ``structure`` (the policy in words).
    switches : pandas.DataFrame
        One row per switch point: ``wtp``, ``from_policy``, ``to_policy``,
        ``nmb_from``, ``nmb_to`` (both policies' NMB there; equal within tolerance).
    policies : dict of str to (Tpi, S) int
        The policy of each label.
    wtp_range : (float, float)
    rounds : int
        Refinement rounds run after the grid.
    grid : (G,) float
        The grid values solved first.
    n_solves : int
        Willingness-to-pay values solved in total (grid + crossings).
    success : bool
        False when the refinement hit :data:`MAX_ROUNDS` (brackets left unresolved).
    """

    table: pd.DataFrame
    switches: pd.DataFrame
    policies: dict[str, np.ndarray]
    wtp_range: tuple[float, float]
    rounds: int
    grid: np.ndarray
    n_solves: int
    success: bool = True
    notes: list[str] = field(default_factory=list)


_TOTALS = (
    ("cost", "costs"),
    ("qalys", "qalys"),
    ("life_years", "life_years"),
    ("cost_undiscounted", "costs_undiscounted"),
    ("qalys_undiscounted", "qalys_undiscounted"),
    ("life_years_undiscounted", "life_years_undiscounted"),
)


@dataclass
class _Lines:
    """Distinct policies met so far, as NMB lines ``lambda E - C``."""

    policies: list[np.ndarray] = field(default_factory=list)
    totals: list[dict[str, float]] = field(default_factory=list)
    structures: list[str] = field(default_factory=list)
    found_by: list[str] = field(default_factory=list)

    def nmb(self, k: int, wtp: float) -> float:
        return wtp * self.totals[k]["qalys"] - self.totals[k]["cost"]

    def scale(self, k: int, wtp: float) -> float:
        return abs(wtp * self.totals[k]["qalys"]) + abs(self.totals[k]["cost"])

    def add(self, compiled: CompiledModel, result: PolicyResult, found_by: str) -> np.ndarray:
        """Line index of each draw's policy in ``result`` (new lines appended)."""
        outcome, index = evaluate_policies(compiled, result.policy, Objective("net_benefit", 0.0))
        _, first_draw = np.unique(index, return_index=True)  # first draw of each row 0..U-1
        line_of = np.empty(outcome.costs.shape[0], dtype=int)
        for row, draw in enumerate(first_draw):  # one pass per distinct policy, not per draw
            totals = {name: float(getattr(outcome, attr)[row]) for name, attr in _TOTALS}
            match = self._match(totals)
            if match is None:
                match = len(self.policies)
                self.policies.append(result.policy[draw])
                self.totals.append(totals)
                self.structures.append(_structure_text(result, int(draw)))
                self.found_by.append(found_by)
            line_of[row] = match
        return line_of[index]

    def _match(self, totals: dict[str, float]) -> int | None:
        if not self.totals:
            return None
        cost = np.array([t["cost"] for t in self.totals])
        qalys = np.array([t["qalys"] for t in self.totals])
        same = np.isclose(totals["cost"], cost, rtol=1e-12, atol=1e-9) & np.isclose(
            totals["qalys"], qalys, rtol=1e-12, atol=1e-12
        )
        return int(np.argmax(same)) if same.any() else None


def _structure_text(result: PolicyResult, draw: int) -> str:
    try:
        return result.structure(draw).text
    except (ValueError, IndexError):  # a summary is a convenience; never fail the frontier
        return ""


def check_wtp_range(
    wtp_range: tuple[float, float], where: str = "wtp_range"
) -> tuple[float, float]:
    """Check ``(low, high)``: finite, ``0 <= low < high`` (money per QALY)."""
    try:
        low, high = (float(v) for v in wtp_range)
    except (TypeError, ValueError):
        raise ModelError(
            Problem(
                where,
                f"value {wtp_range!r} is not a pair of numbers; "
                "expected (low, high) in money per QALY",
            )
        ) from None
    if not (np.isfinite(low) and np.isfinite(high) and 0 <= low < high):
        raise ModelError(
            Problem(
                where,
                f"range ({low:g}, {high:g}) is not allowed; expected "
                "finite 0 <= low < high (money per QALY)",
            )
        )
    return low, high


def _solve_at(compiled: CompiledModel, wtp: np.ndarray, **solve_options) -> PolicyResult:
    """Optimal policies at each willingness to pay in ``wtp`` (one batched solve)."""
    batch = compiled_over_willingness_to_pay(compiled, wtp)
    return solve(batch, Objective("net_benefit", 1.0), **solve_options)


def _crossing(lines: _Lines, a: int, b: int, low: float, high: float) -> float:
    """Willingness to pay in [low, high] where lines a and b have equal NMB (Brent)."""

    def difference(wtp: float) -> float:
        return lines.nmb(a, wtp) - lines.nmb(b, wtp)

    f_low, f_high = difference(low), difference(high)
    if f_low == 0.0:
        return low
    if f_high == 0.0:
        return high
    if np.sign(f_low) == np.sign(f_high):  # a tie at an end within the solver's tolerance
        return low if abs(f_low) <= abs(f_high) else high
    return float(
        brentq(difference, low, high, xtol=1e-12 * max(1.0, high), rtol=1e-15, maxiter=200)
    )


def policy_frontier(
    compiled: CompiledModel,
    wtp_range: tuple[float, float],
    *,
    grid: int = DEFAULT_GRID,
    max_rounds: int = MAX_ROUNDS,
    progress: Callable[[int, int], None] | None = None,
    **solve_options,
) -> PolicyFrontier:
    """Every optimal policy over a range of willingness to pay, with exact switch points.

    Parameters
    ----------
    compiled : CompiledModel
        One draw (D = 1); finite or infinite horizon.
    wtp_range : (float, float)
        ``(low, high)``, money per QALY, ``0 <= low < high``.
    grid : int
        Grid values solved first (>= 2); the refinement finds what the grid misses.
    max_rounds : int
        Refinement rounds at most.
    progress : callable(round, brackets), optional
        Called after each round with the round number and the brackets left.
    **solve_options
        Passed to :func:`caredecide.solvers.solve`.

    Returns
    -------
    PolicyFrontier
    """
    low, high = check_wtp_range(wtp_range)
    if compiled.n_draws != 1:
        raise ValueError(f"expected a compiled model with one draw, got {compiled.n_draws}")
    if not isinstance(grid, int) or grid < 2:
        raise ModelError(
            Problem("grid", f"value {grid!r} is not allowed; expected an integer >= 2")
        )
    values = np.linspace(low, high, grid)
    lines = _Lines()
    ids = lines.add(compiled, _solve_at(compiled, values, **solve_options), FOUND_GRID)
    change = np.flatnonzero(ids[:-1] != ids[1:])
    brackets = [(values[i], values[i + 1], int(ids[i]), int(ids[i + 1])) for i in change]
    switches: list[tuple[float, int, int]] = []
    n_solves, rounds = grid, 0
    while brackets and rounds < max_rounds:
        rounds += 1
        roots = np.array([_crossing(lines, a, b, lo, hi) for lo, hi, a, b in brackets])
        found = lines.add(compiled, _solve_at(compiled, roots, **solve_options), FOUND_REFINEMENT)
        n_solves += len(roots)
        pending = []
        for (lo, hi, a, b), root, c in zip(brackets, roots, found, strict=True):
            best = max(lines.nmb(a, root), lines.nmb(b, root))
            tolerance = RELATIVE_TOLERANCE * max(1.0, lines.scale(c, root))
            if c in (a, b) or lines.nmb(c, root) <= best + tolerance:
                switches.append((float(root), a, b))
            else:
                pending += [(lo, root, a, int(c)), (root, hi, int(c), b)]
        brackets = pending
        if progress is not None:
            progress(rounds, len(brackets))
    notes = []
    if brackets:
        notes.append(
            f"refinement stopped after {max_rounds} rounds with {len(brackets)} "
            "bracket(s) unresolved; their crossings are reported as switch points"
        )
        switches += [(_crossing(lines, a, b, lo, hi), a, b) for lo, hi, a, b in brackets]
    return _build(
        lines,
        int(ids[0]),
        sorted(switches),
        (low, high),
        rounds,
        values,
        n_solves,
        not brackets,
        notes,
    )


def _build(lines, first, switches, wtp_range, rounds, values, n_solves, success, notes):
    low, high = wtp_range
    chain = [first] + [b for _, _, b in switches]
    bounds = [low] + [w for w, _, _ in switches] + [high]
    order = {k: f"P{i + 1}" for i, k in enumerate(dict.fromkeys(chain))}
    rows = []
    for i, k in enumerate(chain):
        totals = lines.totals[k]
        rows.append(
            {
                "policy": order[k],
                "wtp_from": bounds[i],
                "wtp_to": bounds[i + 1],
                **totals,
                "net_monetary_benefit_from": lines.nmb(k, bounds[i]),
                "net_monetary_benefit_to": lines.nmb(k, bounds[i + 1]),
                "found_by": lines.found_by[k],
                "structure": lines.structures[k],
            }
        )
    table = pd.DataFrame(rows)
    switch_table = pd.DataFrame(
        {
            "wtp": [w for w, _, _ in switches],
            "from_policy": [order.get(a, "?") for _, a, _ in switches],
            "to_policy": [order[b] for _, _, b in switches],
            "nmb_from": [lines.nmb(a, w) for w, a, _ in switches],
            "nmb_to": [lines.nmb(b, w) for w, _, b in switches],
        }
    )
    policies = {label: lines.policies[k] for k, label in order.items()}
    return PolicyFrontier(
        table, switch_table, policies, (low, high), rounds, values, n_solves, success, notes
    )
