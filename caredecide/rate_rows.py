"""Rows given by ``[rates]``: each action's generator exponentiated, per draw and cycle.

All rate rows of one action share one generator ``G`` (rates per year, diagonal = minus
the total exit rate), so a path through two rate rows within one cycle is counted, and
the row of state ``i`` for a cycle of ``h`` years is row ``i`` of ``expm(h G)`` (Welton &
Ades 2005, Med Decis Making 25(6):633-645). Three exact reductions keep the number of
exponentials small:

* only the states in play (states with rate rows and their targets) enter ``G``;
* each distinct column of rates (one per draw and cycle) is exponentiated once;
* a common exit is factored out. When every state of an action's generator that has
  exits leaves at rate >= ``mu`` to the same state ``k``, and ``k`` is the one state in
  play without exits (background death to ``dead``), then ``G = G0 + mu B`` with ``B``
  equal to ``-I`` on the leaving states and ``+1`` into ``k``. On the leaving states
  ``B`` is ``-I``, which commutes with everything, so (``exp(A + cI) = e^c exp(A)``;
  Moler & Van Loan 2003, SIAM Rev 45(1):3-49) the leaving rows of ``expm(h G)`` are
  ``exp(-mu h)`` times those of ``expm(h G0)`` in every column but ``k``, and column
  ``k`` takes the rest: ``1 - exp(-mu h) + exp(-mu h) expm(h G0)[i, k]``. ``mu`` is the
  smallest rate into ``k`` of each (draw, cycle); when what remains (``G0``) does not
  change from cycle to cycle (age-dependent background mortality added to constant
  rates), one exponential per draw serves every cycle. With a second state without
  exits in play the factoring is not exact (the time spent before entering it carries
  ``exp(-mu s)`` inside an integral) and is not used.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from caredecide.conversions import _distinct_rows, _generator_exponential, _states_in_play

EXPONENTIAL_BLOCK = 1 << 15
"""Generators exponentiated at once: bounds the work arrays (the generators, their
exponentials) whatever the number of draws and cycles."""
SMALL_BLOCK = 32
"""Blocks of at most this many states are written into the rows column by column."""
STEADY_ROUND_OFF = 8 * np.finfo(float).eps
"""Rates that remain after the common exit is taken out count as the same in two cycles
when they differ by at most this, relative to the rates they came from (the subtraction
rounds; using one cycle's exponential for the other then changes a probability by about
the same relative amount)."""


@dataclass(frozen=True)
class CommonExit:
    """The exit every leaving state of one action's generator shares."""

    action: int
    """Position of the action among the actions with rate rows."""
    target: int
    """State index of ``k``, the one state in play without exits."""
    entries: np.ndarray
    """(n,) indices of the rate entries into ``k`` (one per leaving state)."""


def common_exits(action: np.ndarray, state: np.ndarray, target: np.ndarray) -> list[CommonExit]:
    """The actions whose generator has a common exit (see the module docstring).

    Parameters
    ----------
    action, state, target : numpy.ndarray
        (n,) ints per rate entry: position of its action among the actions with rate
        rows, the state it leaves and the state it enters.
    """
    found = []
    for p in np.unique(action):
        mine = action == p
        leaving = set(state[mine].tolist())
        without_exits = set(target[mine].tolist()) - leaving
        if len(without_exits) != 1:
            continue
        k = without_exits.pop()
        into_k = np.flatnonzero(mine & (target == k))
        if set(state[into_k].tolist()) == leaving:
            found.append(CommonExit(int(p), int(k), into_k))
    return found


def fill_rate_rows(
    P: np.ndarray,
    action: np.ndarray,
    state: np.ndarray,
    target: np.ndarray,
    rates: np.ndarray,
    cycle_years: float,
    *,
    deduplicate: bool = True,
    method: str = "pade",
    factor: bool = True,
) -> None:
    """Replace the rate rows of ``P`` with the rows of ``expm(cycle_years G)``.

    Parameters
    ----------
    P : numpy.ndarray, shape (D, Tp, A, S, S)
        Transitions, changed in place on the rate rows only.
    action, state, target : numpy.ndarray
        (n,) ints: action, leaving state and entered state of each rate entry.
    rates : numpy.ndarray, shape (n, D, Tp)
        Rates per year, checked (finite, >= 0).
    cycle_years : float
        Years per cycle.
    deduplicate : bool
        Exponentiate each distinct column of rates once (the result is the same to the
        last bit: a matrix's exponential does not depend on its neighbours).
    method : str
        "pade" or "uniformization" (:func:`caredecide.conversions._generator_exponential`);
        "uniformization" also keeps whole matrices (the former path, for benchmarks).
    factor : bool
        Factor out a common exit (module docstring); exact to round-off (about 1e-16).
    """
    actions = np.unique(action)
    local = np.searchsorted(actions, action)  # position of each entry's action
    n_draws, tp, _, n_states, _ = P.shape
    n_entries = len(action)
    pattern = np.zeros((n_states, n_states), dtype=bool)
    pattern[state, target] = True
    kept = np.flatnonzero(_states_in_play(pattern) | (method != "pade"))
    position = np.searchsorted(kept, np.arange(n_states))  # block index of a kept state

    exits = common_exits(local, state, target) if factor and tp > 1 else []
    exit_rates = [rates[e.entries].min(axis=0) for e in exits]  # (D, Tp) each: mu
    if not any(mu.any() for mu in exit_rates):
        exits, exit_rates = [], []
    inverse: np.ndarray | None = None  # (D Tp,) column of each (draw, cycle); None: itself
    per_draw = False  # every draw's remaining rates the same in every cycle
    if exits:
        # The rate each entry loses to the factoring: mu for entries into k, else none
        # (rate - mu >= 0: mu is the smallest of them).
        taken: list[np.ndarray | None] = [None] * n_entries
        for e, mu in zip(exits, exit_rates, strict=True):
            for n in e.entries:
                taken[n] = mu
        steady = _steady_draws(rates, taken)
        if steady.any():
            columns, inverse = _picked_columns(rates, taken, steady)
            per_draw = bool(steady.all())
        else:  # nothing to gain: every draw's remaining rates change with the cycle
            exits, exit_rates = [], []
    if not exits:
        columns = np.moveaxis(rates, 0, -1).reshape(n_draws * tp, n_entries)
    if deduplicate:
        columns, distinct = _distinct_rows(columns)
        inverse = distinct if inverse is None else distinct[inverse]

    rows = np.unique(np.stack([local, state]), axis=1)  # (action position, state) rate rows
    block = _exponentiate(
        columns,
        (local, position[state], position[target]),
        (actions.size, kept.size),
        (rows[0], position[rows[1]]),
        cycle_years,
        method,
    )  # (N, n_rows, K)
    if per_draw and inverse is not None:  # a draw's cycles share one exponential
        inverse = inverse.reshape(n_draws, tp)[:, 0]  # gather by draw only
    factored = {
        e.action: (position[e.target], np.exp(-mu * cycle_years), -np.expm1(-mu * cycle_years))
        for e, mu in zip(exits, exit_rates, strict=True)
    }  # (k's block index, exp(-mu h), 1 - exp(-mu h)), (D, Tp) each
    for r, (p, s) in enumerate(rows.T):
        source = block[:, r] if inverse is None else block[inverse, r]  # (D or D Tp, K)
        source = source.reshape(n_draws, 1 if per_draw else tp, kept.size)
        row = P[:, :, actions[p], s, :]  # (D, Tp, S), a view
        row[...] = 0.0
        if p not in factored:
            _scatter_columns(row, kept, source)
            continue
        k, alive, gone = factored[p]
        _scatter_columns(row, kept, source, alive)
        into_k = row[:, :, kept[k]]
        into_k += gone  # 1 - exp(-mu h) + exp(-mu h) expm(h G0)[i, k]
        np.minimum(into_k, 1.0, out=into_k)


def _scatter_columns(
    row: np.ndarray, kept: np.ndarray, source: np.ndarray, scale: np.ndarray | None = None
) -> None:
    """``row[:, :, kept] = source * scale[:, :, None]`` (``row`` (D, Tp, S), ``source``
    (D, Tp or 1, K), ``scale`` (D, Tp) or None), one column at a time for a small block
    (strided writes beat a scattered one)."""
    if kept.size > SMALL_BLOCK:
        row[:, :, kept] = source if scale is None else source * scale[:, :, None]
        return
    for c, j in enumerate(kept):
        if scale is None:
            row[:, :, j] = source[:, :, c]
        else:
            np.multiply(source[:, :, c], scale, out=row[:, :, j])


def _exponentiate(
    columns: np.ndarray,
    cells: tuple[np.ndarray, np.ndarray, np.ndarray],
    sizes: tuple[int, int],
    rows: tuple[np.ndarray, np.ndarray],
    cycle_years: float,
    method: str,
) -> np.ndarray:
    """Rate rows of ``expm(cycle_years G)`` for each column of rates, block by block.

    Parameters
    ----------
    columns : numpy.ndarray, shape (N, n)
        Rates per year of the n entries.
    cells : tuple of (n,) int arrays
        (action position, leaving block index, entered block index) of each entry.
    sizes : tuple of int
        (actions with rate rows, states in the block K).
    rows : tuple of (n_rows,) int arrays
        (action position, block index) of the rows wanted.

    Returns
    -------
    numpy.ndarray, shape (N, n_rows, K)
    """
    n_actions, size = sizes
    diagonal = np.arange(size)

    def rows_of(chunk: np.ndarray) -> np.ndarray:
        G = np.zeros((chunk.shape[0], n_actions, size, size))
        G[:, cells[0], cells[1], cells[2]] = chunk
        G[:, :, diagonal, diagonal] = -G.sum(axis=-1)
        G *= cycle_years
        return _generator_exponential(G, method)[:, rows[0], rows[1], :]

    if columns.shape[0] <= EXPONENTIAL_BLOCK:
        return rows_of(columns)
    out = np.empty((columns.shape[0], rows[0].size, size))
    for start in range(0, columns.shape[0], EXPONENTIAL_BLOCK):
        chunk = columns[start : start + EXPONENTIAL_BLOCK]
        out[start : start + chunk.shape[0]] = rows_of(chunk)
    return out


def _steady_draws(rates: np.ndarray, taken: list[np.ndarray | None]) -> np.ndarray:
    """(D,) bool: draws whose remaining rates (``rates`` (n, D, Tp) less ``taken``, a (D, Tp)
    array or None per entry) do not change with the cycle, to round-off relative to the
    rates they came from. One entry at a time: no copy of the rates."""
    steady = np.ones(rates.shape[1], dtype=bool)
    for given, mu in zip(rates, taken, strict=True):  # (D, Tp) at a time
        left = given if mu is None else given - mu
        tolerance = STEADY_ROUND_OFF * np.abs(given).max(axis=1)  # (D,)
        steady &= np.abs(left - left[:, :1]).max(axis=1) <= tolerance
    return steady


def _picked_columns(
    rates: np.ndarray, taken: list[np.ndarray | None], steady: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Columns of remaining rates to exponentiate: the first cycle's of a ``steady`` draw,
    every cycle's of the others; and the column of each (draw, cycle).

    Returns
    -------
    columns : numpy.ndarray, shape (N, n)
    inverse : numpy.ndarray, shape (D Tp,)
    """
    n_draws, tp = rates.shape[1:]
    picked = np.zeros((n_draws, tp), dtype=bool)
    picked[:, 0] = True
    picked[~steady] = True
    inverse = (np.cumsum(picked) - 1).reshape(n_draws, tp)
    inverse[steady] = inverse[steady, :1]
    draw, cycle = np.nonzero(picked)
    columns = rates[:, draw, cycle]  # (n, N), a copy
    for n, mu in enumerate(taken):
        if mu is not None:
            columns[n] -= mu[draw, cycle]
    return columns.T.copy(), inverse.ravel()
