"""Brent's method for many brackets at once, one batched function evaluation per step.

Brent's zero finder (Brent 1973, *Algorithms for Minimization Without Derivatives*,
Prentice-Hall, ch. 4) keeps a bracket ``[x_cur, x_blk]`` with ``f`` of opposite signs and
at each step tries inverse quadratic interpolation (or the secant step when only two
points are distinct), falling back to bisection when the trial step is not short
enough. Each step needs exactly ONE new value of ``f``.

Here every bracket carries its own state in arrays; one step advances all unfinished
brackets and asks ``f`` for all of their new points in one call. For the decision
thresholds that call is one batch of parameter sets compiled and solved by the common
core, so ``n`` brackets cost about as many batched solves as the slowest bracket needs
steps - not ``n`` times as many single solves.

The step rules, tolerances and stopping test follow ``scipy.optimize.brentq`` (its C
implementation of Brent's method) operation for operation, so for the same function
values this returns the same root after the same number of iterations
(tests/test_sensitivity_brent.py checks roots and iteration counts against
``scipy.optimize.brentq``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

BatchFunction = Callable[[np.ndarray, np.ndarray], np.ndarray]
"""``f(x (m,), index (m,) int) -> (m,)``: the function of bracket ``index[j]`` at ``x[j]``."""

RTOL_MIN = 4 * np.finfo(float).eps
"""Smallest relative tolerance accepted (as in ``scipy.optimize.brentq``)."""


@dataclass(frozen=True)
class BrentResult:
    """Roots of many brackets (arrays of shape (n,)).

    Attributes
    ----------
    root : (n,) float
        The root estimate (for a bracket that did not converge: the last iterate).
    f_root : (n,) float
        ``f`` at ``root``.
    converged : (n,) bool
        Stopped by the tolerance (or an exact zero), not by ``maxiter``.
    iterations : (n,) int
        Steps taken, counted as ``scipy.optimize.brentq`` counts them.
    function_calls : (n,) int
        Values of ``f`` used, the two bracket ends included.
    """

    root: np.ndarray
    f_root: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    function_calls: np.ndarray


def brent_roots(
    f: BatchFunction,
    x_low: np.ndarray,
    x_high: np.ndarray,
    f_low: np.ndarray,
    f_high: np.ndarray,
    *,
    xtol: float = 2e-12,
    rtol: float = RTOL_MIN,
    maxiter: int = 100,
    callback: Callable[[int, int], None] | None = None,
) -> BrentResult:
    """Find a root of ``f_k`` in each bracket ``[x_low[k], x_high[k]]`` by Brent's method.

    Parameters
    ----------
    f : callable ``f(x, index) -> values``
        Evaluates the functions of brackets ``index`` (int array) at ``x``, all in one call.
    x_low, x_high : (n,) float
        Bracket ends (any order).
    f_low, f_high : (n,) float
        The function values at the ends, already known (e.g. from a grid): of opposite
        signs or zero. They are not recomputed.
    xtol, rtol : float
        Stop when the bracket half-width is below ``(xtol + rtol |x|) / 2``, as in
        ``scipy.optimize.brentq`` (``xtol > 0``, ``rtol >= 4 eps``).
    maxiter : int
        Most steps per bracket.
    callback : callable ``(finished, total)``, optional
        Called after every step with the number of brackets finished.

    Returns
    -------
    BrentResult

    Raises
    ------
    ValueError
        A tolerance out of range, arrays of different shapes, or a bracket whose end
        values have the same sign (the message names the first such bracket).
    """
    if not xtol > 0:
        raise ValueError(f"xtol = {xtol!r} is not allowed; expected > 0")
    if not rtol >= RTOL_MIN:
        raise ValueError(f"rtol = {rtol!r} is not allowed; expected >= {RTOL_MIN:g} (4 eps)")
    xpre, xcur, fpre, fcur = (
        np.array(a, dtype=float, copy=True).reshape(-1) for a in (x_low, x_high, f_low, f_high)
    )
    n = xpre.size
    if not (xcur.size == fpre.size == fcur.size == n):
        raise ValueError(
            "x_low, x_high, f_low and f_high must have the same length, got "
            f"{n}, {xcur.size}, {fpre.size}, {fcur.size}"
        )
    same_sign = (fpre != 0) & (fcur != 0) & (np.signbit(fpre) == np.signbit(fcur))
    if same_sign.any():
        k = int(np.flatnonzero(same_sign)[0])
        raise ValueError(
            f"bracket {k} [{float(xpre[k])!r}, {float(xcur[k])!r}] has f = "
            f"{float(fpre[k])!r} and {float(fcur[k])!r}; "
            "expected values of opposite signs"
        )
    root = np.where(fpre == 0, xpre, xcur)
    f_root = np.where(fpre == 0, fpre, fcur)
    converged = (fpre == 0) | (fcur == 0)
    iterations = np.zeros(n, dtype=int)
    calls = np.full(n, 2, dtype=int)
    xblk = np.zeros(n)
    fblk = np.zeros(n)
    spre = np.zeros(n)
    scur = np.zeros(n)
    active = ~converged
    for _ in range(maxiter):
        if not active.any():
            break
        a = active
        iterations[a] += 1
        # A sign change between the last two points: the older one becomes the far end.
        flip = a & (fpre != 0) & (fcur != 0) & (np.signbit(fpre) != np.signbit(fcur))
        xblk = np.where(flip, xpre, xblk)
        fblk = np.where(flip, fpre, fblk)
        spre = np.where(flip, xcur - xpre, spre)
        scur = np.where(flip, xcur - xpre, scur)
        # Keep the best point (smallest |f|) as the current one.
        swap = a & (np.abs(fblk) < np.abs(fcur))
        xpre, xcur, xblk = (
            np.where(swap, xcur, xpre),
            np.where(swap, xblk, xcur),
            np.where(swap, xcur, xblk),
        )
        fpre, fcur, fblk = (
            np.where(swap, fcur, fpre),
            np.where(swap, fblk, fcur),
            np.where(swap, fcur, fblk),
        )
        delta = (xtol + rtol * np.abs(xcur)) / 2
        sbis = (xblk - xcur) / 2
        stop = a & ((fcur == 0) | (np.abs(sbis) < delta))
        root = np.where(stop, xcur, root)
        f_root = np.where(stop, fcur, f_root)
        converged |= stop
        a = a & ~stop
        active = a
        if not a.any():
            break
        # Trial step: secant with two distinct points, inverse quadratic with three.
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            secant = -fcur * (xcur - xpre) / (fcur - fpre)
            dpre = (fpre - fcur) / (xpre - xcur)
            dblk = (fblk - fcur) / (xblk - xcur)
            quadratic = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            trial = np.where(xpre == xblk, secant, quadratic)
            interpolate = (np.abs(spre) > delta) & (np.abs(fcur) < np.abs(fpre))
            short = 2 * np.abs(trial) < np.minimum(np.abs(spre), 3 * np.abs(sbis) - delta)
        good = interpolate & short
        spre = np.where(a, np.where(good, scur, sbis), spre)
        scur = np.where(a, np.where(good, trial, sbis), scur)
        xpre = np.where(a, xcur, xpre)
        fpre = np.where(a, fcur, fpre)
        step = np.where(np.abs(scur) > delta, scur, np.where(sbis > 0, delta, -delta))
        xcur = np.where(a, xcur + step, xcur)
        index = np.flatnonzero(a)
        fcur[index] = np.asarray(f(xcur[index], index), dtype=float).reshape(-1)
        calls[index] += 1
        if callback is not None:
            callback(int(n - a.sum()), n)
    # Brackets still open after maxiter: report the last iterate, not converged.
    root = np.where(active, xcur, root)
    f_root = np.where(active, fcur, f_root)
    return BrentResult(
        root=root,
        f_root=f_root,
        converged=converged,
        iterations=iterations,
        function_calls=calls,
    )
