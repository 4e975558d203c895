"""Value of information from probabilistic draws of net benefit.

Expected value of perfect information (Claxton 1999, J Health Econ 18:341-364; from
memory), for ``D`` draws of the net benefit ``NB[d, k]`` of ``K`` strategies::

    EVPI = E_theta[max_k NB(k, theta)] - max_k E_theta[NB(k, theta)]
         = mean_d L_d,   L_d = max_k NB[d, k] - NB[d, k*],   k* = argmax_k mean_d NB[d, k]

``L_d`` is the opportunity loss of the strategy chosen under current information. Its
sample standard deviation over sqrt(D) is the Monte Carlo standard error reported here
(the delta-method error of a mean given ``k*``). It ignores the chance that the sample
picks the wrong ``k*``, which only matters when two strategies have near-equal expected
net benefit; there the estimate carries a small upward bias of order 1/sqrt(D).

Expected value of partial perfect information for a parameter (group) ``phi`` by the
regression method of Strong, Oakley & Brennan 2014 (Med Decis Making 34(3):311-326)::

    EVPPI = E_phi[max_k E[NB_k | phi]] - max_k E[NB_k]

``E[NB_k - NB_0 | phi]`` is estimated for each strategy ``k`` against the first
(reference) strategy by a penalised regression spline of the incremental net benefit on
``phi``; the EVPPI is then the mean opportunity loss of the fitted values. The
smoothers (all chose their smoothing by generalised cross-validation, GCV):

``"spline"`` (one parameter)
    A penalised regression spline: cubic B-splines with knots at equally spaced
    quantiles of the parameter (mapped linearly onto [0, 1]), penalised by the
    integrated squared second derivative (O'Sullivan penalised splines; Wand & Ormerod
    2008, Aust N Z J Stat 50(2):179-201, from memory). Straight lines are not
    penalised, so a linear effect costs two degrees of freedom. Up to 20 basis
    functions, at least 10 draws per basis function.
``"additive"`` (any number of parameters)
    Sum of one such spline per parameter, one shared smoothing parameter. Misses
    interactions between parameters, so it *underestimates* the EVPPI of a group whose
    effect on net benefit is not additive.
``"tensor"`` (2 or 3 parameters)
    Tensor product of the marginal bases (up to 8 per margin for two parameters, 5 for
    three) with the isotropic penalty ``sum_j I x .. x Omega_j x .. x I`` and one shared
    smoothing parameter (every margin is on [0, 1], so one parameter is a fair
    compromise, but a parameter with a much rougher effect than the others forces the
    same smoothness on all). The basis grows as ``m ** p``: two parameters need at
    least 160 draws, three at least 640; more than three are refused.
``"smoothing_spline"`` (one parameter, reference)
    :func:`scipy.interpolate.make_smoothing_spline` (a full natural cubic smoothing
    spline with GCV) on the raw parameter, tied values averaged with their counts as
    weights; it reports no degrees of freedom. Slow for large D, and scipy 1.17's GCV
    search was seen to fail (oversmooth, or raise) on random designs with near-tied
    values, so it serves as a cross-check, not the default.
``"auto"``
    ``"spline"`` for one parameter, ``"tensor"`` for two or three when the draws
    allow it, else ``"additive"``.

Given the smoothing parameter the fit is linear, ``fitted = H y``. With the Gram matrix
``G = X'X`` and penalty ``P``, the generalised eigenproblem ``P v = s (G + delta I) v``
diagonalises every fit at once: ``fitted = Q diag(1 / (1 + lambda s)) Q' y`` with
``Q = X V``, so the GCV score ``D * RSS / (D - edf) ** 2`` over a grid of ``lambda`` is
a matrix product for all strategies together (``delta`` is a ridge of 1e-9 of the mean
Gram diagonal that keeps bases with no draws, e.g. for discrete parameters, solvable).
The effective degrees of freedom are ``edf = trace(H)``.

The lambda grid runs in steps of 0.05 decades from ``1e-3 / max(s)`` (no smoothing)
to ``1e3 / min(s > 0)`` (a fit in the penalty's null space). A choice at the low end
is reported in ``message``: the basis may be too small for the effect.

Limits: a regression EVPPI is biased upward by the noise the smoother keeps (of the
order of ``edf / D`` times the residual variance, divided by the spread of the fitted
values) and downward where the smoother is too stiff. The standard error reported is
the Monte Carlo error of the mean fitted opportunity loss; the regression's own error
is estimated on request by sampling the spline coefficients from their Bayesian
posterior (``posterior_samples``; Strong et al. 2014).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from caredecide.errors import ModelError, Problem

METHODS = ("auto", "spline", "additive", "tensor", "smoothing_spline")
MIN_DRAWS_PER_COEFFICIENT = 10
"""Draws required per spline coefficient (common practice for regression smoothers)."""
_MAX_MARGIN = {1: 20, 2: 8, 3: 5}
_MIN_MARGIN = 5
_MIN_TENSOR_MARGIN = 4
_RIDGE = 1e-9
_LAMBDA_STEP_DECADES = 0.05
_CHUNK_ELEMENTS = 4_000_000

__all__ = [
    "METHODS",
    "EVPIResult",
    "EVPPIResult",
    "discounted_population",
    "evpi",
    "evppi_regression",
    "opportunity_loss",
]


class EVPIResult(float):
    """EVPI per person (a ``float``) with its Monte Carlo standard error.

    Attributes
    ----------
    standard_error : float
        Monte Carlo standard error (same units as the value).
    n_draws : int
        ``D``.
    expected_net_benefit : numpy.ndarray
        (K,) mean net benefit of each strategy.
    best_strategy : int
        Index of the strategy with the highest expected net benefit.
    per_person : bool
        True: the value is per person; callers scale by the population that benefits
        (e.g. discounted incidence over the decision's lifetime) with :meth:`scaled`.
    """

    standard_error: float
    n_draws: int
    expected_net_benefit: np.ndarray
    best_strategy: int
    per_person: bool

    def __new__(
        cls,
        value: float,
        *,
        standard_error: float,
        n_draws: int,
        expected_net_benefit: np.ndarray,
        best_strategy: int,
        per_person: bool = True,
    ) -> EVPIResult:
        self = super().__new__(cls, value)
        self.standard_error = float(standard_error)
        self.n_draws = int(n_draws)
        self.expected_net_benefit = expected_net_benefit
        self.best_strategy = int(best_strategy)
        self.per_person = per_person
        return self

    @property
    def value(self) -> float:
        """The EVPI as a plain ``float``."""
        return float(self)

    def scaled(self, population: float) -> EVPIResult:
        """Population EVPI: value and standard error times ``population`` (persons)."""
        if not (np.isfinite(population) and population >= 0):
            raise ModelError(
                Problem("population", f"expected a finite number >= 0, got {population!r}")
            )
        return EVPIResult(
            float(self) * population,
            standard_error=self.standard_error * population,
            n_draws=self.n_draws,
            expected_net_benefit=self.expected_net_benefit * population,
            best_strategy=self.best_strategy,
            per_person=False,
        )

    def __repr__(self) -> str:
        unit = "per person" if self.per_person else "population"
        return f"EVPIResult({float(self)!r} {unit}, standard_error={self.standard_error!r})"

    def __reduce__(self):  # keep the attributes when copied or sent to a worker
        return (
            _rebuild_evpi,
            (
                float(self),
                self.standard_error,
                self.n_draws,
                self.expected_net_benefit,
                self.best_strategy,
                self.per_person,
            ),
        )


def _rebuild_evpi(value, standard_error, n_draws, expected, best, per_person) -> EVPIResult:
    return EVPIResult(
        value,
        standard_error=standard_error,
        n_draws=n_draws,
        expected_net_benefit=expected,
        best_strategy=best,
        per_person=per_person,
    )


@dataclass(frozen=True)
class EVPPIResult:
    """EVPPI of a parameter (group) by regression, with the fit's diagnostics.

    Attributes
    ----------
    value : float
        EVPPI per person (net-benefit units).
    standard_error : float
        Monte Carlo standard error of the mean fitted opportunity loss (excludes the
        regression's own error).
    evpi : EVPIResult
        The EVPI of the same draws, for comparison (EVPPI <= EVPI up to noise).
    method : str
        The smoother used (after resolving ``"auto"``).
    n_draws, n_covariates : int
        ``D`` and ``p``.
    basis_size : int
        Number of spline coefficients per strategy (0 for ``"smoothing_spline"``).
    effective_degrees_of_freedom : numpy.ndarray
        (K - 1,) trace of the smoother matrix for each strategy against the reference
        (NaN for ``"smoothing_spline"``).
    smoothing_parameter : numpy.ndarray
        (K - 1,) the GCV-chosen penalty weight (NaN for ``"smoothing_spline"``).
    residual_standard_error : numpy.ndarray
        (K - 1,) ``sqrt(RSS / (D - edf))`` of each fit (net-benefit units).
    r_squared : numpy.ndarray
        (K - 1,) share of the incremental net benefit's variance the parameter explains.
    fitted : numpy.ndarray
        (D, K) fitted ``E[NB_k - NB_0 | phi]`` (column 0 is zero).
    message : str
        Notes on the fit (empty when nothing to report).
    """

    value: float
    standard_error: float
    evpi: EVPIResult
    method: str
    n_draws: int
    n_covariates: int
    basis_size: int
    effective_degrees_of_freedom: np.ndarray
    smoothing_parameter: np.ndarray
    residual_standard_error: np.ndarray
    r_squared: np.ndarray
    fitted: np.ndarray
    message: str = ""
    per_person: bool = True
    regression_standard_error: float = float("nan")
    """Standard deviation of the EVPPI over posterior draws of the spline (NaN unless
    ``posterior_samples`` was given)."""


def discounted_population(per_year: float, years: int, discount_rate: float) -> float:
    """Persons who benefit from a decision over its lifetime, discounted to today.

    Population EVPI and EVPPI scale the per-person values by the population that the
    decision concerns over the time the information stays useful (Claxton 1999, J
    Health Econ 18:341-364; Philips, Claxton & Palmer 2008, Med Decis Making
    28(3):287-299, "The half-life of truth", both from memory)::

        population = sum_{t=0}^{years-1} per_year / (1 + discount_rate) ** t

    with ``per_year`` persons entering each year (incidence), year ``t`` discounted to
    its start (the first year undiscounted).

    Parameters
    ----------
    per_year : float
        Persons facing the decision each year (>= 0).
    years : int
        Decision horizon in whole years (>= 1).
    discount_rate : float
        Annual rate in [0, 1).

    Returns
    -------
    float
        Discounted number of persons.
    """
    problems = []
    if isinstance(per_year, bool) or not (
        isinstance(per_year, int | float) and np.isfinite(per_year) and per_year >= 0
    ):
        problems.append(
            Problem("population_per_year", f"value {per_year!r}; expected a number >= 0")
        )
    if isinstance(years, bool) or not isinstance(years, int | np.integer) or years < 1:
        problems.append(
            Problem("decision_years", f"value {years!r}; expected a whole number of years >= 1")
        )
    if isinstance(discount_rate, bool) or not (
        isinstance(discount_rate, int | float) and 0 <= discount_rate < 1
    ):
        problems.append(
            Problem("discount_rate", f"value {discount_rate!r}; expected an annual rate in [0, 1)")
        )
    if problems:
        raise ModelError(problems)
    t = np.arange(int(years))
    return float(per_year * np.sum((1.0 + discount_rate) ** -t))


def opportunity_loss(values: np.ndarray) -> tuple[float, float, np.ndarray, int]:
    """Mean opportunity loss of choosing the best-on-average column, and its error.

    Parameters
    ----------
    values : numpy.ndarray
        (D, K) net benefit (or fitted conditional net benefit) per draw and strategy,
        or a stack (..., D, K) of such tables (e.g. one per willingness to pay).

    Returns
    -------
    mean_loss : float or numpy.ndarray
        ``mean_d [max_k values[d, k] - values[d, k*]]`` (>= 0); shape (...) for a stack.
    standard_error : float or numpy.ndarray
        Sample standard deviation of the loss over ``sqrt(D)`` (NaN when D == 1).
    expected : numpy.ndarray
        (..., K) column means.
    best : int or numpy.ndarray
        ``k*``, the column with the highest mean (the first on ties).
    """
    expected = values.mean(axis=-2)
    best = np.argmax(expected, axis=-1)
    chosen = np.take_along_axis(values, best[..., None, None], axis=-1)[..., 0]
    loss = values.max(axis=-1) - chosen  # (..., D)
    n = loss.shape[-1]
    if n > 1:
        se = loss.std(axis=-1, ddof=1) / np.sqrt(n)
    else:
        se = np.full(loss.shape[:-1], np.nan)
    mean_loss = loss.mean(axis=-1)
    if values.ndim == 2:
        return float(mean_loss), float(se), expected, int(best)
    return mean_loss, se, expected, best


def evpi(net_benefit: np.ndarray) -> EVPIResult:
    """Expected value of perfect information per person, with its Monte Carlo error.

    Parameters
    ----------
    net_benefit : array_like
        (D, K) net benefit (e.g. net monetary benefit, currency) of strategy ``k`` in
        probabilistic draw ``d``.

    Returns
    -------
    EVPIResult
        A ``float`` (EVPI per person, net-benefit units) carrying ``standard_error``,
        ``expected_net_benefit`` (K,), ``best_strategy`` and ``per_person``.

    Raises
    ------
    ModelError
        When ``net_benefit`` is not a 2-D array of finite numbers with at least one row
        and one column.
    """
    values = _check_net_benefit(net_benefit, min_strategies=1)
    mean_loss, se, expected, best = opportunity_loss(values)
    return EVPIResult(
        mean_loss,
        standard_error=se,
        n_draws=values.shape[0],
        expected_net_benefit=expected,
        best_strategy=best,
    )


def evppi_regression(
    net_benefit: np.ndarray,
    covariates: np.ndarray,
    *,
    method: str = "auto",
    basis_size: int | None = None,
    posterior_samples: int = 0,
    seed: int | None = None,
) -> EVPPIResult:
    """EVPPI of a parameter or group of parameters by regression (Strong et al. 2014).

    Parameters
    ----------
    net_benefit : array_like
        (D, K) net benefit per draw and strategy, K >= 2.
    covariates : array_like
        (D,) or (D, p) sampled values of the parameter(s) of interest, drawn jointly
        with ``net_benefit`` (row ``d`` belongs to draw ``d``).
    method : {"auto", "spline", "additive", "tensor", "smoothing_spline"}
        The smoother (see the module docstring).
    basis_size : int, optional
        B-spline basis functions per parameter (default: the largest allowed by the
        draws, at most 20 for one parameter, 8 per margin for a two-parameter tensor
        product, 5 for three).
    posterior_samples : int
        When > 1, the EVPPI is recomputed for this many draws of the spline
        coefficients from their Bayesian posterior and their standard deviation is
        reported as ``regression_standard_error`` (Strong et al. 2014); 0 skips it.
    seed : int, optional
        Seed for the posterior draws (``numpy.random.SeedSequence``).

    Returns
    -------
    EVPPIResult

    Raises
    ------
    ModelError
        For a bad array (shape, NaN), an unknown method, a method that does not fit the
        number of parameters, or too few draws for the basis.
    """
    values = _check_net_benefit(net_benefit, min_strategies=2)
    n_draws = values.shape[0]
    phi = _check_covariates(covariates, n_draws)
    if (
        isinstance(posterior_samples, bool)
        or not isinstance(posterior_samples, int | np.integer)
        or posterior_samples == 1
        or posterior_samples < 0
    ):
        raise ModelError(
            Problem(
                "posterior_samples",
                f"expected 0 (skip) or an integer >= 2, got {posterior_samples!r}",
            )
        )
    p = phi.shape[1]
    method = _resolve_method(method, p, n_draws)
    incremental = values[:, 1:] - values[:, :1]

    if method == "smoothing_spline":
        fitted_inc = _fit_scipy_smoothing_spline(phi[:, 0], incremental)
        nan = np.full(incremental.shape[1], np.nan)
        edf, lam, size = nan, nan, 0
        rss = ((incremental - fitted_inc) ** 2).sum(axis=0)
        dof = np.full(incremental.shape[1], float(n_draws))
        message = ""
    else:
        margin = _margin_size(method, p, n_draws, basis_size)
        design, penalty = _design(method, _unit_scale(phi), margin)
        fit = _fit_penalised(design, penalty, incremental)
        fitted_inc, edf, lam, rss = fit.fitted, fit.edf, fit.smoothing, fit.rss
        size = design.shape[1]
        dof = n_draws - edf
        message = (
            "the smoothing chose the least penalty on the grid for strategy column(s) "
            f"{(np.flatnonzero(fit.at_limit) + 1).tolist()}: the basis may be too small"
            if fit.at_limit.any()
            else ""
        )
    tss = ((incremental - incremental.mean(axis=0)) ** 2).sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        r_squared = np.where(tss > 0, 1.0 - rss / tss, np.nan)
        residual_se = np.sqrt(rss / np.maximum(dof, 1.0))
    fitted = np.concatenate([np.zeros((n_draws, 1)), fitted_inc], axis=1)
    value, se, _, _ = opportunity_loss(fitted)
    regression_se = float("nan")
    if posterior_samples > 1 and method != "smoothing_spline":
        regression_se = _regression_error(fit, residual_se, posterior_samples, seed)
    elif posterior_samples > 1:
        message = "no posterior draws for 'smoothing_spline'; regression error not estimated"
    return EVPPIResult(
        value=value,
        standard_error=se,
        evpi=evpi(values),
        method=method,
        n_draws=n_draws,
        n_covariates=p,
        basis_size=size,
        effective_degrees_of_freedom=np.asarray(edf, dtype=float),
        smoothing_parameter=np.asarray(lam, dtype=float),
        residual_standard_error=residual_se,
        r_squared=r_squared,
        fitted=fitted,
        message=message,
        regression_standard_error=regression_se,
    )


# --- smoothers ---------------------------------------------------------------------------


def _unit_scale(phi: np.ndarray) -> np.ndarray:
    """(D, p) each column mapped linearly onto [0, 1] (a constant column onto 0.5)."""
    low, high = phi.min(axis=0), phi.max(axis=0)
    span = np.where(high > low, high - low, 1.0)
    return np.where(high > low, (phi - low) / span, 0.5)


def bspline_matrix(
    x: np.ndarray, knots: np.ndarray, degree: int = 3, derivative: int = 0
) -> np.ndarray:
    """Values (or a derivative) of the B-splines of a knot vector at the points ``x``.

    Parameters
    ----------
    x : ndarray
        (n,) points in ``[knots[degree], knots[-degree - 1]]``; the right end belongs to
        the last interval.
    knots : ndarray
        (m + degree + 1,) non-decreasing knots (repeated ``degree + 1`` times at each end
        for a clamped basis).
    degree : int
        Degree of the B-splines (3: cubic).
    derivative : int
        Order of the derivative, ``0 <= derivative <= degree``.

    Returns
    -------
    ndarray
        (n, m): column ``i`` is the ``derivative``-th derivative of ``B_i`` at ``x``.

    Notes
    -----
    Cox-de Boor recursion for the values up to degree ``degree - derivative``, then the
    derivative formula ``B'_{i,k} = k (B_{i,k-1} / (t_{i+k} - t_i) - B_{i+1,k-1} /
    (t_{i+k+1} - t_{i+1}))`` for the remaining degrees (de Boor 2001, A Practical Guide
    to Splines, rev. ed., ch. IX-X; from memory), a term with an empty support
    (``0 / 0``) being 0. The same values as ``scipy.interpolate.BSpline`` (checked in
    the tests), without importing it.
    """
    t = np.asarray(knots, dtype=float)
    x = np.asarray(x, dtype=float)
    n_basis = t.size - degree - 1
    interval = np.clip(np.searchsorted(t, x, side="right") - 1, degree, n_basis - 1)
    values = np.zeros((x.size, t.size - 1))
    values[np.arange(x.size), interval] = 1.0  # degree 0: the indicator of the interval

    def ratio(numerator: np.ndarray, width: np.ndarray) -> np.ndarray:
        safe = np.where(width > 0.0, width, 1.0)
        return np.where(width > 0.0, numerator / safe, 0.0)

    for k in range(1, degree + 1):
        count = t.size - 1 - k
        left_width = t[k : k + count] - t[:count]
        right_width = t[k + 1 : k + 1 + count] - t[1 : 1 + count]
        if k <= degree - derivative:  # values
            rising = ratio(x[:, None] - t[None, :count], left_width[None, :])
            falling = ratio(t[None, k + 1 : k + 1 + count] - x[:, None], right_width[None, :])
            values = rising * values[:, :-1] + falling * values[:, 1:]
        else:  # one more derivative
            values = k * (
                ratio(values[:, :-1], left_width[None, :])
                - ratio(values[:, 1:], right_width[None, :])
            )
    return values


def _bspline_margin(u: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Cubic B-spline basis (D, m) with knots at quantiles of ``u`` and its penalty (m, m).

    ``size - 4`` interior knots at equally spaced quantiles (fewer when values are tied,
    so ``m <= size``). The penalty is the integrated squared second derivative
    ``Omega_ij = int B_i''(x) B_j''(x) dx`` over [0, 1] (O'Sullivan penalised splines;
    Wand & Ormerod 2008, Aust N Z J Stat 50(2):179-201, from memory): its null space is
    the straight lines, so a linear effect is never shrunk. ``B''`` is piecewise linear,
    so Simpson's rule on each knot interval integrates the products exactly.
    """
    probabilities = np.linspace(0.0, 1.0, size - 2)[1:-1]
    interior = np.unique(np.quantile(u, probabilities))
    interior = interior[(interior > 0.0) & (interior < 1.0)]
    knots = np.concatenate([np.zeros(4), interior, np.ones(4)])
    m = knots.size - 4
    basis = bspline_matrix(u, knots)
    assert basis.shape[1] == m

    def second(x: np.ndarray) -> np.ndarray:
        return bspline_matrix(x, knots, derivative=2)

    edges = np.concatenate([[0.0], interior, [1.0]])
    left, right = edges[:-1], edges[1:]
    width = right - left
    # Evaluate just inside each interval so the piecewise-linear B'' takes that piece.
    eps = 1e-12
    at_left = second(left + eps)  # (n_intervals, m)
    at_mid = second((left + right) / 2)
    at_right = second(right - eps)
    weights = width[:, None, None] / 6.0
    outer = (
        at_left[:, :, None] * at_left[:, None, :]
        + 4.0 * at_mid[:, :, None] * at_mid[:, None, :]
        + at_right[:, :, None] * at_right[:, None, :]
    )
    return basis, (weights * outer).sum(axis=0)


def _design(method: str, u: np.ndarray, margin: int) -> tuple[np.ndarray, np.ndarray]:
    """Design matrix (D, M) and penalty (M, M) of the chosen smoother."""
    n_draws, p = u.shape
    margins = [_bspline_margin(u[:, j], margin) for j in range(p)]  # a loop over parameters
    bases = [basis for basis, _ in margins]
    penalties = [penalty for _, penalty in margins]
    if method in ("spline", "additive"):
        return np.concatenate(bases, axis=1), scipy.linalg.block_diag(*penalties)
    # Row-wise Kronecker product of the marginal bases; isotropic penalty
    # sum_j I x .. x Omega_j x .. x I.
    design = bases[0]
    for basis in bases[1:]:
        design = (design[:, :, None] * basis[:, None, :]).reshape(n_draws, -1)
    total = design.shape[1]
    penalty = np.zeros((total, total))
    for j in range(p):
        factors = [penalties[i] if i == j else np.eye(bases[i].shape[1]) for i in range(p)]
        term = factors[0]
        for factor in factors[1:]:
            term = np.kron(term, factor)
        penalty += term
    return design, penalty


@dataclass(frozen=True)
class _PenalisedFit:
    """A penalised fit of K' columns in the eigenbasis ``Q`` (D, M) of the smoother."""

    fitted: np.ndarray  # (D, K')
    edf: np.ndarray  # (K',)
    smoothing: np.ndarray  # (K',) lambda
    rss: np.ndarray  # (K',)
    at_limit: np.ndarray  # (K',) bool: lambda at the low end of the grid
    q: np.ndarray  # (D, M)
    shrink: np.ndarray  # (K', M) 1 / (1 + lambda s)
    b: np.ndarray  # (M, K') Q'y


def _fit_penalised(design: np.ndarray, penalty: np.ndarray, y: np.ndarray) -> _PenalisedFit:
    """Penalised least squares for every column of ``y`` with GCV-chosen smoothing."""
    n_draws, size = design.shape
    gram = design.T @ design
    ridge = _RIDGE * np.trace(gram) / size
    s, vectors = scipy.linalg.eigh(penalty, gram + ridge * np.eye(size))
    s = np.clip(s, 0.0, None)
    q = design @ vectors  # (D, M), nearly orthonormal columns
    b = q.T @ y  # (M, K')
    weight = (q**2).sum(axis=0)  # (M,) ~1; ~0 for directions held only by the ridge
    rss_unpenalised = ((y - q @ b) ** 2).sum(axis=0)  # (K',)

    positive = s[s > 1e-12 * s.max()] if s.max() > 0 else np.array([1.0])
    low, high = np.log10(1e-3 / positive.max()), np.log10(1e3 / positive.min())
    grid = 10.0 ** np.arange(low, high + _LAMBDA_STEP_DECADES, _LAMBDA_STEP_DECADES)
    shrink = 1.0 / (1.0 + grid[:, None] * s[None, :])  # (L, M)
    edf = shrink @ weight  # (L,)
    rss = rss_unpenalised[None, :] + ((1.0 - shrink) ** 2) @ (b**2)  # (L, K')
    gcv = n_draws * rss / (n_draws - edf[:, None]) ** 2
    # On ties (e.g. a strategy identical to the reference) take the smoothest fit.
    choice = grid.size - 1 - np.argmin(gcv[::-1], axis=0)  # (K',)
    chosen_shrink = shrink[choice]  # (K', M)
    fitted = q @ (chosen_shrink.T * b)
    rss_chosen = ((y - fitted) ** 2).sum(axis=0)
    return _PenalisedFit(
        fitted=fitted,
        edf=edf[choice],
        smoothing=grid[choice],
        rss=rss_chosen,
        at_limit=(choice == 0) & (gcv[0] < gcv[-1]),
        q=q,
        shrink=chosen_shrink,
        b=b,
    )


def _regression_error(
    fit: _PenalisedFit, residual_se: np.ndarray, samples: int, seed: int | None
) -> float:
    """Standard deviation of the EVPPI over draws from the fit's Bayesian posterior.

    In the eigenbasis the posterior of the coefficients is independent normal with mean
    ``shrink * b`` and variance ``sigma^2 * shrink`` (the Bayesian covariance
    ``sigma^2 (X'X + lambda Omega)^-1`` of a penalised spline); Strong et al. 2014
    sample it to give the EVPPI's regression error.
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    mean = (fit.shrink * fit.b.T).T  # (M, K')
    sd = residual_se[None, :] * np.sqrt(fit.shrink.T)  # (M, K')
    coefficients = mean[None] + sd[None] * rng.standard_normal((samples, *mean.shape))
    n_draws, n_inc = fit.fitted.shape
    chunk = max(1, _CHUNK_ELEMENTS // (n_draws * (n_inc + 1)))
    values = np.empty(samples)
    for start in range(0, samples, chunk):  # blocks of posterior samples bound the memory
        block = coefficients[start : start + chunk]
        fitted = np.einsum("dm,smk->sdk", fit.q, block)
        table = np.concatenate([np.zeros((*fitted.shape[:2], 1)), fitted], axis=2)
        values[start : start + chunk] = opportunity_loss(table)[0]
    return float(values.std(ddof=1))


def _fit_scipy_smoothing_spline(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """(D, K') fits by scipy's GCV smoothing spline; tied x values are averaged."""
    from scipy.interpolate import make_smoothing_spline  # this method only

    unique, inverse, counts = np.unique(x, return_inverse=True, return_counts=True)
    if unique.size < 5:
        raise ModelError(
            Problem(
                "covariates",
                f"'smoothing_spline' needs at least 5 distinct parameter values, got "
                f"{unique.size}; use method='spline'",
            )
        )
    sums = np.zeros((unique.size, y.shape[1]))
    np.add.at(sums, inverse, y)
    means = sums / counts[:, None]
    # One GCV fit per strategy column: each chooses its own smoothing (K is small).
    try:
        fits = [make_smoothing_spline(unique, means[:, k], w=counts) for k in range(y.shape[1])]
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise ModelError(
            Problem(
                "covariates",
                f"scipy's smoothing spline failed on this parameter ({exc}); use method='spline'",
            )
        ) from exc
    return np.stack([fit(x) for fit in fits], axis=1)


def _margin_size(method: str, p: int, n_draws: int, basis_size: int | None) -> int:
    """Basis functions per parameter: the largest the draws allow, or ``basis_size``."""
    tensor = method == "tensor"
    minimum = _MIN_TENSOR_MARGIN if tensor else _MIN_MARGIN
    cap = _MAX_MARGIN[p] if tensor else _MAX_MARGIN[1]
    sizes = np.arange(minimum, max(cap, basis_size or 0) + 1)
    coefficients = sizes**p if tensor else sizes * p
    fits = MIN_DRAWS_PER_COEFFICIENT * coefficients <= n_draws
    if basis_size is not None and basis_size < minimum:
        raise ModelError(
            Problem("basis_size", f"expected at least {minimum} basis functions, got {basis_size}")
        )
    size = (
        int(basis_size)
        if basis_size is not None
        else int(sizes[fits & (sizes <= cap)].max(initial=0))
    )
    if size == 0 or not fits[size - minimum]:
        size = max(size, minimum)
        need = MIN_DRAWS_PER_COEFFICIENT * (size**p if tensor else size * p)
        raise ModelError(
            Problem(
                "net_benefit",
                f"{n_draws} draws are too few for the {method!r} smoother over {p} "
                f"parameter(s) with {size} basis functions per parameter; expected at "
                f"least {need} draws ({MIN_DRAWS_PER_COEFFICIENT} per coefficient)",
            )
        )
    return size


def _resolve_method(method: str, p: int, n_draws: int) -> str:
    if method not in METHODS:
        raise ModelError(
            Problem("method", f"unknown EVPPI method {method!r}; expected one of {METHODS}")
        )
    if method == "auto":
        if p == 1:
            return "spline"
        tensor_ok = p <= 3 and n_draws >= MIN_DRAWS_PER_COEFFICIENT * _MIN_TENSOR_MARGIN**p
        return "tensor" if tensor_ok else "additive"
    if method in ("spline", "smoothing_spline") and p != 1:
        raise ModelError(
            Problem(
                "covariates",
                f"method {method!r} takes one parameter, got {p}; use 'additive' or 'tensor'",
            )
        )
    if method == "tensor" and p > 3:
        raise ModelError(
            Problem(
                "covariates",
                f"method 'tensor' takes 2 or 3 parameters, got {p}; use 'additive'",
            )
        )
    return method


# --- validation ----------------------------------------------------------------------


def _check_net_benefit(net_benefit: np.ndarray, *, min_strategies: int) -> np.ndarray:
    try:
        values = np.asarray(net_benefit, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ModelError(
            Problem("net_benefit", f"expected a (draws, strategies) array of numbers: {exc}")
        ) from exc
    if values.ndim != 2 or values.shape[0] < 1 or values.shape[1] < min_strategies:
        raise ModelError(
            Problem(
                "net_benefit",
                f"expected a 2-D (draws, strategies) array with at least 1 draw and "
                f"{min_strategies} strateg{'y' if min_strategies == 1 else 'ies'}, "
                f"got shape {values.shape}",
            )
        )
    check_finite("net_benefit", values)
    return values


def _check_covariates(covariates: np.ndarray, n_draws: int) -> np.ndarray:
    try:
        phi = np.asarray(covariates, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ModelError(
            Problem("covariates", f"expected a (draws,) or (draws, p) array of numbers: {exc}")
        ) from exc
    if phi.ndim == 1:
        phi = phi[:, None]
    if phi.ndim != 2 or phi.shape[0] != n_draws or phi.shape[1] < 1:
        raise ModelError(
            Problem(
                "covariates",
                f"expected shape ({n_draws},) or ({n_draws}, p) to match net_benefit's "
                f"{n_draws} draws, got {np.shape(covariates)}",
            )
        )
    check_finite("covariates", phi)
    return phi


def check_finite(
    name: str, values: np.ndarray, labels: tuple[str, ...] = ("draw", "column")
) -> None:
    """Raise a ModelError naming the first non-finite entry of ``values``.

    ``labels`` names each axis in the message, e.g. ``costs[draw 3, strategy 1]``.
    """
    bad = np.argwhere(~np.isfinite(values))
    if bad.size:
        first = tuple(int(i) for i in bad[0])
        place = ", ".join(f"{label} {i}" for label, i in zip(labels, first, strict=True))
        raise ModelError(
            Problem(
                f"{name}[{place}]",
                f"value {float(values[first])!r} is not finite ({len(bad)} such value(s)); "
                "expected finite numbers",
            )
        )
