"""Compiled loops for the solvers' inner work (numba), with the numpy path as fallback.

Each kernel walks one draw at a time through its own transition rows, so a draw's arrays
are read once, in order, while they sit in cache; the reward, the expectation and the
greedy choice are fused in one pass and a policy's transition matrix is never built (its
rows are gathered as they are used). The arithmetic follows the numpy expressions of
:mod:`caredecide.solvers.bellman` term by term, in the same order.

The kernels are compiled on first use and cached on disk (``cache=True``), so later
processes load them instead of compiling. :func:`available` is False when numba cannot
be imported (or ``CAREDECIDE_KERNELS=numpy`` is set); callers then take the numpy path.
A benchmark (``benchmarks/bench_kernels.py``) shows the gain over the best numpy version.
"""

from __future__ import annotations

from functools import cache

from caredecide.jit import available

__all__ = ["available", "kernels", "sparse_kernels", "stationary_kernels"]


@cache
def kernels():
    """The compiled kernels module (compiling or loading them on first call)."""
    from caredecide.solvers import _loops

    return _loops


@cache
def stationary_kernels():
    """The compiled loops of the infinite-horizon solvers (compiling or loading them)."""
    from caredecide.solvers import _stationary_loops

    return _stationary_loops


@cache
def sparse_kernels():
    """The compiled loop that reads dense transitions into sparse rows."""
    from caredecide.solvers import _sparse_loops

    return _sparse_loops
