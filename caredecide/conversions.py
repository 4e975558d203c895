"""Conversions of published estimates into per-cycle transition probabilities.

Published studies report rates (events per person-year), probabilities over some
period, relative risks, hazard ratios, odds ratios, k-year survival or median
survival. A Markov cohort model needs probabilities per cycle. With a constant rate
``r`` over ``t`` years,

    p = 1 - exp(-r t),        r = -ln(1 - p) / t,

so a probability over ``t_old`` years becomes ``1 - (1 - p) ** (t_new / t_old)`` over
``t_new`` years (Miller & Homan 1994, Med Decis Making 14:52-58; Fleurence & Hollenbeak
2007, PharmacoEconomics 25(1):3-6). Relative risks and hazard ratios multiply the
*rate*, not the probability.

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

import math

import numpy as np

from caredecide.errors import ModelError, Problem

__all__ = [
    "apply_hazard_ratio",
    "apply_odds_ratio",
    "apply_relative_risk",
    "generator_to_transition",
    "median_survival_to_rate",
    "probability_to_rate",
    "rate_to_probability",
    "rates_to_generator",
    "rescale_probability",
    "survival_to_rate",
]

# Uniformization: scale each step so that q t / 2^s <= 1/2, and sum the series to k = 18.
_UNIFORMIZATION_STEP = 0.5
_UNIFORMIZATION_TERMS = 18

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


def _probability(value: object, function: str, argument: str = "p", **kw: object) -> np.ndarray:
    return _checked(value, function, argument, low=0.0, high=1.0, meaning="a probability", **kw)


def _years(value: object, function: str, argument: str = "years") -> np.ndarray:
    return _checked(value, function, argument, low=0.0, low_open=True, meaning="years, > 0")


# --------------------------------------------------------------- rates and probabilities
def rate_to_probability(rate: object, years: object = 1.0) -> np.ndarray:
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
    r = _checked(rate, "rate_to_probability", "rate", low=0.0, meaning="a rate per year")
    t = _years(years, "rate_to_probability")
    return -np.expm1(-r * t)  # expm1 keeps precision for small rates


def probability_to_rate(p: object, years: object = 1.0) -> np.ndarray:
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
    probability = _probability(p, "probability_to_rate", high_open=True)
    t = _years(years, "probability_to_rate")
    return -np.log1p(-probability) / t


def rescale_probability(p: object, from_years: object, to_years: object) -> np.ndarray:
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
    probability = _probability(p, "rescale_probability")
    t_from = _years(from_years, "rescale_probability", "from_years")
    t_to = _years(to_years, "rescale_probability", "to_years")
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


def apply_relative_risk(p: object, rr: object, years: object = 1.0) -> np.ndarray:
    """Apply a relative risk to a probability on the rate scale.

    Parameters
    ----------
    p : array_like, shape (...)
        Baseline probability of the event within ``years``, in [0, 1].
    rr : array_like, broadcastable with ``p``
        Relative risk, >= 0. It multiplies the (constant) rate, so the result stays a
        probability even for ``rr > 1``; multiplying ``p`` itself would not.
    years : float
        The period ``p`` refers to (> 0); the result refers to the same period. The
        formula does not depend on it (the period cancels), it is checked only.

    Returns
    -------
    numpy.ndarray
        ``1 - (1 - p) ** rr``.
    """
    return _scale_rate(p, rr, years, "apply_relative_risk", "rr")


def apply_hazard_ratio(p: object, hazard_ratio: object, years: object = 1.0) -> np.ndarray:
    """Apply a hazard ratio to a probability: the same rule as :func:`apply_relative_risk`.

    Under constant hazards a hazard ratio multiplies the rate, so
    ``p' = 1 - (1 - p) ** hazard_ratio``; shapes and ranges as in
    :func:`apply_relative_risk`.
    """
    return _scale_rate(p, hazard_ratio, years, "apply_hazard_ratio", "hazard_ratio")


def apply_odds_ratio(p: object, odds_ratio: object) -> np.ndarray:
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
    probability = _probability(p, "apply_odds_ratio")
    ratio = _checked(
        odds_ratio, "apply_odds_ratio", "odds_ratio", low=0.0, low_open=True, meaning="a ratio, > 0"
    )
    scaled = ratio * probability
    return scaled / (1.0 - probability + scaled)


# ---------------------------------------------------------------------------- survival
def survival_to_rate(survival: object, years: object) -> np.ndarray:
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
        "survival_to_rate",
        "survival",
        low=0.0,
        high=1.0,
        low_open=True,
        meaning="a proportion surviving; 0 has no finite rate",
    )
    t = _years(years, "survival_to_rate")
    return -np.log(s) / t


def median_survival_to_rate(median_years: object) -> np.ndarray:
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
    m = _years(median_years, "median_survival_to_rate", "median_years")
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
        after ``years`` when starting in ``i``, all exits competing.
    """
    function = "generator_to_transition"
    generator = _square_stack(G, function, "G")
    _check_generator(generator, function)
    t = _years(years, function)
    return _uniformized_exponential(generator * t[..., None, None])


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
