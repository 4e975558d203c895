"""Incremental cost-effectiveness analysis of a set of strategies.

The rules are those of Cantor 1994 (Med Decis Making 14(3):259-265):

1. Sort the strategies by cost (ascending). Ties in cost are broken by effect
   (more QALYs first, so the better of two equally costly strategies comes first),
   then by name (alphabetical), so the order never depends on the input order.
2. Strategies with the same cost *and* the same QALYs as an earlier one are
   "identical to X": they keep their net monetary benefit but leave the analysis.
3. A strategy is *strongly dominated* when another one costs the same or less and
   yields the same or more QALYs (and is not identical). It is reported as
   "dominated by X", X being the cheapest non-dominated strategy that dominates it.
   A strategy that costs more for fewer QALYs than another has a negative
   incremental effect and is always strongly dominated.
4. Among the rest (now strictly increasing in cost and in QALYs) a strategy is
   *extendedly dominated* when its ICER against the previous strategy is higher than
   the next strategy's ICER against it: a mix of its neighbours would buy more QALYs
   for the same money. The first such strategy is removed and the ICERs recomputed
   until the ICERs increase along the list. Equal ICERs (three collinear
   strategies) are kept on the frontier (common practice). A removed strategy is
   reported as "extendedly dominated by X and Y", X and Y being the frontier
   strategies on either side of it in cost: the frontier is the lower convex hull
   of the strategies in the (QALYs, cost) plane, so a mix of X and Y always gives
   its QALYs at a lower cost.
5. Along the frontier, ICER = (C_j - C_i) / (E_j - E_i) against the previous
   frontier strategy i.

Net monetary benefit is NMB = lambda * E - C (lambda: willingness to pay per QALY).
The strategy with the highest NMB at lambda is always on the frontier: it is the
frontier strategy with the largest ICER not above lambda.

All comparisons are exact floating-point comparisons: two strategies are identical
only when their costs and QALYs are equal to the last bit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem

REQUIRED_COLUMNS = ("strategy", "cost", "qalys")
STATUS_FRONTIER = "on frontier"

__all__ = [
    "REQUIRED_COLUMNS",
    "STATUS_FRONTIER",
    "best_at_wtp",
    "incremental_analysis",
    "net_monetary_benefit",
]


def net_monetary_benefit(
    cost: np.ndarray | float, qalys: np.ndarray | float, wtp: np.ndarray | float
) -> np.ndarray:
    """Net monetary benefit ``wtp * qalys - cost``.

    Parameters
    ----------
    cost : array_like
        Costs (currency units, discounted as the model says); any shape.
    qalys : array_like
        QALYs, same or broadcastable shape as ``cost``.
    wtp : array_like
        Willingness to pay per QALY (currency per QALY); broadcast against the others.

    Returns
    -------
    numpy.ndarray
        NMB in currency units, of the broadcast shape.
    """
    return np.asarray(wtp, dtype=float) * np.asarray(qalys, dtype=float) - np.asarray(
        cost, dtype=float
    )


def best_at_wtp(
    strategies: Sequence[str],
    cost: np.ndarray,
    qalys: np.ndarray,
    willingness_to_pay: float | np.ndarray,
) -> str | np.ndarray:
    """The strategy with the highest net monetary benefit at each willingness to pay.

    Parameters
    ----------
    strategies : sequence of str, length K
        Strategy names.
    cost, qalys : array_like, shape (K,)
        Expected cost (currency) and QALYs of each strategy.
    willingness_to_pay : float or array_like, shape (W,)
        Currency per QALY.

    Returns
    -------
    str or numpy.ndarray of str, shape (W,)
        The best strategy; a scalar ``willingness_to_pay`` gives a ``str``. Ties in NMB
        go to the cheaper strategy, then the more effective one, then the first name
        alphabetically (common practice: at a threshold equal to the ICER the cheaper
        option is kept; the order is that of :func:`incremental_analysis`).
    """
    names = [str(s) for s in strategies]
    cost = _vector("cost", cost, len(names))
    qalys = _vector("qalys", qalys, len(names))
    wtp = np.asarray(willingness_to_pay, dtype=float)
    if wtp.ndim > 1 or not np.all(np.isfinite(wtp)):
        raise ModelError(
            Problem(
                "willingness_to_pay",
                f"expected a finite number or 1-D array of numbers, got {willingness_to_pay!r}",
            )
        )
    # Put strategies in tie-break order so argmax (first maximum) applies the rule.
    order = np.lexsort((np.array(names, dtype=str), -qalys, cost))
    nmb = net_monetary_benefit(cost[order], qalys[order], np.atleast_1d(wtp)[:, None])
    chosen = np.asarray(names, dtype=object)[order][np.argmax(nmb, axis=1)]
    if wtp.ndim == 0:
        return str(chosen[0])
    return chosen.astype(str)


def incremental_analysis(
    frame: pd.DataFrame, *, willingness_to_pay: float | None = None
) -> pd.DataFrame:
    """Strong and extended dominance, ICERs along the frontier and NMB (Cantor 1994).

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per strategy with columns ``strategy`` (unique names), ``cost``
        (expected cost, currency) and ``qalys`` (expected QALYs); other columns are kept.
    willingness_to_pay : float, optional
        Currency per QALY (>= 0). When given, the result gains ``net_monetary_benefit``
        and ``best_at_wtp`` (True for the one strategy with the highest NMB).

    Returns
    -------
    pandas.DataFrame
        The input rows sorted as described in the module docstring, with columns added:

        ``status``: "on frontier", "dominated by X", "extendedly dominated by X and Y"
        or "identical to X";
        ``reference``: the strategy the increments are taken against (the previous
        frontier strategy for frontier rows, X for the others; None for the cheapest
        frontier strategy);
        ``incremental_cost``, ``incremental_qalys``: against ``reference``;
        ``icer``: incremental cost per QALY against ``reference`` for frontier and
        extendedly dominated rows (NaN otherwise: an ICER of a dominated strategy has
        no meaning);
        ``on_frontier``: bool.

    Raises
    ------
    ModelError
        Missing columns, an empty table, non-numeric, NaN or infinite costs or QALYs,
        duplicate or empty strategy names, or a negative or non-finite willingness to pay.
    """
    _check_frame(frame)
    if willingness_to_pay is not None and not (
        np.isfinite(willingness_to_pay) and willingness_to_pay >= 0
    ):
        raise ModelError(
            Problem(
                "willingness_to_pay",
                f"expected a finite number >= 0 (currency per QALY), got {willingness_to_pay!r}",
            )
        )
    out = frame.copy()
    out["strategy"] = out["strategy"].astype(str)
    out["cost"] = out["cost"].astype(float)
    out["qalys"] = out["qalys"].astype(float)
    out = out.sort_values(
        ["cost", "qalys", "strategy"], ascending=[True, False, True], kind="mergesort"
    ).reset_index(drop=True)
    names = out["strategy"].to_numpy(dtype=object)
    cost = out["cost"].to_numpy()
    qalys = out["qalys"].to_numpy()
    k = len(out)

    status = np.empty(k, dtype=object)
    reference = np.full(k, None, dtype=object)

    # Identical rows: equal cost and QALYs to an earlier row (rows are sorted, so the
    # first of a block is the one kept).
    same = (cost[:, None] == cost[None, :]) & (qalys[:, None] == qalys[None, :])
    first_same = np.argmax(same, axis=1)
    identical = first_same < np.arange(k)
    status[identical] = ["identical to " + names[i] for i in first_same[identical]]
    reference[identical] = names[first_same[identical]]

    # Strong dominance among the distinct rows: dominates[i, j] when i is no costlier,
    # no less effective and not identical to j.
    distinct = ~identical
    dominates = (cost[:, None] <= cost[None, :]) & (qalys[:, None] >= qalys[None, :]) & ~same
    dominates &= distinct[:, None] & distinct[None, :]
    dominated = dominates.any(axis=0)
    # Name the cheapest *non-dominated* dominator (dominance is transitive, so one exists).
    valid = dominates & ~dominated[:, None]
    dominator = np.argmax(valid, axis=0)
    status[dominated] = ["dominated by " + names[i] for i in dominator[dominated]]
    reference[dominated] = names[dominator[dominated]]

    # Extended dominance: iterate on the remaining rows until ICERs increase.
    candidates = np.flatnonzero(distinct & ~dominated)
    frontier = _convex_frontier(candidates, cost, qalys)
    on_frontier = np.zeros(k, dtype=bool)
    on_frontier[frontier] = True
    status[frontier] = STATUS_FRONTIER
    reference[frontier[1:]] = names[frontier[:-1]]
    extended = np.setdiff1d(candidates, frontier)
    if extended.size:
        # Frontier neighbours on either side in cost (rows are sorted by cost).
        right = np.searchsorted(frontier, extended)
        left_names = names[frontier[right - 1]]
        right_names = names[frontier[right]]
        status[extended] = [
            f"extendedly dominated by {a} and {b}"
            for a, b in zip(left_names, right_names, strict=True)
        ]
        reference[extended] = left_names

    position = {name: i for i, name in enumerate(names)}
    has_ref = np.array([r is not None for r in reference])
    ref_index = np.array([position[r] if r is not None else i for i, r in enumerate(reference)])
    incremental_cost = np.where(has_ref, cost - cost[ref_index], np.nan)
    incremental_qalys = np.where(has_ref, qalys - qalys[ref_index], np.nan)
    icer_rows = has_ref & (on_frontier | np.isin(np.arange(k), extended))
    with np.errstate(divide="ignore", invalid="ignore"):
        icer = np.where(icer_rows, incremental_cost / incremental_qalys, np.nan)

    out["status"] = status.astype(str)
    out["reference"] = pd.Series(reference, dtype=object)
    out["incremental_cost"] = incremental_cost
    out["incremental_qalys"] = incremental_qalys
    out["icer"] = icer
    out["on_frontier"] = on_frontier
    if willingness_to_pay is not None:
        out["net_monetary_benefit"] = net_monetary_benefit(cost, qalys, willingness_to_pay)
        best = best_at_wtp(list(names), cost, qalys, float(willingness_to_pay))
        out["best_at_wtp"] = out["strategy"] == best
        out.attrs["best_strategy"] = best
        out.attrs["willingness_to_pay"] = float(willingness_to_pay)
    return out


def _convex_frontier(candidates: np.ndarray, cost: np.ndarray, qalys: np.ndarray) -> np.ndarray:
    """Remove extendedly dominated rows from ``candidates`` (sorted by cost).

    Candidates must be strictly increasing in both cost and QALYs. Returns the kept
    row indices. Loops over removal rounds (at most K), not over strategies.
    """
    kept = candidates.copy()
    while kept.size > 2:
        icer = np.diff(cost[kept]) / np.diff(qalys[kept])
        worse = np.flatnonzero(icer[:-1] > icer[1:])
        if worse.size == 0:
            break
        kept = np.delete(kept, worse[0] + 1)
    return kept


def _check_frame(frame: pd.DataFrame) -> None:
    where = "strategies"
    if not isinstance(frame, pd.DataFrame):
        raise ModelError(Problem(where, f"expected a pandas DataFrame, got {type(frame).__name__}"))
    missing = [c for c in REQUIRED_COLUMNS if c not in frame.columns]
    if missing:
        raise ModelError(
            Problem(
                where,
                f"missing column(s) {missing}; expected columns {list(REQUIRED_COLUMNS)}, "
                f"got {list(map(str, frame.columns))}",
            )
        )
    if len(frame) == 0:
        raise ModelError(Problem(where, "the table has no strategies; expected at least one row"))
    problems: list[Problem] = []
    names = frame["strategy"]
    blank = names.isna() | (names.astype(str).str.strip() == "")
    for row in np.flatnonzero(blank.to_numpy()):
        problems.append(
            Problem(f"{where}[row {row}].strategy", "empty strategy name; expected a name")
        )
    dup = names.astype(str).duplicated(keep=False).to_numpy() & ~blank.to_numpy()
    for name in sorted(set(names.astype(str)[dup])):
        problems.append(
            Problem(
                f"{where}.strategy",
                f"strategy name {name!r} appears more than once; expected unique names",
            )
        )
    for column in ("cost", "qalys"):
        values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)
        raw = frame[column].to_numpy(dtype=object)
        for row in np.flatnonzero(~np.isfinite(values)):
            problems.append(
                Problem(
                    f"{where}[{names.iloc[row]!s}].{column}",
                    f"value {raw[row]!r} is not a finite number; expected a finite "
                    f"{'cost' if column == 'cost' else 'number of QALYs'}",
                )
            )
    if problems:
        raise ModelError(problems)


def _vector(name: str, values: np.ndarray, length: int) -> np.ndarray:
    array = np.asarray(values, dtype=float)
    if array.shape != (length,) or not np.all(np.isfinite(array)):
        raise ModelError(
            Problem(
                name,
                f"expected {length} finite numbers (one per strategy), got shape "
                f"{array.shape} with values {array!r}",
            )
        )
    return array
