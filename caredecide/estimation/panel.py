"""Continuous-time transition rates from irregular panel observations.

Maximum likelihood for a time-homogeneous Markov multi-state process observed at
irregular visits (Kalbfleisch & Lawless 1985, J Am Stat Assoc 80:863-871). The
generator ``Q`` (rates per year) has free entries on the *allowed* transitions; the
parameters are their logarithms, plus optionally one log hazard ratio acting on every
stage-to-stage rate while on treatment (death rates are not changed by treatment).
With ``P(t) = expm(t Q)``, each observation interval (see
:mod:`caredecide.estimation.records`) from state ``r`` at a visit contributes:

* next visit ``t`` years later in state ``s`` (alive, or recorded dead without an exact
  time): ``P_rs(t)`` (Kalbfleisch & Lawless 1985, eq. 2.1);
* exact death ``t`` years later: ``sum_k P_rk(t) q_k,dead`` - alive in some state ``k``
  just before ``t``, then dying from ``k`` (the exact-death contribution of Kay 1986,
  Biometrics 42:855-865, from memory). Summing over ``k`` allows progression unseen
  between the last visit and death;
* censored ``t`` years later (known alive, state unknown): ``sum_{k alive} P_rk(t)``.

Treatment is constant within an interval (it starts at visits), so each interval uses
``Q`` or the treated ``Q``. The log-likelihood is evaluated for a batch of parameter
vectors at once: each ``Q`` is diagonalised once (``Q = V diag(w) V^-1``), so
``P_rs(t) = sum_j V_rj e^{w_j t} (V^-1)_js`` costs O(S) per interval. When ``V`` is
ill-conditioned (near-equal eigenvalues) the whole batch falls back to the matrix
exponential (:func:`caredecide.conversions.generator_to_transition`).

Maximisation: L-BFGS-B on the log rates (bounded to [1e-8, 1e3] per year) with a
central-difference gradient. Standard errors: the inverse of the observed information,
a central finite-difference Hessian of the negative log-likelihood at the optimum on
the log scale with step ``h = 1e-3`` (truncation error ~ h^2/12 * |f''''| and rounding
error ~ 1e-16 * |NLL| / h^2, both below 1e-6 relative for NLL ~ 10^3; common practice).
Parameters stuck at a bound get no standard error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.optimize
import scipy.stats

from caredecide.conversions import generator_to_transition
from caredecide.errors import ModelError
from caredecide.estimation.records import CENSORED, DEATH, OBSERVED, CohortRecords

STRUCTURES = ("progressive", "forward", "any")
LOG_RATE_BOUNDS = (np.log(1e-8), np.log(1e3))
NEGLIGIBLE_LOG_RATE = np.log(1e-6)
"""Below 1e-6 per year a rate is taken as "no events seen" (flat likelihood): no se."""
LOG_HAZARD_RATIO_BOUNDS = (np.log(1e-3), np.log(1e3))
GRADIENT_STEP = 1e-6
HESSIAN_STEP = 1e-3
CONDITION_LIMIT = 1e8
"""Largest condition number of the eigenvector matrix before falling back to expm."""
BATCH_ELEMENTS = 2_000_000
"""Parameter vectors x intervals x states evaluated per chunk (memory bound)."""


def transition_structure(n_alive: int, structure: str = "progressive") -> np.ndarray:
    """Allowed transitions among ``n_alive`` ordered alive states plus death (last).

    Parameters
    ----------
    n_alive : int
        Number of alive states (in clinical order).
    structure : {"progressive", "forward", "any"}
        ``progressive``: ``i -> i + 1`` and ``i -> death``; ``forward``: ``i -> j`` for any
        later ``j`` and death; ``any``: every alive pair and death.

    Returns
    -------
    numpy.ndarray, shape (S, S) bool, S = n_alive + 1
        ``allowed[i, j]``; the death row is empty.
    """
    if structure not in STRUCTURES:
        raise ModelError(
            f"transition structure {structure!r} is unknown; expected one of {STRUCTURES}"
        )
    size = n_alive + 1
    row, column = np.indices((size, size))
    alive_pair = (row < n_alive) & (column < n_alive)
    if structure == "progressive":
        allowed = alive_pair & (column == row + 1)
    elif structure == "forward":
        allowed = alive_pair & (column > row)
    else:
        allowed = alive_pair & (column != row)
    allowed[:n_alive, n_alive] = True
    return allowed


@dataclass(frozen=True, eq=False)
class PanelEstimate:
    """Maximum-likelihood rates of a continuous-time multi-state model.

    Attributes
    ----------
    allowed : (S, S) bool
        Transitions with a free rate.
    log_parameters : (p,) float
        Log rates per year of the allowed transitions in row-major order, then the log
        hazard ratio of treatment on stage-to-stage rates (if estimated).
    covariance : (p, p) float
        Inverse observed information on the log scale (NaN rows/columns for parameters
        at a bound or when the information is not positive definite).
    """

    state_ids: tuple[str, ...]
    allowed: np.ndarray
    log_parameters: np.ndarray
    covariance: np.ndarray
    treatment_effect: bool
    log_likelihood: float
    converged: bool
    message: str
    n_patients: int
    n_intervals: int
    n_exact_deaths: int
    n_censored: int
    source: str
    structure: str = "progressive"

    @property
    def transitions(self) -> list[tuple[str, str]]:
        """(from, to) state ids of each rate, in parameter order."""
        rows, columns = np.nonzero(self.allowed)
        return [(self.state_ids[i], self.state_ids[j]) for i, j in zip(rows, columns, strict=True)]

    @property
    def n_rates(self) -> int:
        return int(self.allowed.sum())

    def rates(self) -> np.ndarray:
        """(m,) rates per year of the allowed transitions."""
        return np.exp(self.log_parameters[: self.n_rates])

    def hazard_ratio(self) -> float | None:
        """Estimated treatment hazard ratio on stage-to-stage rates (None if not estimated)."""
        return float(np.exp(self.log_parameters[-1])) if self.treatment_effect else None

    def standard_errors(self) -> np.ndarray:
        """(p,) standard errors of the log parameters (NaN where unavailable)."""
        return np.sqrt(np.diag(self.covariance))

    def confidence_intervals(self, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
        """(p,) lower and upper Wald limits on the natural scale: ``exp(theta +- z se)``."""
        z = scipy.stats.norm.ppf(0.5 + level / 2.0)
        se = self.standard_errors()
        with np.errstate(over="ignore"):
            return np.exp(self.log_parameters - z * se), np.exp(self.log_parameters + z * se)

    def generator(self, treated: bool = False) -> np.ndarray:
        """(S, S) generator matrix (rates per year; rows sum to 0)."""
        return _generators(self.log_parameters[None], self.allowed, self.treatment_effect)[
            0, int(treated)
        ]

    def transition_matrix(self, cycle_years: float = 1.0, treated: bool = False) -> np.ndarray:
        """(S, S) transition probabilities per cycle: ``expm(cycle_years * Q)``."""
        return generator_to_transition(self.generator(treated), cycle_years)

    def sample_log_parameters(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """(n, p) draws from the asymptotic normal of the log parameters.

        Each rate is then lognormal; correlations from the covariance are kept.
        Parameters without a standard error stay at their estimate; draws are kept
        within the bounds used in fitting.
        """
        known = np.isfinite(self.standard_errors())
        draws = np.tile(self.log_parameters, (n, 1))
        if known.any():
            cov = self.covariance[np.ix_(known, known)]
            draws[:, known] = rng.multivariate_normal(self.log_parameters[known], cov, size=n)
        lower, upper = np.array(
            [LOG_RATE_BOUNDS] * self.n_rates + [LOG_HAZARD_RATIO_BOUNDS] * self.treatment_effect
        ).T
        return np.clip(draws, lower, upper)

    def sample_transition_matrices(
        self, rng: np.random.Generator, n: int, cycle_years: float = 1.0, treated: bool = False
    ) -> np.ndarray:
        """(n, S, S) per-cycle transition matrices for probabilistic analysis."""
        generators = _generators(
            self.sample_log_parameters(rng, n), self.allowed, self.treatment_effect
        )
        return generator_to_transition(generators[:, int(treated)], cycle_years)

    def table(self, level: float = 0.95) -> pd.DataFrame:
        """One row per parameter: estimate, log-scale se and Wald interval."""
        low, high = self.confidence_intervals(level)
        names = [f"rate {a} -> {b}" for a, b in self.transitions]
        if self.treatment_effect:
            names.append("hazard ratio on treatment")
        return pd.DataFrame(
            {
                "parameter": names,
                "estimate": np.exp(self.log_parameters),
                "se_log": self.standard_errors(),
                "low": low,
                "high": high,
            }
        )


def _generators(theta: np.ndarray, allowed: np.ndarray, treatment_effect: bool) -> np.ndarray:
    """(B, 2, S, S) generators (untreated, treated) from (B, p) log parameters."""
    n_rates = int(allowed.sum())
    size = allowed.shape[0]
    rates = np.zeros((theta.shape[0], 2, size, size))
    rates[:, :, allowed] = np.exp(theta[:, None, :n_rates])
    if treatment_effect:
        stage_to_stage = allowed.copy()
        stage_to_stage[:, -1] = False
        rates[:, 1, stage_to_stage] *= np.exp(theta[:, n_rates, None])
    diagonal = np.arange(size)
    rates[:, :, diagonal, diagonal] = -rates.sum(axis=3)
    return rates


@dataclass(frozen=True, eq=False)
class _Intervals:
    """Likelihood inputs: group (0/1), start state, target column, interval length."""

    group: np.ndarray
    start: np.ndarray
    target: np.ndarray
    """End state for observed ends; S for an exact death; S + 1 for censoring."""
    years: np.ndarray


def _targets(generators: np.ndarray) -> np.ndarray:
    """(B, 2, S, S + 2) right-hand vectors: identity columns, death-rate column, alive sum."""
    size = generators.shape[-1]
    alive = np.ones(size)
    alive[-1] = 0.0
    batch = generators.shape[:2]
    return np.concatenate(
        [
            np.broadcast_to(np.eye(size), (*batch, size, size)),
            generators[..., :, -1:],
            np.broadcast_to(alive[:, None], (*batch, size, 1)),
        ],
        axis=-1,
    )


def interval_likelihoods(
    theta: np.ndarray,
    allowed: np.ndarray,
    treatment_effect: bool,
    intervals: _Intervals,
    *,
    method: str = "auto",
) -> np.ndarray:
    """(B, N) likelihood contribution of each interval for a batch of log parameters.

    Parameters
    ----------
    theta : (B, p) float
        Log rates (and log hazard ratio).
    method : {"auto", "eigen", "expm"}
        ``auto`` diagonalises ``Q`` and falls back to the matrix exponential when the
        eigenvectors are ill-conditioned; the others force one path (for tests).
    """
    generators = _generators(theta, allowed, treatment_effect)
    targets = np.swapaxes(_targets(generators), -1, -2)  # (B, 2, S + 2, S)
    g, start, target, years = intervals.group, intervals.start, intervals.target, intervals.years
    if method != "expm":
        eigenvalues, vectors = np.linalg.eig(generators)
        condition = np.linalg.cond(vectors)
        if method == "eigen" or np.all(condition < CONDITION_LIMIT):
            in_basis = np.swapaxes(np.linalg.solve(vectors, np.swapaxes(targets, -1, -2)), -1, -2)
            left = vectors[:, g, start, :]  # (B, N, S)
            right = in_basis[:, g, target, :]  # (B, N, S)
            growth = np.exp(eigenvalues[:, g, :] * years[None, :, None])
            return np.real(np.sum(left * growth * right, axis=-1))
    transition = generator_to_transition(generators[:, g], years)  # (B, N, S, S)
    rows = transition[:, np.arange(years.size), start, :]
    return np.sum(rows * targets[:, g, target, :], axis=-1)


def negative_log_likelihood(
    theta: np.ndarray, allowed: np.ndarray, treatment_effect: bool, intervals: _Intervals
) -> np.ndarray:
    """(B,) negative log-likelihood for (B, p) log parameters (chunked over B for memory)."""
    per_vector = max(1, intervals.years.size * allowed.shape[0])
    chunk = max(1, BATCH_ELEMENTS // per_vector)
    out = np.empty(theta.shape[0])
    for first in range(0, theta.shape[0], chunk):  # chunks of parameter vectors
        block = theta[first : first + chunk]
        likelihood = interval_likelihoods(block, allowed, treatment_effect, intervals)
        out[first : first + chunk] = -np.log(np.maximum(likelihood, 1e-300)).sum(axis=1)
    return out


def _reachable(allowed: np.ndarray) -> np.ndarray:
    """(S, S) bool: ``j`` can be reached from ``i`` in zero or more allowed steps."""
    reach = allowed | np.eye(allowed.shape[0], dtype=bool)
    for _ in range(int(np.ceil(np.log2(allowed.shape[0]))) + 1):  # squaring doubles path length
        reach = reach | ((reach.astype(int) @ reach.astype(int)) > 0)
    return reach


def _check_possible(records: CohortRecords, allowed: np.ndarray, structure: str) -> None:
    reach = _reachable(allowed)
    ends = np.where(records.end_kind == CENSORED, records.start_state, records.end_state)
    impossible = ~reach[records.start_state, ends]
    if impossible.any():
        first = int(np.flatnonzero(impossible)[0])
        start = records.state_ids[records.start_state[first]]
        end = records.state_ids[ends[first]]
        raise ModelError(
            f"observed transition {start} -> {end} (patient "
            f"{records.patient_ids[records.patient[first]]}; {int(impossible.sum())} such "
            f"intervals) is impossible under the {structure!r} transition structure; expected "
            f"one of {STRUCTURES} that allows it",
            file=records.source,
        )


def _starting_values(records: CohortRecords, allowed: np.ndarray) -> np.ndarray:
    """Crude rates: (events i -> j + 0.5) / (years of intervals starting in i)."""
    size = records.n_states
    moved = records.end_kind != CENSORED
    events = np.bincount(
        records.start_state[moved] * size + records.end_state[moved], minlength=size * size
    ).reshape(size, size)
    exposure = np.bincount(records.start_state, weights=records.years, minlength=size)
    crude = (events + 0.5) / np.maximum(exposure, 1e-9)[:, None]
    return np.log(np.clip(crude[allowed], 1e-6, 1e2))


def _gradient(function, theta: np.ndarray, step: float) -> np.ndarray:
    """Central-difference gradient, all 2p points in one batch."""
    shifts = step * np.eye(theta.size)
    values = function(np.concatenate([theta + shifts, theta - shifts]))
    return (values[: theta.size] - values[theta.size :]) / (2 * step)


def numerical_hessian(function, theta: np.ndarray, step: float = HESSIAN_STEP) -> np.ndarray:
    """(p, p) central finite-difference Hessian of a batched function at ``theta``.

    ``H_ii = (f(+e_i) - 2 f + f(-e_i)) / h^2``, ``H_ij = (f(++) - f(+-) - f(-+) + f(--)) / (4 h^2)``
    (common practice); all points are evaluated in one batch.
    """
    p = theta.size
    unit = step * np.eye(p)
    i, j = np.triu_indices(p, 1)
    points = np.concatenate(
        [
            theta[None],
            theta + unit,
            theta - unit,
            theta + unit[i] + unit[j],
            theta + unit[i] - unit[j],
            theta - unit[i] + unit[j],
            theta - unit[i] - unit[j],
        ]
    )
    values = function(points)
    center, plus, minus = values[0], values[1 : p + 1], values[p + 1 : 2 * p + 1]
    k = i.size
    pp, pm, mp, mm = (values[2 * p + 1 + n * k : 2 * p + 1 + (n + 1) * k] for n in range(4))
    hessian = np.diag((plus - 2 * center + minus) / step**2)
    hessian[i, j] = hessian[j, i] = (pp - pm - mp + mm) / (4 * step**2)
    return hessian


def estimate_panel(
    records: CohortRecords,
    *,
    structure: str = "progressive",
    allowed: np.ndarray | None = None,
    treatment_effect: bool | None = None,
    hessian_step: float = HESSIAN_STEP,
) -> PanelEstimate:
    """Maximum-likelihood transition rates from panel data (see the module docstring).

    Parameters
    ----------
    records : CohortRecords
        Observation intervals (any spacing).
    structure : {"progressive", "forward", "any"}
        Allowed transitions (see :func:`transition_structure`); ignored if ``allowed``.
    allowed : (S, S) bool, optional
        Explicit allowed transitions (death row empty).
    treatment_effect : bool, optional
        Estimate a hazard ratio on stage-to-stage rates for treated intervals; default:
        when any interval is treated. ``False`` pools treated and untreated intervals.
    hessian_step : float
        Finite-difference step on the log scale for the observed information.

    Returns
    -------
    PanelEstimate

    Raises
    ------
    ModelError
        Impossible observed transitions, a treatment effect without treated intervals,
        or no intervals.
    """
    size = records.n_states
    if allowed is None:
        allowed = transition_structure(size - 1, structure)
    else:
        allowed = np.asarray(allowed, dtype=bool)
        structure = "given"
        if allowed.shape != (size, size) or allowed[-1].any() or np.diag(allowed).any():
            raise ModelError(
                f"allowed transitions have shape {allowed.shape}; expected ({size}, {size}) "
                "with an empty death row and diagonal"
            )
    if records.n_intervals == 0:
        raise ModelError(
            "no observation intervals (each patient needs two visits, or a visit and a "
            "death/censoring time); expected at least one",
            file=records.source,
        )
    any_treated = bool(records.treated.any())
    if treatment_effect is None:
        treatment_effect = any_treated
    if treatment_effect and not any_treated:
        raise ModelError(
            "a treatment effect was requested but no interval is treated; expected some "
            "visits with treated = 1",
            file=records.source,
        )
    _check_possible(records, allowed, structure)

    target = np.where(
        records.end_kind == OBSERVED,
        records.end_state,
        np.where(records.end_kind == DEATH, size, size + 1),
    )
    intervals = _Intervals(
        group=(records.treated & treatment_effect).astype(int),
        start=records.start_state,
        target=target,
        years=records.years,
    )

    def objective(theta: np.ndarray) -> np.ndarray:
        return negative_log_likelihood(theta, allowed, treatment_effect, intervals)

    start = _starting_values(records, allowed)
    bounds = [LOG_RATE_BOUNDS] * start.size
    if treatment_effect:
        start = np.append(start, 0.0)
        bounds.append(LOG_HAZARD_RATIO_BOUNDS)
    result = scipy.optimize.minimize(
        lambda theta: float(objective(theta[None])[0]),
        start,
        jac=lambda theta: _gradient(objective, theta, GRADIENT_STEP),
        method="L-BFGS-B",
        bounds=bounds,
        options={"maxiter": 2000, "ftol": 1e-14, "gtol": 1e-7},
    )
    theta = result.x
    lower, upper = np.array(bounds).T
    free = (theta > np.maximum(lower + 1e-6, NEGLIGIBLE_LOG_RATE)) & (theta < upper - 1e-6)
    if treatment_effect:
        free[-1] = lower[-1] + 1e-6 < theta[-1] < upper[-1] - 1e-6
    covariance = np.full((theta.size, theta.size), np.nan)
    message = str(result.message)
    if free.any():
        hessian = numerical_hessian(objective, theta, hessian_step)[np.ix_(free, free)]
        if np.all(np.linalg.eigvalsh(hessian) > 0):
            covariance[np.ix_(free, free)] = np.linalg.inv(hessian)
        else:
            message += "; observed information not positive definite: no standard errors"
    if not free.all():
        message += (
            f"; {int((~free).sum())} parameter(s) at a bound (e.g. a rate with no events "
            "seen) have no standard error"
        )
    return PanelEstimate(
        state_ids=records.state_ids,
        allowed=allowed,
        log_parameters=theta,
        covariance=covariance,
        treatment_effect=bool(treatment_effect),
        log_likelihood=-float(result.fun),
        converged=bool(result.success),
        message=message,
        n_patients=int(np.unique(records.patient).size),
        n_intervals=records.n_intervals,
        n_exact_deaths=int((records.end_kind == DEATH).sum()),
        n_censored=int((records.end_kind == CENSORED).sum()),
        source=records.source,
        structure=structure,
    )
