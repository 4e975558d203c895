"""Conversions of published estimates into per-cycle transition probabilities.

Published studies report rates (events per person-year), probabilities over some
period, relative risks, hazard ratios, odds ratios, k-year survival or median
survival. A Markov cohort model needs probabilities per cycle. With a constant rate
``r`` over ``t`` years,

    p = 1 - exp(-r t),        r = -ln(1 - p) / t,

so a probability over ``t_old`` years becomes ``1 - (1 - p) ** (t_new / t_old)`` over
``t_new`` years (Miller & Homan 1994, Med Decis Making 14:52-58; Fleurence & Hollenbeak
2007, PharmacoEconomics 25(1):3-6). A relative risk can be applied on either scale, and
both are found in published models: on the rate (``1 - (1 - p) ** rr``, which always
stays a probability) or on the probability itself (``p * rr``, which matches a relative
risk estimated as a ratio of probabilities over the same period but can leave [0, 1]).
The two agree for small ``p`` and differ as ``p`` grows (Fleurence & Hollenbeak 2007).

When a state has two or more exits, converting each exit on its own is wrong (Gidwani &
Russell 2020, PharmacoEconomics, doi 10.1007/s40273-020-00937-z): the exits compete. Put
the rates in a generator matrix ``G`` (rows sum to 0) and take the matrix exponential,
``P(t) = expm(t G)`` (Welton & Ades 2005, Med Decis Making 25(6):633-645; Jones, Epstein
& Garcia-Mochon 2017, Med Decis Making 37(7):779-789).

Every function here works elementwise on numpy arrays (broadcasting as numpy does) and
raises :class:`caredecide.errors.ModelError` naming the function, the argument, the
first offending value and the expected range. Times are in years unless stated.
"""

from __future__ import annotations

import functools
import math
from typing import Any

import numpy as np

from caredecide import jit
from caredecide.errors import ModelError, Problem

__all__ = [
    "chance_for_period",
    "chance_within",
    "generator_to_transition",
    "rate_behind",
    "rate_behind_median",
    "rate_behind_survival",
    "rates_to_generator",
    "times_relative_risk",
    "with_hazard_ratio",
    "with_odds_ratio",
    "with_relative_risk",
]

# Uniformization: scale each step so that q t / 2^s <= 1/2, and sum the series to k = 18.
_UNIFORMIZATION_STEP = 0.5
_UNIFORMIZATION_TERMS = 18

# Pade approximants of degree m and the 1-norm up to which each is accurate to unit
# round-off (Higham 2005, SIAM J Matrix Anal Appl 26(4):1179-1193, Table 2.3; the same
# bounds appear in scipy.sparse.linalg's expm). Above the last one the matrix is scaled.
_PADE_DEGREES = (3, 5, 7, 9, 13)
_PADE_THETA = np.array(
    [
        1.495585217958292e-2,
        2.539398330063230e-1,
        9.504178996162932e-1,
        2.097847961257068,
        5.371920351148152,
    ]
)
# Round-off allowed in a Pade result before clipping: a negative entry or a row-sum error
# beyond it sends the matrix to uniformization instead.
_PADE_ROUND_OFF = 1e-12
_EXPONENTIAL_METHODS = ("pade", "uniformization")

# Row sums of a generator must be 0; allow round-off relative to the row's largest rate.
_GENERATOR_ROW_TOLERANCE = 1e-9


# --------------------------------------------------------------------------- validation
def _fail(function: str, argument: str, message: str) -> ModelError:
    return ModelError(Problem(where=f"{function}({argument})", message=message))


def _first_index(bad: np.ndarray) -> tuple[int, ...]:
    """Index of the first True element of ``bad`` (C order)."""
    return tuple(int(i) for i in np.argwhere(bad)[0])


def _first_bad(bad: np.ndarray, values: np.ndarray) -> str:
    """Describe the first offending element of ``values`` where ``bad`` is True."""
    if values.ndim == 0:
        return f"got {values.item()!r}"
    index = _first_index(bad)
    return f"got {values[index].item()!r} at index {index}"


def _checked(
    value: object,
    function: str,
    argument: str,
    *,
    low: float = -np.inf,
    high: float = np.inf,
    low_open: bool = False,
    high_open: bool = False,
    meaning: str = "",
) -> np.ndarray:
    """``value`` as a float array after checking every element lies in the range."""
    try:
        values = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise _fail(
            function, argument, f"expected a number or an array of numbers, got {value!r}"
        ) from exc
    ok = np.isfinite(values)
    ok &= (values > low) if low_open else (values >= low)
    ok &= (values < high) if high_open else (values <= high)
    if not ok.all():
        left = "(" if low_open or np.isinf(low) else "["
        right = ")" if high_open or np.isinf(high) else "]"
        what = f" ({meaning})" if meaning else ""
        raise _fail(
            function,
            argument,
            f"must be a finite number in {left}{low:g}, {high:g}{right}{what}; "
            f"{_first_bad(~ok, values)}",
        )
    return values


def _probability(value: object, function: str, argument: str = "p", **kw: Any) -> np.ndarray:
    return _checked(value, function, argument, low=0.0, high=1.0, meaning="a probability", **kw)


def _years(value: object, function: str, argument: str = "years") -> np.ndarray:
    return _checked(value, function, argument, low=0.0, low_open=True, meaning="years, > 0")


# --------------------------------------------------------------- rates and probabilities
def chance_within(rate: object, years: object = 1.0) -> np.ndarray:
    """Probability of at least one event within ``years`` at a constant rate.

    Parameters
    ----------
    rate : array_like, shape (...)
        Events per person-year, >= 0.
    years : array_like, broadcastable with ``rate``
        Length of the period in years, > 0.

    Returns
    -------
    numpy.ndarray, shape broadcast(rate, years)
        ``1 - exp(-rate * years)``, in [0, 1).
    """
    r = _checked(rate, "chance_within", "rate", low=0.0, meaning="a rate per year")
    t = _years(years, "chance_within")
    return -np.expm1(-r * t)  # expm1 keeps precision for small rates


def rate_behind(p: object, years: object = 1.0) -> np.ndarray:
    """Constant rate implied by a probability of an event within ``years``.

    Parameters
    ----------
    p : array_like, shape (...)
        Probability over the period, in [0, 1) (a probability of 1 has no finite rate).
    years : array_like, broadcastable with ``p``
        Length of the period in years, > 0.

    Returns
    -------
    numpy.ndarray
        ``-ln(1 - p) / years``, events per person-year.
    """
    probability = _probability(p, "rate_behind", high_open=True)
    t = _years(years, "rate_behind")
    return -np.log1p(-probability) / t


def chance_for_period(p: object, from_years: object, to_years: object) -> np.ndarray:
    """Probability over ``to_years`` from a probability over ``from_years`` (constant rate).

    Parameters
    ----------
    p : array_like, shape (...)
        Probability over ``from_years``, in [0, 1].
    from_years, to_years : array_like, broadcastable with ``p``
        Periods in years, > 0. A 5-year probability with ``to_years = 1/12`` gives the
        monthly probability.

    Returns
    -------
    numpy.ndarray
        ``1 - (1 - p) ** (to_years / from_years)``.
    """
    probability = _probability(p, "chance_for_period")
    t_from = _years(from_years, "chance_for_period", "from_years")
    t_to = _years(to_years, "chance_for_period", "to_years")
    return 1.0 - (1.0 - probability) ** (t_to / t_from)


# --------------------------------------------------------------------- relative effects
def _scale_rate(
    p: object, ratio: object, years: object, function: str, argument: str
) -> np.ndarray:
    """Multiply the rate behind ``p`` by ``ratio``; the period cancels out."""
    probability = _probability(p, function)
    factor = _checked(ratio, function, argument, low=0.0, meaning="a ratio, >= 0")
    _years(years, function)
    # 1 - exp(ratio * t * ln(1 - p) / t) = 1 - (1 - p) ** ratio, whatever the period t.
    return 1.0 - (1.0 - probability) ** factor


def with_relative_risk(p: object, rr: object, years: object = 1.0) -> np.ndarray:
    """Apply a relative risk to a probability on the rate scale.

    Parameters
    ----------
    p : array_like, shape (...)
        Baseline probability of the event within ``years``, in [0, 1].
    rr : array_like, broadcastable with ``p``
        Relative risk, >= 0. It multiplies the (constant) rate, so the result stays a
        probability even for ``rr > 1``. :func:`times_relative_risk` applies it to the
        probability instead; see its notes for when each is used.
    years : float
        The period ``p`` refers to (> 0); the result refers to the same period. The
        formula does not depend on it (the period cancels), it is checked only.

    Returns
    -------
    numpy.ndarray
        ``1 - (1 - p) ** rr``.
    """
    return _scale_rate(p, rr, years, "with_relative_risk", "rr")


def times_relative_risk(p: object, rr: object) -> np.ndarray:
    """Apply a relative risk to a probability on the probability scale: ``p * rr``.

    Parameters
    ----------
    p : array_like, shape (...)
        Baseline probability of the event over a period, in [0, 1].
    rr : array_like, broadcastable with ``p``
        Relative risk, >= 0, estimated as a ratio of probabilities over the same period.

    Returns
    -------
    numpy.ndarray, shape broadcast(p, rr)
        ``p * rr``, over the same period as ``p``.

    Raises
    ------
    ModelError
        When an input is out of range, or when ``p * rr`` exceeds 1 (naming the first
        offending ``p``, ``rr`` and product): a probability cannot exceed 1, and clipping
        would hide the problem.

    Notes
    -----
    A relative risk from a trial is a ratio of probabilities (risks) over the trial's
    follow-up; applied to a baseline probability over that same period, ``p * rr`` is
    its direct use, and many published models are built that way. :func:`with_relative_risk`
    applies it to the rate instead (``1 - (1 - p) ** rr``), which is the right reading of
    a hazard ratio or a rate ratio and stays in [0, 1] for any ``rr``. The two agree when
    ``p`` is small and differ as ``p`` grows: for ``p = 0.3`` and ``rr = 0.5``, 0.15
    against 0.16334 (Fleurence & Hollenbeak 2007, PharmacoEconomics 25(1):3-6).
    """
    function = "times_relative_risk"
    probability = _probability(p, function)
    factor = _checked(rr, function, "rr", low=0.0, meaning="a relative risk, >= 0")
    product = probability * factor
    over = product > 1.0
    if over.any():
        index = _first_index(over) if product.ndim else ()
        p_b, rr_b = np.broadcast_arrays(probability, factor)
        raise _fail(
            function,
            "p, rr",
            f"p * rr = {float(product[index])!r} exceeds 1 (p = {float(p_b[index])!r}, "
            f"rr = {float(rr_b[index])!r}); expected a product in [0, 1]: use a smaller "
            "relative risk, or apply it to the rate (with_relative_risk)",
        )
    return product


def with_hazard_ratio(p: object, hazard_ratio: object, years: object = 1.0) -> np.ndarray:
    """Apply a hazard ratio to a probability: the same rule as :func:`with_relative_risk`.

    Under constant hazards a hazard ratio multiplies the rate, so
    ``p' = 1 - (1 - p) ** hazard_ratio``; shapes and ranges as in
    :func:`with_relative_risk`.
    """
    return _scale_rate(p, hazard_ratio, years, "with_hazard_ratio", "hazard_ratio")


def with_odds_ratio(p: object, odds_ratio: object) -> np.ndarray:
    """Apply an odds ratio to a probability on the odds scale.

    Parameters
    ----------
    p : array_like, shape (...)
        Baseline probability, in [0, 1].
    odds_ratio : array_like, broadcastable with ``p``
        Odds ratio, > 0.

    Returns
    -------
    numpy.ndarray
        ``OR p / (1 - p + OR p)``, i.e. odds ``OR p / (1 - p)`` turned back into a
        probability; written this way it stays exact at ``p = 1``.
    """
    probability = _probability(p, "with_odds_ratio")
    ratio = _checked(
        odds_ratio, "with_odds_ratio", "odds_ratio", low=0.0, low_open=True, meaning="a ratio, > 0"
    )
    scaled = ratio * probability
    return scaled / (1.0 - probability + scaled)


# ---------------------------------------------------------------------------- survival
def rate_behind_survival(survival: object, years: object) -> np.ndarray:
    """Constant rate from the proportion surviving (event-free) at ``years``.

    Parameters
    ----------
    survival : array_like, shape (...)
        Proportion event-free at ``years``, in (0, 1].
    years : array_like, broadcastable with ``survival``
        Time of the survival estimate in years, > 0.

    Returns
    -------
    numpy.ndarray
        ``-ln(survival) / years``, events per person-year.
    """
    s = _checked(
        survival,
        "rate_behind_survival",
        "survival",
        low=0.0,
        high=1.0,
        low_open=True,
        meaning="a proportion surviving; 0 has no finite rate",
    )
    t = _years(years, "rate_behind_survival")
    return -np.log(s) / t


def rate_behind_median(median_years: object) -> np.ndarray:
    """Constant rate from a median survival time: ``ln 2 / median``.

    Parameters
    ----------
    median_years : array_like, shape (...)
        Median time to the event in years, > 0.

    Returns
    -------
    numpy.ndarray
        Events per person-year.
    """
    m = _years(median_years, "rate_behind_median", "median_years")
    return np.log(2.0) / m


# ---------------------------------------------------------------------- competing risks
def _square_stack(value: object, function: str, argument: str) -> np.ndarray:
    matrix = _checked(value, function, argument)
    if matrix.ndim < 2 or matrix.shape[-1] != matrix.shape[-2] or matrix.shape[-1] == 0:
        raise _fail(
            function,
            argument,
            f"expected an array of square matrices, shape (..., S, S) with S >= 1; "
            f"got shape {matrix.shape}",
        )
    return matrix


def _row_name(index: tuple[int, ...]) -> str:
    *batch, row = index
    return f"row {row}" + (f" of matrix {tuple(batch)}" if batch else "")


def rates_to_generator(rates: object) -> np.ndarray:
    """Generator (transition-rate) matrix from the rates of every exit.

    Parameters
    ----------
    rates : array_like, shape (..., S, S)
        ``rates[..., i, j]`` is the rate per year of moving from state ``i`` to ``j``
        (``i != j``), >= 0. The diagonal must be 0: it is filled in here.

    Returns
    -------
    numpy.ndarray, shape (..., S, S)
        ``G`` with the same off-diagonal rates and ``G[..., i, i] = -sum_j rates[..., i, j]``,
        so every row sums to 0.
    """
    function = "rates_to_generator"
    r = _square_stack(rates, function, "rates")
    diagonal = np.diagonal(r, axis1=-2, axis2=-1)
    if (diagonal != 0).any():
        index = _first_index(diagonal != 0)
        raise _fail(
            function,
            "rates",
            f"{_row_name(index)}: diagonal entry is {float(diagonal[index])!r}; expected 0 "
            "(the rate of staying is implied by the exits)",
        )
    _check_exit_rates(r, function, "rates")
    generator = r.copy()
    s = r.shape[-1]
    generator[..., np.arange(s), np.arange(s)] = -r.sum(axis=-1)
    return generator


def _check_exit_rates(matrix: np.ndarray, function: str, argument: str) -> None:
    """Raise unless every off-diagonal rate of the (..., S, S) ``matrix`` is >= 0."""
    negative = (matrix < 0) & ~np.eye(matrix.shape[-1], dtype=bool)
    if negative.any():
        index = _first_index(negative)
        raise _fail(
            function,
            argument,
            f"{_row_name(index[:-1])}: rate to state {index[-1]} is "
            f"{float(matrix[index])!r}; expected >= 0 (per year)",
        )


def _check_generator(generator: np.ndarray, function: str) -> None:
    _check_exit_rates(generator, function, "G")
    row_sum = generator.sum(axis=-1)
    scale = np.abs(generator).max(axis=-1)
    bad = np.abs(row_sum) > _GENERATOR_ROW_TOLERANCE * np.maximum(scale, 1.0)
    if bad.any():
        index = _first_index(bad)
        raise _fail(
            function,
            "G",
            f"{_row_name(index)} sums to {float(row_sum[index])!r}; every row of a generator "
            "must sum to 0 (diagonal = minus the sum of the exit rates)",
        )


def generator_to_transition(G: object, years: object = 1.0) -> np.ndarray:
    """Transition probabilities over ``years`` from a generator matrix: ``expm(years G)``.

    Parameters
    ----------
    G : array_like, shape (..., S, S)
        Rates per year; off-diagonals >= 0 and every row summing to 0 (see
        :func:`rates_to_generator`). Leading axes are a batch (e.g. draws).
    years : array_like, shape () or broadcastable to ``G.shape[:-2]``
        Cycle length in years, > 0.

    Returns
    -------
    numpy.ndarray, shape (..., S, S)
        Row-stochastic matrices: ``P[..., i, j]`` is the probability of being in ``j``
        after ``years`` when starting in ``i``, all exits competing. Entries are in
        [0, 1]; a state that cannot be reached from ``i`` gets exactly 0, and a state
        with no exits keeps its row of the identity exactly.
    """
    function = "generator_to_transition"
    generator = _square_stack(G, function, "G")
    _check_generator(generator, function)
    t = _years(years, function)
    return _generator_exponential(generator * t[..., None, None])


def _generator_exponential(Q: np.ndarray, method: str = "pade") -> np.ndarray:
    """``expm(Q)`` for a stack of generators ``Q`` (..., S, S) (rates x years), unchecked.

    States that no matrix of the stack leaves are absorbing: their rows of ``expm(Q)`` are
    rows of the identity, and a state that is neither left nor entered from a state that
    is left keeps its identity row and column. Only the block of the other states is
    exponentiated (exact: ``Q`` is block upper triangular with a zero diagonal block).

    ``method`` is "pade" (:func:`_stack_exponential`, the default) or "uniformization":
    the former path, :func:`_uniformized_exponential` on the whole matrices, kept as the
    reference the benchmarks compare with. Callers validate ``Q``
    (:func:`generator_to_transition` does).
    """
    if method not in _EXPONENTIAL_METHODS:
        raise ValueError(f"method {method!r} is unknown; expected one of {_EXPONENTIAL_METHODS}")
    if method == "uniformization":
        return _uniformized_exponential(Q)
    n_states = Q.shape[-1]
    kept = _states_in_play((Q != 0).reshape(-1, n_states, n_states).any(axis=0))
    if kept.all():
        return _stack_exponential(Q)
    P = np.zeros(Q.shape)
    P[..., ~kept, ~kept] = 1.0
    if kept.any():
        rows, columns = np.ix_(kept, kept)
        P[..., rows, columns] = _stack_exponential(np.ascontiguousarray(Q[..., rows, columns]))
    return P


def _states_in_play(pattern: np.ndarray) -> np.ndarray:
    """(S,) bool: states some rate leaves, and the states those rates enter.

    ``pattern`` is (S, S) bool, True where a generator of the stack may have a rate
    (the diagonal is ignored). The other states have no exits and no entries from a state
    with exits: their rows and columns of ``expm`` are those of the identity.
    """
    pattern = pattern & ~np.eye(pattern.shape[-1], dtype=bool)
    leaves = np.asarray(pattern.any(axis=1))
    return np.asarray(leaves | pattern[leaves].any(axis=0))


def _stack_exponential(Q: np.ndarray) -> np.ndarray:
    """``expm(Q)`` of a stack of generators (..., S, S), each by the cheapest exact route.

    A generator whose every exit leads to a state without exits (in that matrix) has the
    closed form of :func:`_one_step_exponential`; the others go to
    :func:`_pade_exponential`. The route and the set of unreachable entries depend only
    on a matrix's own pattern of non-zero rates, so a matrix's result never depends on the
    rest of the stack. Both are decided once per distinct pattern (a stack holds few).
    """
    n_states = Q.shape[-1]
    A = Q.reshape(-1, n_states, n_states)
    flat_pattern = (A != 0).reshape(A.shape[0], n_states * n_states)
    distinct, inverse = _distinct_rows(np.packbits(flat_pattern, axis=1))
    pattern = np.unpackbits(distinct, axis=1, count=n_states * n_states).astype(bool)
    pattern = pattern.reshape(-1, n_states, n_states) & ~np.eye(n_states, dtype=bool)
    leaves = np.asarray(pattern.any(axis=-1))  # (K, S)
    entered_from_leaving = (pattern & leaves[:, :, None]).any(axis=-2)
    one_step = ~np.asarray((leaves & entered_from_leaving).any(axis=-1))[inverse]  # (N,)
    if one_step.all():
        return _one_step_exponential(A).reshape(Q.shape)
    unreachable = ~_closure(pattern)[inverse]
    if not one_step.any():
        return _pade_exponential(A, unreachable).reshape(Q.shape)
    P = np.empty_like(A)
    P[one_step] = _one_step_exponential(A[one_step])
    P[~one_step] = _pade_exponential(A[~one_step], unreachable[~one_step])
    return P.reshape(Q.shape)


def _one_step_exponential(A: np.ndarray) -> np.ndarray:
    """``expm(A)`` of generators (N, S, S) whose exits all lead to states without exits.

    Then ``A^2 = -diag(q) A`` (``q`` the exit rates), so ``expm(A) = I + diag(phi) A``
    with ``phi = (1 - exp(-q)) / q``: the competing-exits closed form, row by row, stay
    ``exp(-q)`` and exit ``j`` ``r_j / q (1 - exp(-q))`` (Welton & Ades 2005, Med Decis
    Making 25(6):633-645). Elementwise, non-negative and exact to round-off.
    """
    exit_rate = -np.diagonal(A, axis1=-2, axis2=-1)  # (N, S)
    leave = -np.expm1(-exit_rate)
    share = np.divide(leave, exit_rate, out=np.ones_like(leave), where=exit_rate > 0)
    P = A * share[..., None]
    diagonal = np.diag_indices(A.shape[-1])
    P[(..., *diagonal)] = np.exp(-exit_rate)
    return P


def _pade_exponential(A: np.ndarray, unreachable: np.ndarray) -> np.ndarray:
    """``expm(A)`` of a stack of generators by scaling and squaring with Pade approximants.

    Parameters
    ----------
    A : numpy.ndarray, shape (N, S, S)
        Generators times the period (dimensionless).
    unreachable : numpy.ndarray, shape (N, S, S), bool
        Entries with no path from ``i`` to ``j`` (:func:`_closure`): exactly 0 in the
        result, while round-off in the solve may leave a trace there.

    Notes
    -----
    Higham 2005, SIAM J Matrix Anal Appl 26(4):1179-1193, Algorithm 2.3 (the method
    behind ``scipy.linalg.expm``), batched: each matrix gets its own degree ``m`` (3, 5,
    7, 9 or 13, the smallest whose bound covers its norm) and its own number of
    squarings, so its result does not depend on the other matrices of the stack. One
    stacked ``matmul``/``solve`` per step runs for all matrices of one degree at once.
    The bounds hold in any subordinate norm (Higham 2005, section 2); the infinity norm
    of a generator is twice its largest exit rate, read off the diagonal.

    A generator's exponential is stochastic; Pade with LU keeps that only to round-off.
    Negatives down to ``-_PADE_ROUND_OFF`` are clipped to 0. A matrix whose result misses
    that tolerance (a negative entry or a row sum off by more) is recomputed by
    uniformization, which keeps every term non-negative.
    """
    if jit.available():
        return _compiled_pade_exponential(A, unreachable)
    norm = -2.0 * np.diagonal(A, axis1=-2, axis2=-1).min(axis=-1, initial=0.0)
    degree = np.searchsorted(_PADE_THETA[:-1], norm)  # index into _PADE_DEGREES
    squarings = np.zeros(A.shape[0], dtype=int)
    largest = degree == len(_PADE_DEGREES) - 1
    squarings[largest] = np.maximum(np.ceil(np.log2(norm[largest] / _PADE_THETA[-1])), 0)
    degrees = np.unique(degree)
    if degrees.size == 1 and not squarings.any():  # no regrouping needed
        P = _pade_approximant(A, _PADE_DEGREES[degrees[0]])
    else:
        P = np.empty_like(A)
        for position in degrees:  # a loop over at most five degrees
            members = np.flatnonzero(degree == position)
            scaled = np.ldexp(A[members], -squarings[members, None, None])  # exact: 2^-s
            P[members] = _pade_approximant(scaled, _PADE_DEGREES[position])
        for step in range(int(squarings.max(initial=0))):
            members = np.flatnonzero(squarings > step)
            P[members] = P[members] @ P[members]

    P[unreachable] = 0.0
    lost = P.min(axis=(-2, -1)) < -_PADE_ROUND_OFF
    lost |= np.abs(P.sum(axis=-1) - 1.0).max(axis=-1) > _PADE_ROUND_OFF
    if lost.any():
        P[lost] = _uniformized_exponential(A[lost])
    np.clip(P, 0.0, 1.0, out=P)
    return P


def _compiled_pade_exponential(A: np.ndarray, unreachable: np.ndarray) -> np.ndarray:
    """:func:`_pade_exponential` by the compiled loop, one matrix at a time (same steps,
    same degree and squarings per matrix; rounding differs from the batched version only
    in the last bits)."""
    from caredecide import _exponential_loops

    A = np.ascontiguousarray(A, dtype=float)
    P = np.empty_like(A)
    lost = np.empty(A.shape[0], dtype=bool)
    _exponential_loops.pade_exponential(
        A,
        np.ascontiguousarray(unreachable, dtype=bool),
        _PADE_THETA,
        np.array(_PADE_DEGREES, dtype=np.int64),
        _pade_table(),
        _PADE_ROUND_OFF,
        P,
        lost,
    )
    if lost.any():
        P[lost] = np.clip(_uniformized_exponential(A[lost]), 0.0, 1.0)
    return P


@functools.cache
def _pade_table() -> np.ndarray:
    """(5, 14) coefficients ``b_0..b_m`` of each degree in ``_PADE_DEGREES``, zero-padded."""
    table = np.zeros((len(_PADE_DEGREES), max(_PADE_DEGREES) + 1))
    for row, m in enumerate(_PADE_DEGREES):
        table[row, : m + 1] = _pade_coefficients(m)
    table.setflags(write=False)
    return table


def _pade_coefficients(m: int) -> np.ndarray:
    """Coefficients ``b_0..b_m`` of the [m/m] Pade approximant to ``exp`` (``b_m = 1``).

    ``p_m(x) = sum_k b_k x^k`` and ``q_m(x) = p_m(-x)`` with ``b_k = (2m - k)! / (k! (m -
    k)!)`` up to a common factor (Higham 2005, eq. 2.2).
    """
    f = math.factorial
    return np.array([f(2 * m - k) / (f(k) * f(m - k)) for k in range(m + 1)])


def _pade_approximant(A: np.ndarray, m: int) -> np.ndarray:
    """``r_m(A) = q_m(A)^-1 p_m(A)`` for a stack (N, S, S), evaluated as in Higham 2005.

    ``p_m(A) = U + V`` with ``U`` the odd and ``V`` the even part; degree 13 uses the
    nested form with ``A^2, A^4, A^6`` only (six multiplications).
    """
    b = _pade_coefficients(m)
    diagonal = np.diag_indices(A.shape[-1])
    powers = {2: A @ A}
    if m == 13:
        powers[4] = powers[2] @ powers[2]
        powers[6] = powers[4] @ powers[2]
        A2, A4, A6 = powers[2], powers[4], powers[6]
        odd = A6 @ (b[13] * A6 + b[11] * A4 + b[9] * A2) + b[7] * A6 + b[5] * A4 + b[3] * A2
        even = A6 @ (b[12] * A6 + b[10] * A4 + b[8] * A2) + b[6] * A6 + b[4] * A4 + b[2] * A2
    else:
        for k in range(4, m, 2):
            powers[k] = powers[k - 2] @ powers[2]
        odd = sum(b[k + 1] * powers[k] for k in range(2, m, 2))
        even = sum(b[k] * powers[k] for k in range(2, m, 2))
    odd[(..., *diagonal)] += b[1]
    even[(..., *diagonal)] += b[0]
    U = A @ odd
    return np.linalg.solve(even - U, even + U)


def _distinct_rows(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct rows of a 2-D array and the inverse index: ``values == rows[inverse]``.

    Rows are compared bit for bit, each viewed as one opaque item (cheaper than
    ``np.unique(axis=0)``); for floats, -0.0 and 0.0 count as different, which only
    costs a repeated computation.
    """
    values = np.ascontiguousarray(values)
    width = values.dtype.itemsize * values.shape[1]
    # Rows of 1, 2, 4 or 8 bytes read as one unsigned integer sort much faster.
    item = np.dtype(f"u{width}") if width in (1, 2, 4, 8) else np.dtype((np.void, width))
    items = values.view(item).ravel()
    _, first, inverse = np.unique(items, return_index=True, return_inverse=True)
    return values[first], inverse.reshape(-1)


def _closure(pattern: np.ndarray) -> np.ndarray:
    """(K, S, S) bool: ``j`` reachable from ``i`` (or ``i == j``) in the (K, S, S) ``pattern``.

    Transitive closure by repeated squaring of ``I + pattern``: ``expm(A)[i, j] > 0``
    exactly where it is True.
    """
    n_states = pattern.shape[-1]
    closure = (pattern | np.eye(n_states, dtype=bool)).astype(float)
    for _ in range(max(0, math.ceil(math.log2(n_states)))):  # paths of length <= 2^k
        closure = ((closure @ closure) > 0).astype(float)
    return closure > 0


def _uniformized_exponential(Q: np.ndarray) -> np.ndarray:
    """``expm(Q)`` for a stack of generators ``Q`` (..., S, S), all matrices at once.

    Uniformization (Jensen 1953, Skand Aktuarietidskr 36:87-91; from memory) with
    scaling and squaring (Moler & Van Loan 2003, SIAM Rev 45(1):3-49): with ``q`` the
    largest exit rate of a matrix and ``M = I + Q / q`` (a stochastic matrix),
    ``expm(Q / 2^s) = sum_k Poisson(k; q / 2^s) M^k``, then squared ``s`` times. Every
    term is non-negative, so there is no cancellation and the result stays stochastic.
    ``s`` makes ``q / 2^s <= 1/2``; the Poisson tail beyond ``k = 18`` is then below
    1e-22. A Python loop runs over series terms and squarings only, never over matrices
    (``scipy.linalg.expm`` loops over a stack one matrix at a time).
    """
    n_states = Q.shape[-1]
    identity = np.eye(n_states)
    exit_rate = np.maximum(-np.diagonal(Q, axis1=-2, axis2=-1).min(axis=-1), 0.0)
    largest = float(exit_rate.max(initial=0.0))
    squarings = max(0, math.ceil(math.log2(largest / _UNIFORMIZATION_STEP))) if largest else 0
    step_rate = exit_rate / 2.0**squarings  # <= 1/2 for every matrix
    # A matrix with no exits is its own identity: any q works for M, the weights give I.
    M = identity + Q / np.where(exit_rate > 0, exit_rate, 1.0)[..., None, None]
    # Poisson(k; lambda) weights by the recurrence w_k = w_{k-1} lambda / k.
    k = np.arange(_UNIFORMIZATION_TERMS + 1)
    ratios = step_rate[..., None] / np.maximum(k, 1)
    ratios[..., 0] = 1.0
    weights = np.exp(-step_rate)[..., None] * np.cumprod(ratios, axis=-1)
    # Horner's rule: P = w_0 I + M (w_1 I + M (w_2 I + ...)).
    P = weights[..., -1, None, None] * identity
    for term in range(_UNIFORMIZATION_TERMS - 1, -1, -1):
        P = weights[..., term, None, None] * identity + M @ P
    for _ in range(squarings):
        P = P @ P
    return np.clip(P, 0.0, 1.0)  # round-off only: every term above is non-negative
