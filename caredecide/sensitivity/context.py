"""Decision thresholds in context: how far from the base value, and how likely beyond.

A threshold alone does not tell a committee whether to worry. This module puts each one
beside the estimate's base value and plausible range, and asks the parameter's own
distribution how likely a value beyond the threshold is:

* ``distance_share = |t - x0| / (high - low)``: the move from the base value ``x0`` to the
  threshold ``t`` as a share of the plausible range;
* ``probability_beyond``: the probability, under the parameter's distribution, of a value
  on the far side of ``t`` from ``x0`` - ``1 - F(t)`` for a threshold above the base,
  ``F(t)`` below it - that is, the probability that the decision in that cell differs
  from the base case when this estimate alone is uncertain (every other estimate at its
  base value). A Dirichlet member uses its marginal Beta(a_i, a_0 - a_i) (Briggs, Ades &
  Price 2003, Med Decis Making 23(4):341-350); a parameter with no distribution has none.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from caredecide.sensitivity.thresholds import SWITCH
from caredecide.sensitivity.variation import parameter_ranges

ABOVE = "above"
BELOW = "below"

CONTEXT_COLUMNS = [
    "parameter", "state", "ages", "action_below", "action_above", "base", "low", "high",
    "threshold", "direction", "distance_share", "probability_beyond", "threshold_min",
    "threshold_max", "cells", "distribution", "label_below", "label_above", "first_cycle",
]  # fmt: skip


def parameter_cdf(model: Any, name: str) -> tuple[Callable[[np.ndarray], np.ndarray] | None, str]:
    """The cumulative distribution function of a parameter, and its description.

    Returns
    -------
    (callable or None, str)
        ``F(x)`` over arrays (None for a fixed parameter) and a short text such as
        ``"beta(alpha=..., beta=...)"``.
    """
    from scipy import stats

    from caredecide.distributions import distribution_from_spec

    parameter = (getattr(model, "parameters", None) or {}).get(name)
    if parameter is not None:
        if parameter.distribution is None:
            return None, "fixed (no distribution)"
        dist = distribution_from_spec(
            parameter.distribution, where=f"parameters.{name}.distribution"
        )
        if dist.kind == "fixed":
            return None, "fixed (no distribution)"
        params = ", ".join(f"{k}={v:.6g}" for k, v in dist.params.items())
        return dist.scipy().cdf, f"{dist.kind}({params})"
    for group_name, group in (getattr(model, "groups", None) or {}).items():
        if name in group.members:
            alphas = group.alphas()
            a_i = float(alphas[group.members.index(name)])
            rest = float(sum(alphas)) - a_i
            text = f"beta({a_i:.6g}, {rest:.6g}), marginal of Dirichlet group {group_name}"
            return stats.beta(a_i, rest).cdf, text
    raise KeyError(f"unknown parameter {name!r}")


def probability_beyond(
    cdf: Callable[[np.ndarray], np.ndarray] | None, threshold: np.ndarray, base: float
) -> np.ndarray:
    """P(value on the far side of ``threshold`` from ``base``); NaN without a distribution."""
    threshold = np.asarray(threshold, dtype=float)
    if cdf is None:
        return np.full(threshold.shape, np.nan)
    below = np.asarray(cdf(threshold), dtype=float)
    return np.where(threshold >= base, 1.0 - below, below)


def threshold_context(model: Any, thresholds: pd.DataFrame) -> pd.DataFrame:
    """The threshold table with base value, range, distance and probability beyond.

    Parameters
    ----------
    model : caredecide.model.Model
    thresholds : pandas.DataFrame
        From :func:`caredecide.sensitivity.parameter_thresholds` (one row per cell).

    Returns
    -------
    pandas.DataFrame
        One row per (parameter, state, switch, side of the base value, band of
        consecutive cycles): ``parameter, state, ages`` (e.g. ``"84-89"``),
        ``action_below, action_above`` (ids), ``base, low, high``, ``threshold`` (the
        one nearest the base value in the band), ``direction`` ("above"/"below": where
        the threshold lies from the base value), ``distance_share``,
        ``probability_beyond`` (of ``threshold``: the chance at least one cell of the
        band flips), ``threshold_min, threshold_max``, ``cells`` and ``distribution``.
        ``label_below, label_above`` are the actions' labels; ``first_cycle`` the band's
        first decision cycle. Rows sorted by parameter
        (model order), then distance. A parameter without a
        switch keeps one row whose ``ages`` holds the status text.
    """
    switches = thresholds[thresholds["status"] == SWITCH].copy()
    names = list(dict.fromkeys(thresholds["parameter"]))
    ranges = parameter_ranges(model, names).set_index("parameter")
    cdfs = {name: parameter_cdf(model, name) for name in names}
    rows = []
    if len(switches):
        switches["base"] = switches["parameter"].map(ranges["base"])
        switches["direction"] = np.where(switches["threshold"] >= switches["base"], ABOVE, BELOW)
        keys = ["parameter", "state", "action_below", "action_above", "direction"]
        switches = switches.sort_values([*keys, "cycle"], kind="stable")
        cycle = switches["cycle"].astype(int).to_numpy()
        same = (switches[keys].shift() == switches[keys]).all(axis=1).to_numpy()
        switches["band"] = np.cumsum(~same | (np.diff(cycle, prepend=cycle[0] - 2) != 1))
        for _, band in switches.groupby("band", sort=False):
            first = band.iloc[0]
            name = first["parameter"]
            base = float(ranges.at[name, "base"])
            low, high = float(ranges.at[name, "low"]), float(ranges.at[name, "high"])
            values = band["threshold"].to_numpy(dtype=float)
            nearest = float(values[np.argmin(np.abs(values - base))])
            cdf, text = cdfs[name]
            rows.append(
                {
                    "parameter": name,
                    "state": first["state"],
                    "ages": _ages(band),
                    "action_below": first["action_below"],
                    "action_above": first["action_above"],
                    "base": base,
                    "low": low,
                    "high": high,
                    "threshold": nearest,
                    "direction": first["direction"],
                    "distance_share": abs(nearest - base) / (high - low) if high > low else np.nan,
                    "probability_beyond": float(probability_beyond(cdf, np.asarray(nearest), base)),
                    "threshold_min": float(values.min()),
                    "threshold_max": float(values.max()),
                    "cells": len(band),
                    "distribution": text,
                    "first_cycle": int(band["cycle"].iloc[0]),
                }
            )
    for name in names:
        if not (len(switches) and (switches["parameter"] == name).any()):
            status = thresholds.loc[thresholds["parameter"] == name, "status"].iloc[0]
            rows.append(
                {
                    "parameter": name,
                    "ages": status,
                    "base": float(ranges.at[name, "base"]),
                    "low": float(ranges.at[name, "low"]),
                    "high": float(ranges.at[name, "high"]),
                    "distribution": cdfs[name][1],
                }
            )
    frame = pd.DataFrame(rows).reindex(columns=CONTEXT_COLUMNS)
    labels = {a.id: (getattr(a, "label", "") or a.id) for a in getattr(model, "actions", ())}
    frame["label_below"] = frame["action_below"].map(labels)
    frame["label_above"] = frame["action_above"].map(labels)
    order = {n: i for i, n in enumerate(names)}
    frame["_order"] = frame["parameter"].map(order)
    frame = frame.sort_values(["_order", "distance_share"], kind="stable", na_position="last")
    return frame.drop(columns="_order").reset_index(drop=True)


def _ages(band: pd.DataFrame) -> str:
    """``"84-89"`` (ages at the start of the first and last cycle), or cycles when no age."""
    first, last = band["age"].iloc[0], band["age"].iloc[-1]
    if pd.isna(first):
        first, last = band["cycle"].iloc[0], band["cycle"].iloc[-1]
        return f"cycles {first:g}" if first == last else f"cycles {first:g}-{last:g}"
    return f"{first:g}" if first == last else f"{first:g}-{last:g}"
