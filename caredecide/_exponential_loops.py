"""Compiled loop behind :func:`caredecide.conversions._pade_exponential` (numba).

Imported only when :func:`caredecide.jit.available`; compiled on first use and cached on
disk. One matrix at a time, all in registers and cache: the same steps as the batched
numpy version (Higham 2005, SIAM J Matrix Anal Appl 26(4):1179-1193, Algorithm 2.3), the
same degree and squarings per matrix, and an LU solve with partial pivoting.
"""

import numpy as np
from numba import njit


@njit(cache=True, nogil=True, inline="always")
def _product(X, Y, out):
    S = X.shape[0]
    for i in range(S):
        for j in range(S):
            out[i, j] = 0.0
        for k in range(S):
            x = X[i, k]
            if x != 0.0:
                for j in range(S):
                    out[i, j] += x * Y[k, j]


@njit(cache=True, nogil=True, inline="always")
def _solve_in_place(M, B):
    # Gaussian elimination with partial pivoting: B <- M^-1 B (M is destroyed).
    S = M.shape[0]
    for c in range(S):
        pivot = c
        for r in range(c + 1, S):
            if abs(M[r, c]) > abs(M[pivot, c]):
                pivot = r
        if pivot != c:
            for j in range(S):
                M[c, j], M[pivot, j] = M[pivot, j], M[c, j]
                B[c, j], B[pivot, j] = B[pivot, j], B[c, j]
        for r in range(c + 1, S):
            f = M[r, c] / M[c, c]
            if f != 0.0:
                for j in range(c, S):
                    M[r, j] -= f * M[c, j]
                for j in range(S):
                    B[r, j] -= f * B[c, j]
    for c in range(S - 1, -1, -1):
        for j in range(S):
            B[c, j] /= M[c, c]
        for r in range(c):
            f = M[r, c]
            if f != 0.0:
                for j in range(S):
                    B[r, j] -= f * B[c, j]


@njit(cache=True, nogil=True)
def pade_exponential(A, unreachable, theta, degrees, coefficients, round_off, out, lost):
    # A (N, S, S) generators x period; unreachable (N, S, S) bool; theta (5,) bounds;
    # degrees (5,) ints; coefficients (5, 14) b_0..b_m per degree. Out: expm (N, S, S),
    # clipped to [0, 1] with unreachable entries 0; lost (N,) True where the result missed
    # the round-off tolerance before clipping (the caller recomputes those).
    N, S = A.shape[0], A.shape[1]
    X = np.empty((S, S))
    powers = np.empty((7, S, S))  # powers[k // 2] = X^k, k = 2, 4, ..., 12
    odd = np.empty((S, S))
    even = np.empty((S, S))
    inner = np.empty((S, S))
    U = np.empty((S, S))
    R = np.empty((S, S))
    work = np.empty((S, S))
    for n in range(N):
        norm = 0.0
        for i in range(S):
            norm = max(norm, -2.0 * A[n, i, i])
        position = 0
        while position < 4 and theta[position] < norm:
            position += 1
        squarings = 0
        if position == 4 and norm > theta[4]:
            squarings = max(int(np.ceil(np.log2(norm / theta[4]))), 0)
        scale = 2.0**-squarings
        for i in range(S):
            for j in range(S):
                X[i, j] = A[n, i, j] * scale
        m = degrees[position]
        b = coefficients[position]
        _product(X, X, powers[1])
        if m == 13:
            _product(powers[1], powers[1], powers[2])
            _product(powers[2], powers[1], powers[3])
            A2, A4, A6 = powers[1], powers[2], powers[3]
            for i in range(S):
                for j in range(S):
                    inner[i, j] = b[13] * A6[i, j] + b[11] * A4[i, j] + b[9] * A2[i, j]
            _product(A6, inner, odd)
            for i in range(S):
                for j in range(S):
                    odd[i, j] = odd[i, j] + b[7] * A6[i, j] + b[5] * A4[i, j] + b[3] * A2[i, j]
                    inner[i, j] = b[12] * A6[i, j] + b[10] * A4[i, j] + b[8] * A2[i, j]
            _product(A6, inner, even)
            for i in range(S):
                for j in range(S):
                    even[i, j] = even[i, j] + b[6] * A6[i, j] + b[4] * A4[i, j] + b[2] * A2[i, j]
        else:
            for k in range(4, m, 2):
                _product(powers[k // 2 - 1], powers[1], powers[k // 2])
            for i in range(S):
                for j in range(S):
                    o = 0.0
                    e = 0.0
                    for k in range(2, m, 2):
                        o += b[k + 1] * powers[k // 2, i, j]
                        e += b[k] * powers[k // 2, i, j]
                    odd[i, j] = o
                    even[i, j] = e
        for i in range(S):
            odd[i, i] += b[1]
            even[i, i] += b[0]
        _product(X, odd, U)
        for i in range(S):
            for j in range(S):
                work[i, j] = even[i, j] - U[i, j]
                R[i, j] = even[i, j] + U[i, j]
        _solve_in_place(work, R)
        for _ in range(squarings):
            _product(R, R, work)
            R[:, :] = work
        low = 0.0
        off = 0.0
        for i in range(S):
            total = 0.0
            for j in range(S):
                if unreachable[n, i, j]:
                    R[i, j] = 0.0
                low = min(low, R[i, j])
                total += R[i, j]
            off = max(off, abs(total - 1.0))
        lost[n] = low < -round_off or off > round_off
        for i in range(S):
            for j in range(S):
                out[n, i, j] = min(max(R[i, j], 0.0), 1.0)
