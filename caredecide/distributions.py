"""Parameter distributions for probabilistic analysis: fitting, quantiles and sampling.

A model file gives each uncertain parameter a distribution as a small table (a TOML
inline table), in one of three ways:

* natural parameters: ``{type="beta", alpha=12, beta=3}``,
  ``{type="gamma", shape=25, scale=40}``, ``{type="lognormal", meanlog=0, sdlog=0.1}``,
  ``{type="normal", mean=0, sd=1}``, ``{type="uniform", low=0, high=1}``,
  ``{type="triangular", low=0, mode=0.2, high=1}``, ``{type="fixed", value=3}``;
* a mean and standard error, matched by the method of moments (Briggs, Claxton &
  Sculpher 2006, *Decision Modelling for Health Economic Evaluation*, ch. 4):
  ``{type="beta", mean=0.8, se=0.1}`` is Beta(12, 3);
* an interval (95% unless ``level`` is given): ``{type="lognormal", low=0.6, high=0.9}``
  has ``meanlog = (ln L + ln U)/2`` and ``sdlog = (ln U - ln L)/(2 z)``, with ``z`` the
  standard normal quantile (1.96 for 95%). Beta and gamma intervals are matched
  numerically (both quantiles hit).

:func:`distribution_from_spec` turns such a table into a :class:`Distribution`, which
keeps the table it came from so a model saves back unchanged. Transition rows with
several exits use a Dirichlet over the row's counts (Briggs, Ades & Price 2003, Med
Decis Making 23(4):341-350): :func:`dirichlet_from_counts`.

Quantiles come from ``scipy.stats``; samples from the ``numpy.random.Generator``'s own
methods, so a seeded generator reproduces a run exactly. Impossible requests raise
:class:`caredecide.errors.DistributionError` naming where, the values and what is needed.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from numbers import Real
from statistics import NormalDist
from typing import TYPE_CHECKING

import numpy as np

from caredecide.errors import DistributionError
from caredecide.model import DirichletGroup

if TYPE_CHECKING:
    import scipy.stats

# scipy.stats and scipy.optimize are imported where used (fitting to an interval,
# quantiles): they take a large part of a command's start-up, and sampling needs neither.

__all__ = [
    "KINDS",
    "DirichletGroup",
    "Distribution",
    "beta_from_interval",
    "beta_from_mean_se",
    "dirichlet_from_counts",
    "dirichlet_from_spec",
    "distribution_from_spec",
    "gamma_from_interval",
    "gamma_from_mean_se",
    "lognormal_from_interval",
    "lognormal_from_mean_se",
    "normal_from_interval",
]

KINDS = ("beta", "gamma", "lognormal", "normal", "uniform", "triangular", "fixed")

_NATURAL: dict[str, tuple[str, ...]] = {
    "beta": ("alpha", "beta"),
    "gamma": ("shape", "scale"),
    "lognormal": ("meanlog", "sdlog"),
    "normal": ("mean", "sd"),
    "uniform": ("low", "high"),
    "triangular": ("low", "mode", "high"),
    "fixed": ("value",),
}

_POSITIVE = {
    "beta": ("alpha", "beta"),
    "gamma": ("shape", "scale"),
    "lognormal": ("sdlog",),
    "normal": ("sd",),
}

_INTERVAL = (("low", "high"), ("level",))
_MEAN_SE = (("mean", "se"), ())

# The ways each kind may be given: (required keys, optional keys).
_FORMS: dict[str, tuple[tuple[tuple[str, ...], tuple[str, ...]], ...]] = {
    "beta": ((_NATURAL["beta"], ()), _MEAN_SE, _INTERVAL),
    "gamma": ((_NATURAL["gamma"], ()), _MEAN_SE, _INTERVAL),
    "lognormal": ((_NATURAL["lognormal"], ()), _MEAN_SE, _INTERVAL),
    "normal": ((_NATURAL["normal"], ()), _MEAN_SE, _INTERVAL),
    "uniform": ((_NATURAL["uniform"], ()),),
    "triangular": ((_NATURAL["triangular"], ()),),
    "fixed": ((_NATURAL["fixed"], ()),),
}

# Interval matching is accepted when both quantiles land this close (relative to U - L).
_INTERVAL_TOLERANCE = 1e-7


def _error(where: str, message: str) -> DistributionError:
    return DistributionError(f"{where or 'distribution'}: {message}")


def _number(value: object, where: str, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, Real):
        raise _error(where, f"{key} = {value!r} is not a number; expected a finite number")
    number = float(value)
    if not math.isfinite(number):
        raise _error(where, f"{key} = {value!r} is not finite; expected a finite number")
    return number


def _positive(value: float, where: str, key: str, what: str = "") -> None:
    if not value > 0:
        detail = f" ({what})" if what else ""
        raise _error(where, f"{key} = {value!r} must be > 0{detail}")


def _z(level: float, where: str) -> float:
    """Standard normal quantile for a two-sided interval of coverage ``level``."""
    if not 0.0 < level < 1.0:
        raise _error(where, f"level = {level!r} must lie in (0, 1), e.g. 0.95")
    # The standard library's normal quantile (Wichura 1988, algorithm AS 241, accurate to
    # about 1e-16): scipy.stats.norm.ppf to the last digit or two, without importing scipy.
    return NormalDist().inv_cdf(0.5 + level / 2.0)


def _ordered(low: float, high: float, where: str) -> None:
    if not low < high:
        raise _error(where, f"low = {low!r} must be < high = {high!r}")


# ------------------------------------------------------------------ method of moments
def _representable(
    kind: str, parameters: tuple[float, float], mean: float, se: float, where: str
) -> tuple[float, float]:
    """``parameters`` unless the fit overflowed or underflowed in floating point."""
    if not all(math.isfinite(p) and p > 0 for p in parameters):
        raise _error(
            where,
            f"a {kind} with mean = {mean!r} and se = {se!r} has parameters {parameters} "
            "that floating point cannot hold; use a fixed value or a wider se",
        )
    return parameters


def beta_from_mean_se(mean: float, se: float, *, where: str = "") -> tuple[float, float]:
    """Beta ``(alpha, beta)`` with the given mean and standard error (method of moments).

    ``alpha = m (m (1 - m) / s^2 - 1)``, ``beta = alpha (1 - m) / m`` (Briggs, Claxton &
    Sculpher 2006, ch. 4). Needs ``0 < m < 1`` and ``s^2 < m (1 - m)``.
    """
    m = _number(mean, where, "mean")
    s = _number(se, where, "se")
    if not 0.0 < m < 1.0:
        raise _error(where, f"a beta needs 0 < mean < 1; got mean = {m!r}")
    _positive(s, where, "se", "a standard error")
    if not s * s < m * (1.0 - m):
        raise _error(
            where,
            f"a beta with mean = {m!r} and se = {s!r} is impossible: needs "
            f"se^2 < mean (1 - mean) = {m * (1.0 - m):.6g}, i.e. se < {math.sqrt(m * (1 - m)):.6g}",
        )
    alpha = m * (m * (1.0 - m) / s / s - 1.0)
    return _representable("beta", (alpha, alpha * (1.0 - m) / m), m, s, where)


def gamma_from_mean_se(mean: float, se: float, *, where: str = "") -> tuple[float, float]:
    """Gamma ``(shape, scale)`` with the given mean and standard error.

    ``shape = m^2 / s^2``, ``scale = s^2 / m`` (Briggs, Claxton & Sculpher 2006, ch. 4).
    Needs ``m > 0`` and ``s > 0``.
    """
    m = _number(mean, where, "mean")
    s = _number(se, where, "se")
    _positive(m, where, "mean", "a gamma is for positive quantities such as costs")
    _positive(s, where, "se", "a standard error")
    return _representable("gamma", ((m / s) ** 2, s / m * s), m, s, where)


def lognormal_from_mean_se(mean: float, se: float, *, where: str = "") -> tuple[float, float]:
    """Lognormal ``(meanlog, sdlog)`` whose mean and standard deviation are ``mean``, ``se``.

    ``sdlog^2 = ln(1 + s^2 / m^2)``, ``meanlog = ln m - sdlog^2 / 2`` (moments of the
    lognormal; common practice). Needs ``m > 0`` and ``s > 0``.
    """
    m = _number(mean, where, "mean")
    s = _number(se, where, "se")
    _positive(m, where, "mean", "a lognormal is for positive quantities")
    _positive(s, where, "se", "a standard error")
    variance_log = math.log1p((s / m) ** 2)
    return math.log(m) - variance_log / 2.0, math.sqrt(variance_log)


def lognormal_from_interval(
    low: float, high: float, level: float = 0.95, *, where: str = ""
) -> tuple[float, float]:
    """Lognormal ``(meanlog, sdlog)`` from an interval, e.g. a 95% CI of a relative risk.

    ``meanlog = (ln L + ln U) / 2``, ``sdlog = (ln U - ln L) / (2 z)`` with
    ``z = Phi^-1(0.5 + level / 2)`` (1.96 for 95%; Briggs, Claxton & Sculpher 2006, ch. 4).
    Needs ``0 < L < U``.
    """
    lo = _number(low, where, "low")
    hi = _number(high, where, "high")
    z = _z(_number(level, where, "level"), where)
    _positive(lo, where, "low", "a lognormal is for positive quantities")
    _ordered(lo, hi, where)
    log_low, log_high = math.log(lo), math.log(hi)
    return (log_low + log_high) / 2.0, (log_high - log_low) / (2.0 * z)


def normal_from_interval(
    low: float, high: float, level: float = 0.95, *, where: str = ""
) -> tuple[float, float]:
    """Normal ``(mean, sd)`` from a symmetric interval.

    ``mean = (L + U) / 2``, ``sd = (U - L) / (2 z)`` with ``z = Phi^-1(0.5 + level / 2)``
    (common practice). Needs ``L < U``.
    """
    lo = _number(low, where, "low")
    hi = _number(high, where, "high")
    z = _z(_number(level, where, "level"), where)
    _ordered(lo, hi, where)
    return (lo + hi) / 2.0, (hi - lo) / (2.0 * z)


def _match_interval(
    kind: str, low: float, high: float, level: float, start: tuple[float, float], where: str
) -> tuple[float, float]:
    """Two positive parameters whose distribution has ``low``, ``high`` as its quantiles."""
    import scipy.optimize
    import scipy.stats

    q = np.array([0.5 - level / 2.0, 0.5 + level / 2.0])
    target = np.array([low, high])

    def frozen(log_params: np.ndarray) -> scipy.stats.rv_continuous:
        a, b = np.exp(log_params)
        return scipy.stats.beta(a, b) if kind == "beta" else scipy.stats.gamma(a, scale=b)

    z_target = scipy.stats.norm.ppf(q)

    def residual(log_params: np.ndarray) -> np.ndarray:
        # Normal scores keep the far tails (level near 1) as well conditioned as the middle.
        # The upper tail goes through the survival function so it does not round to 1.
        dist = frozen(log_params)
        scores = [scipy.stats.norm.ppf(dist.cdf(low)), scipy.stats.norm.isf(dist.sf(high))]
        return np.array(scores) - z_target

    with np.errstate(all="ignore"):
        solution = scipy.optimize.root(residual, np.log(start), method="hybr")
        found = frozen(solution.x).ppf(q)
    if not np.all(np.isfinite(found)) or np.abs(found - target).max() > _INTERVAL_TOLERANCE * (
        high - low
    ):
        raise _error(
            where,
            f"found no {kind} whose {level:g} interval is [{low!r}, {high!r}] "
            f"(closest: [{found[0]:.6g}, {found[1]:.6g}]); give mean and se instead",
        )
    a, b = np.exp(solution.x)
    return float(a), float(b)


def beta_from_interval(
    low: float, high: float, level: float = 0.95, *, where: str = ""
) -> tuple[float, float]:
    """Beta ``(alpha, beta)`` whose central ``level`` interval is ``[low, high]``.

    Solved numerically (both quantiles matched), starting from the method of moments
    with mean ``(L + U)/2`` and se ``(U - L)/(2 z)``. Needs ``0 < L < U < 1``.
    """
    lo = _number(low, where, "low")
    hi = _number(high, where, "high")
    lev = _number(level, where, "level")
    z = _z(lev, where)
    _ordered(lo, hi, where)
    if not (0.0 < lo and hi < 1.0):
        raise _error(where, f"a beta interval needs 0 < low < high < 1; got [{lo!r}, {hi!r}]")
    m, s = (lo + hi) / 2.0, (hi - lo) / (2.0 * z)
    try:
        start = beta_from_mean_se(m, s)
    except DistributionError:  # the interval is wider than any beta's moments allow
        start = (1.0, 1.0)
    return _match_interval("beta", lo, hi, lev, start, where)


def gamma_from_interval(
    low: float, high: float, level: float = 0.95, *, where: str = ""
) -> tuple[float, float]:
    """Gamma ``(shape, scale)`` whose central ``level`` interval is ``[low, high]``.

    Solved numerically, starting from the method of moments. Needs ``0 < L < U``.
    """
    lo = _number(low, where, "low")
    hi = _number(high, where, "high")
    lev = _number(level, where, "level")
    z = _z(lev, where)
    _positive(lo, where, "low", "a gamma is for positive quantities")
    _ordered(lo, hi, where)
    start = gamma_from_mean_se((lo + hi) / 2.0, (hi - lo) / (2.0 * z))
    return _match_interval("gamma", lo, hi, lev, start, where)


# ---------------------------------------------------------------- natural parameters
def _check_natural(kind: str, params: Mapping[str, float], where: str) -> None:
    """Raise unless ``params`` are valid natural parameters of ``kind``."""
    for key in _POSITIVE.get(kind, ()):
        _positive(params[key], where, key)
    if kind == "uniform":
        _ordered(params["low"], params["high"], where)
    elif kind == "triangular":
        low, mode, high = params["low"], params["mode"], params["high"]
        _ordered(low, high, where)
        if not low <= mode <= high:
            raise _error(where, f"mode = {mode!r} must lie in [low, high] = [{low!r}, {high!r}]")


def _from_mean_se(kind: str, mean: float, se: float, where: str) -> tuple[float, float]:
    if kind == "beta":
        return beta_from_mean_se(mean, se, where=where)
    if kind == "gamma":
        return gamma_from_mean_se(mean, se, where=where)
    if kind == "lognormal":
        return lognormal_from_mean_se(mean, se, where=where)
    _positive(se, where, "se", "a standard error")
    return mean, se  # normal: the standard error is the sd of the estimate


_FROM_INTERVAL = {
    "beta": beta_from_interval,
    "gamma": gamma_from_interval,
    "lognormal": lognormal_from_interval,
    "normal": normal_from_interval,
}


def check_draw_request(rng: object, n: object) -> None:
    if not isinstance(rng, np.random.Generator):
        raise _error("sample", f"rng must be a numpy.random.Generator; got {type(rng).__name__}")
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        raise _error("sample", f"n = {n!r} must be a whole number >= 0")


@dataclass(frozen=True)
class Distribution:
    """One parameter's distribution.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    parameters : tuple of (name, value)
        Natural parameters in a fixed order: beta (alpha, beta), gamma (shape, scale),
        lognormal (meanlog, sdlog) of the log, normal (mean, sd), uniform (low, high),
        triangular (low, mode, high), fixed (value).
    spec : tuple of (key, value)
        The table it was built from (see :meth:`to_spec`).
    """

    kind: str
    parameters: tuple[tuple[str, float], ...]
    spec: tuple[tuple[str, object], ...] = field(default=())

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise _error("Distribution", f"kind {self.kind!r} is unknown; expected one of {KINDS}")
        names = tuple(name for name, _ in self.parameters)
        if names != _NATURAL[self.kind]:
            raise _error(
                "Distribution",
                f"{self.kind} parameters are {_NATURAL[self.kind]}; got {names}",
            )
        for name, value in self.parameters:
            _number(value, "Distribution", name)
        _check_natural(self.kind, self.params, "Distribution")

    @property
    def params(self) -> dict[str, float]:
        """Natural parameters by name."""
        return dict(self.parameters)

    def to_spec(self) -> dict[str, object]:
        """The table this distribution was built from, unchanged (natural form if none)."""
        if self.spec:
            return dict(self.spec)
        return {"type": self.kind, **self.params}

    def mean(self) -> float:
        """Expected value (closed form)."""
        p = self.params
        if self.kind == "beta":
            return p["alpha"] / (p["alpha"] + p["beta"])
        if self.kind == "gamma":
            return p["shape"] * p["scale"]
        if self.kind == "lognormal":
            return math.exp(p["meanlog"] + p["sdlog"] ** 2 / 2.0)
        if self.kind == "normal":
            return p["mean"]
        if self.kind == "uniform":
            return (p["low"] + p["high"]) / 2.0
        if self.kind == "triangular":
            return (p["low"] + p["mode"] + p["high"]) / 3.0
        return p["value"]

    def variance(self) -> float:
        """Variance (closed form)."""
        p = self.params
        if self.kind == "beta":
            a, b = p["alpha"], p["beta"]
            return a * b / ((a + b) ** 2 * (a + b + 1.0))
        if self.kind == "gamma":
            return p["shape"] * p["scale"] ** 2
        if self.kind == "lognormal":
            s2 = p["sdlog"] ** 2
            return math.expm1(s2) * math.exp(2.0 * p["meanlog"] + s2)
        if self.kind == "normal":
            return p["sd"] ** 2
        if self.kind == "uniform":
            return (p["high"] - p["low"]) ** 2 / 12.0
        if self.kind == "triangular":
            a, c, b = p["low"], p["mode"], p["high"]
            return (a * a + b * b + c * c - a * b - a * c - b * c) / 18.0
        return 0.0

    def support(self) -> tuple[float, float]:
        """``(lo, hi)``: the smallest and largest values a draw can take."""
        p = self.params
        if self.kind == "beta":
            return 0.0, 1.0
        if self.kind in ("gamma", "lognormal"):
            return 0.0, math.inf
        if self.kind == "normal":
            return -math.inf, math.inf
        if self.kind in ("uniform", "triangular"):
            return p["low"], p["high"]
        return p["value"], p["value"]

    def scipy(self) -> scipy.stats.rv_continuous:
        """The equivalent frozen ``scipy.stats`` distribution (not for ``fixed``)."""
        import scipy.stats

        p = self.params
        if self.kind == "beta":
            return scipy.stats.beta(p["alpha"], p["beta"])
        if self.kind == "gamma":
            return scipy.stats.gamma(p["shape"], scale=p["scale"])
        if self.kind == "lognormal":
            return scipy.stats.lognorm(p["sdlog"], scale=math.exp(p["meanlog"]))
        if self.kind == "normal":
            return scipy.stats.norm(p["mean"], p["sd"])
        if self.kind == "uniform":
            return scipy.stats.uniform(p["low"], p["high"] - p["low"])
        if self.kind == "triangular":
            width = p["high"] - p["low"]
            return scipy.stats.triang((p["mode"] - p["low"]) / width, p["low"], width)
        raise _error("Distribution", "a fixed value has no scipy distribution")

    def quantile(self, q: object) -> np.ndarray:
        """Quantiles (inverse CDF) at probabilities ``q``.

        Parameters
        ----------
        q : array_like, shape (...)
            Probabilities in [0, 1].

        Returns
        -------
        numpy.ndarray, shape (...)
            Values of the parameter, in its own units.
        """
        probabilities = np.asarray(q, dtype=float)
        bad = ~((probabilities >= 0.0) & (probabilities <= 1.0))
        if bad.any():
            first = probabilities[np.unravel_index(np.argmax(bad), bad.shape)] if bad.ndim else q
            raise _error("quantile", f"q = {float(np.asarray(first))!r} must lie in [0, 1]")
        if self.kind == "fixed":
            return np.full(probabilities.shape, self.params["value"])
        return np.asarray(self.scipy().ppf(probabilities), dtype=float)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """``n`` independent draws, shape (n,), from ``rng``'s own methods (reproducible)."""
        check_draw_request(rng, n)
        p = self.params
        if self.kind == "beta":
            return rng.beta(p["alpha"], p["beta"], size=n)
        if self.kind == "gamma":
            return rng.gamma(p["shape"], p["scale"], size=n)
        if self.kind == "lognormal":
            return rng.lognormal(p["meanlog"], p["sdlog"], size=n)
        if self.kind == "normal":
            return rng.normal(p["mean"], p["sd"], size=n)
        if self.kind == "uniform":
            return rng.uniform(p["low"], p["high"], size=n)
        if self.kind == "triangular":
            return rng.triangular(p["low"], p["mode"], p["high"], size=n)
        return np.full(n, p["value"])


def _form(kind: str, keys: set[str], where: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """The one way of giving ``kind`` that the keys match."""
    forms = _FORMS[kind]
    allowed = {key for required, optional in forms for key in (*required, *optional)}
    unknown = sorted(keys - allowed)
    if unknown:
        raise _error(
            where,
            f"unknown key(s) {', '.join(unknown)} for a {kind}; allowed keys: "
            f"{', '.join(sorted(allowed))}",
        )
    for required, optional in forms:
        if set(required) <= keys <= set(required) | set(optional):
            return required, optional
    ways = " | ".join(
        " and ".join(required) + (f" (optional {', '.join(optional)})" if optional else "")
        for required, optional in forms
    )
    raise _error(
        where,
        f"a {kind} is given by {ways}; got {', '.join(sorted(keys)) or 'no parameters'}",
    )


def distribution_from_spec(spec: Mapping, *, where: str = "") -> Distribution:
    """Build a :class:`Distribution` from a table such as ``{type="beta", mean=0.8, se=0.1}``.

    Parameters
    ----------
    spec : Mapping
        ``type`` (one of :data:`KINDS`) and the numbers of one form: natural
        parameters, ``mean`` and ``se``, or ``low`` and ``high`` (optional ``level``,
        default 0.95); see the module docstring.
    where : str
        Table path named in errors, e.g. ``"parameters.p_progress.distribution"``.

    Raises
    ------
    caredecide.errors.DistributionError
        Unknown type or keys, missing keys, non-numbers, or an impossible request.
    """
    if not isinstance(spec, Mapping):
        raise _error(where, f'expected a table such as {{type="beta", ...}}; got {spec!r}')
    kind = spec.get("type")
    if kind is None:
        raise _error(where, f"missing key 'type'; expected one of {', '.join(KINDS)}")
    if not isinstance(kind, str) or kind not in KINDS:
        raise _error(where, f"type = {kind!r} is unknown; expected one of {', '.join(KINDS)}")
    keys = {str(key) for key in spec if key != "type"}
    required, _ = _form(kind, keys, where)
    values = {key: _number(spec[key], where, key) for key in keys}
    if required == _NATURAL[kind]:
        _check_natural(kind, values, where)
        natural = tuple(values[key] for key in required)
    elif required == _MEAN_SE[0]:
        natural = _from_mean_se(kind, values["mean"], values["se"], where)
    else:
        natural = _FROM_INTERVAL[kind](
            values["low"], values["high"], values.get("level", 0.95), where=where
        )
    return Distribution(
        kind=kind,
        parameters=tuple(zip(_NATURAL[kind], (float(v) for v in natural), strict=True)),
        spec=tuple(spec.items()),
    )


# -------------------------------------------------------------------------- Dirichlet
def dirichlet_from_counts(
    counts: Mapping[str, float], prior: float = 0.0, *, where: str = ""
) -> DirichletGroup:
    """Dirichlet for a multinomial row from observed counts (Briggs, Ades & Price 2003).

    Parameters
    ----------
    counts : Mapping[str, float]
        Observed moves from one state to each destination, >= 0; at least two members
        and a positive total (counts plus prior).
    prior : float
        Added to every count (>= 0); e.g. 1 for a uniform prior, so unobserved moves
        stay possible.
    where : str
        Table path named in errors.

    Returns
    -------
    DirichletGroup
        ``alpha_i = n_i + prior``; mean ``n_i / N`` and variance
        ``n_i (N - n_i) / (N^2 (N + 1))`` when ``prior`` is 0.
    """
    return _dirichlet(counts, prior, where)


def _dirichlet(counts: object, prior: object, where: str) -> DirichletGroup:
    """Validate the counts and prior, and build the group."""
    if not isinstance(counts, Mapping) or len(counts) < 2:
        raise _error(where, f"counts must be a table of at least two destinations; got {counts!r}")
    add = _number(prior, where, "prior")
    if add < 0:
        raise _error(where, f"prior = {add!r} must be >= 0")
    members = tuple(str(member) for member in counts)
    values = np.array([_number(v, where, f"counts.{k}") for k, v in counts.items()])
    negative = values < 0
    if negative.any():
        i = int(np.argmax(negative))
        raise _error(where, f"counts.{members[i]} = {float(values[i])!r} must be >= 0")
    alpha = values + add
    if not alpha.sum() > 0:
        raise _error(
            where,
            f"counts sum to 0 and prior is {add!r}: a Dirichlet needs a positive total; "
            "give the observed counts or a prior (e.g. prior = 1)",
        )
    return DirichletGroup(
        name=where.rsplit(".", 1)[-1], members=members, counts=tuple(values.tolist()), prior=add
    )


def dirichlet_from_spec(spec: Mapping, *, where: str = "") -> DirichletGroup:
    """Build a :class:`DirichletGroup` from ``{type="dirichlet", counts={...}, prior=1}``.

    ``prior`` is optional (default 0). :meth:`DirichletGroup.to_spec` gives ``spec`` back.
    """
    if not isinstance(spec, Mapping) or spec.get("type") != "dirichlet":
        raise _error(where, f'expected a table with type = "dirichlet"; got {spec!r}')
    unknown = sorted(set(spec) - {"type", "counts", "prior"})
    if unknown:
        raise _error(
            where, f"unknown key(s) {', '.join(unknown)} for a dirichlet; allowed: counts, prior"
        )
    if "counts" not in spec:
        raise _error(where, "missing key 'counts' (a table of destination = count)")
    return _dirichlet(spec["counts"], spec.get("prior", 0.0), where)
