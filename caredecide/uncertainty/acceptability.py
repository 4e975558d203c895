"""Summaries of probabilistic draws: acceptability, action shares, running means.

Cost-effectiveness acceptability curve (van Hout et al. 1994, Health Econ 3(5):309-319;
from memory): for each willingness to pay lambda, the share of draws in which a
strategy has the highest net monetary benefit ``lambda * E - C``. Draws in which
several strategies tie share that draw equally, so the shares sum to 1 at every lambda.

Acceptability frontier (Fenwick, Claxton & Sculpher 2001, Health Econ 10(8):779-787;
from memory): at each lambda, the strategy with the highest *expected* net monetary
benefit -- the one a decision maker should choose -- and its probability of being cost
effective. It can differ from the strategy most often cost effective when the net
benefit distribution is skewed.

Monte Carlo standard errors are binomial, ``sqrt(p (1 - p) / D)`` (common practice).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.incremental import best_at_wtp, net_monetary_benefit
from caredecide.uncertainty.voi import check_finite, opportunity_loss

_CHUNK_ELEMENTS = 4_000_000
"""Largest (wtp, draw, strategy) block held at once (32 MB of float64)."""

__all__ = [
    "ActionShares",
    "acceptability_curve",
    "acceptability_frontier",
    "action_shares",
    "evpi_curve",
    "running_mean",
]


class ActionShares(NamedTuple):
    """Share of draws choosing each action, by cycle and state.

    Attributes
    ----------
    share : numpy.ndarray
        (T, S, A) proportion of draws whose optimal policy takes action ``a`` in state
        ``s`` at cycle ``t``; sums to 1 over ``a``.
    standard_error : numpy.ndarray
        (T, S, A) Monte Carlo standard error ``sqrt(share (1 - share) / D)``.
    """

    share: np.ndarray
    standard_error: np.ndarray


def acceptability_curve(
    costs: np.ndarray,
    qalys: np.ndarray,
    wtp_grid: Sequence[float] | np.ndarray,
    *,
    strategies: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Probability that each strategy is cost effective at each willingness to pay.

    Parameters
    ----------
    costs : array_like
        (D, K) total (discounted) cost of strategy ``k`` in draw ``d``, currency.
    qalys : array_like
        (D, K) total (discounted) QALYs.
    wtp_grid : array_like
        (W,) willingness to pay per QALY, currency, each >= 0.
    strategies : sequence of str, optional
        K strategy names (default ``"strategy 1"`` ... ``"strategy K"``).

    Returns
    -------
    pandas.DataFrame
        W * K rows (by wtp, then strategy in the given order) with columns ``wtp``,
        ``strategy``, ``probability_cost_effective`` and ``mc_se``.
    """
    cost, qaly, wtp, names = _check_inputs(costs, qalys, wtp_grid, strategies)
    probability = _probability_best(cost, qaly, wtp)
    return pd.DataFrame(
        {
            "wtp": np.repeat(wtp, len(names)),
            "strategy": np.tile(np.array(names, dtype=object), wtp.size),
            "probability_cost_effective": probability.ravel(),
            "mc_se": _binomial_se(probability, cost.shape[0]).ravel(),
        }
    )


def acceptability_frontier(
    costs: np.ndarray,
    qalys: np.ndarray,
    wtp_grid: Sequence[float] | np.ndarray,
    *,
    strategies: Sequence[str] | None = None,
) -> pd.DataFrame:
    """The strategy with the highest expected net monetary benefit at each WTP.

    Parameters
    ----------
    costs, qalys, wtp_grid, strategies
        As for :func:`acceptability_curve`.

    Returns
    -------
    pandas.DataFrame
        W rows with columns ``wtp``, ``strategy`` (highest expected NMB; ties go to the
        cheaper, then more effective, strategy as in :func:`caredecide.incremental.best_at_wtp`),
        ``expected_net_benefit`` (currency), ``probability_cost_effective`` of that
        strategy and its ``mc_se``.
    """
    cost, qaly, wtp, names = _check_inputs(costs, qalys, wtp_grid, strategies)
    mean_cost, mean_qalys = cost.mean(axis=0), qaly.mean(axis=0)
    best = np.atleast_1d(best_at_wtp(names, mean_cost, mean_qalys, wtp))
    position = {name: k for k, name in enumerate(names)}
    column = np.array([position[name] for name in best])
    rows = np.arange(wtp.size)
    probability = _probability_best(cost, qaly, wtp)[rows, column]
    expected = net_monetary_benefit(mean_cost[column], mean_qalys[column], wtp)
    return pd.DataFrame(
        {
            "wtp": wtp,
            "strategy": best.astype(object),
            "expected_net_benefit": expected,
            "probability_cost_effective": probability,
            "mc_se": _binomial_se(probability, cost.shape[0]),
        }
    )


def evpi_curve(
    costs: np.ndarray,
    qalys: np.ndarray,
    wtp_grid: Sequence[float] | np.ndarray,
) -> pd.DataFrame:
    """EVPI per person at each willingness to pay, with its Monte Carlo error.

    The same estimator as :func:`caredecide.uncertainty.voi.evpi` applied to the net
    monetary benefit ``lambda * E - C`` at each lambda.

    Parameters
    ----------
    costs, qalys, wtp_grid
        As for :func:`acceptability_curve`.

    Returns
    -------
    pandas.DataFrame
        W rows with columns ``wtp``, ``evpi`` (currency per person) and ``mc_se``.
    """
    cost, qaly, wtp, _ = _check_inputs(costs, qalys, wtp_grid, None)
    n_draws, n_strategies = cost.shape
    value = np.empty(wtp.size)
    se = np.empty(wtp.size)
    chunk = max(1, _CHUNK_ELEMENTS // (n_draws * n_strategies))
    for start in range(0, wtp.size, chunk):  # blocks of WTP values bound the memory
        block = slice(start, start + chunk)
        nmb = net_monetary_benefit(cost[None], qaly[None], wtp[block, None, None])
        value[block], se[block], _, _ = opportunity_loss(nmb)
    return pd.DataFrame({"wtp": wtp, "evpi": value, "mc_se": se})


def action_shares(policies: np.ndarray, n_actions: int) -> ActionShares:
    """Share of draws whose policy takes each action, by cycle and state.

    Parameters
    ----------
    policies : array_like of int
        (D, T, S) action index chosen in state ``s`` at cycle ``t`` under draw ``d``
        (for a stationary policy, T = 1).
    n_actions : int
        ``A``, the number of actions (indices run 0 .. A - 1).

    Returns
    -------
    ActionShares
        ``share`` and ``standard_error``, both (T, S, A).
    """
    if isinstance(n_actions, bool) or not isinstance(n_actions, int | np.integer) or n_actions < 1:
        raise ModelError(Problem("n_actions", f"expected an integer >= 1, got {n_actions!r}"))
    array = np.asarray(policies)
    if array.ndim != 3 or array.shape[0] < 1:
        raise ModelError(
            Problem(
                "policies",
                f"expected a (draws, cycles, states) array with at least one draw, got "
                f"shape {array.shape}",
            )
        )
    if not np.issubdtype(array.dtype, np.integer):
        raise ModelError(
            Problem("policies", f"expected integer action indices, got dtype {array.dtype}")
        )
    bad = np.argwhere((array < 0) | (array >= n_actions))
    if bad.size:
        d, t, s = bad[0]
        raise ModelError(
            Problem(
                f"policies[draw {d}, cycle {t}, state {s}]",
                f"action index {int(array[d, t, s])} is out of range; expected 0 to "
                f"{n_actions - 1} ({len(bad)} such value(s))",
            )
        )
    n_draws, n_cycles, n_states = array.shape
    cell = np.arange(n_cycles)[:, None] * n_states + np.arange(n_states)[None, :]  # (T, S)
    flat = (cell[None, :, :] * n_actions + array).ravel()
    counts = np.bincount(flat, minlength=n_cycles * n_states * n_actions)
    share = counts.reshape(n_cycles, n_states, n_actions) / n_draws
    return ActionShares(share=share, standard_error=_binomial_se(share, n_draws))


def running_mean(values: np.ndarray) -> pd.DataFrame:
    """Mean and its standard error after the first n draws, for convergence plots.

    Parameters
    ----------
    values : array_like
        (D,) one output per draw (e.g. incremental net benefit), in draw order.

    Returns
    -------
    pandas.DataFrame
        D rows with columns ``n`` (1..D), ``mean`` and ``se`` (sample standard
        deviation with ddof = 1 over sqrt(n); NaN for n = 1).
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size < 1:
        raise ModelError(
            Problem("values", f"expected a 1-D array with at least one draw, got shape {x.shape}")
        )
    check_finite("values", x, ("draw",))
    n = np.arange(1, x.size + 1)
    # Shift by the overall mean so the running sums of squares do not cancel.
    centred = x - x.mean()
    total = np.cumsum(centred)
    squares = np.cumsum(centred**2)
    mean = total / n + x.mean()
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = np.where(n > 1, (squares - total**2 / n) / (n - 1), np.nan)
    se = np.sqrt(np.clip(variance, 0.0, None) / n)
    return pd.DataFrame({"n": n, "mean": mean, "se": se})


def _probability_best(cost: np.ndarray, qaly: np.ndarray, wtp: np.ndarray) -> np.ndarray:
    """(W, K) share of draws in which each strategy has the highest NMB (ties split).

    One (D, K) block per WTP value: the strategies at the row maximum are counted, each
    a whole draw when it is alone there (the usual case), ``1 / n`` of one when ``n``
    strategies tie.
    """
    n_draws, n_strategies = cost.shape
    out = np.empty((wtp.size, n_strategies))
    nmb = np.empty((n_draws, n_strategies))
    for row, lam in enumerate(wtp):
        np.multiply(qaly, lam, out=nmb)  # net_monetary_benefit, in place
        nmb -= cost
        is_best = nmb == nmb.max(axis=1, keepdims=True)
        tied = np.count_nonzero(is_best, axis=1)
        if tied.max() == 1:
            out[row] = np.count_nonzero(is_best, axis=0) / n_draws
        else:
            out[row] = (is_best / tied[:, None]).sum(axis=0) / n_draws
    return out


def _binomial_se(probability: np.ndarray, n_draws: int) -> np.ndarray:
    return np.sqrt(np.clip(probability * (1.0 - probability), 0.0, None) / n_draws)


def _check_inputs(
    costs: np.ndarray,
    qalys: np.ndarray,
    wtp_grid: Sequence[float] | np.ndarray,
    strategies: Sequence[str] | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    arrays = []
    for name, values in (("costs", costs), ("qalys", qalys)):
        try:
            array = np.asarray(values, dtype=float)
        except (TypeError, ValueError) as exc:
            raise ModelError(Problem(name, f"expected a (draws, strategies) array: {exc}")) from exc
        if array.ndim != 2 or 0 in array.shape:
            raise ModelError(
                Problem(
                    name, f"expected a non-empty (draws, strategies) array, got shape {array.shape}"
                )
            )
        check_finite(name, array, ("draw", "strategy"))
        arrays.append(array)
    cost, qaly = arrays
    if cost.shape != qaly.shape:
        raise ModelError(
            Problem("qalys", f"expected the shape of costs {cost.shape}, got {qaly.shape}")
        )
    wtp = np.asarray(wtp_grid, dtype=float)
    if wtp.ndim != 1 or wtp.size == 0 or not np.all(np.isfinite(wtp)) or np.any(wtp < 0):
        raise ModelError(
            Problem(
                "wtp_grid",
                f"expected a non-empty 1-D list of finite numbers >= 0 (currency per QALY), "
                f"got {wtp_grid!r}",
            )
        )
    k = cost.shape[1]
    names = (
        [f"strategy {i + 1}" for i in range(k)]
        if strategies is None
        else list(map(str, strategies))
    )
    if len(names) != k or len(set(names)) != k:
        raise ModelError(
            Problem(
                "strategies",
                f"expected {k} unique names (one per column), got {names!r}",
            )
        )
    return cost, qaly, wtp, names
