"""The numba loop that reads dense transitions into compressed sparse rows (imported only
through :func:`caredecide.solvers.kernels.sparse_kernels`).

``scipy.sparse.csr_array(dense)`` finds the non-zeros with ``numpy.nonzero`` (index arrays
of every non-zero, then a sort); two plain passes over the rows (count, then copy) read the
dense array at memory speed instead, and the first pass checks the row sums on the way.
"""

import numpy as np
from numba import njit


@njit(cache=True, nogil=True, fastmath={"reassoc", "contract"})
def csr_from_dense(P, block, checked, tolerance, bad):
    # P (K, S) C-contiguous rows; returns (indptr (K + 1,), indices, data) of its CSR form
    # with the column of row k shifted by (k // block) * S (block > 0: a block-diagonal
    # matrix of K / block blocks of S columns; block = 0: no shift). Rows with checked[k]
    # must sum to 1 within the tolerance (the compiled-model check, done while reading):
    # the first that does not goes in bad[0] (left as is when all do). The row sums may be
    # reassociated (SIMD lanes), so they differ from numpy's in the last bits.
    K, S = P.shape
    indptr = np.empty(K + 1, dtype=np.int64)
    indptr[0] = 0
    for k in range(K):
        count = 0
        total = 0.0
        for j in range(S):
            x = P[k, j]
            total += x
            if x != 0.0:
                count += 1
        if checked[k] and not abs(total - 1.0) <= tolerance and bad[0] < 0:
            bad[0] = k
        indptr[k + 1] = indptr[k] + count
    indices = np.empty(indptr[K], dtype=np.int64)
    data = np.empty(indptr[K])
    for k in range(K):
        shift = (k // block) * S if block > 0 else 0
        i = indptr[k]
        for j in range(S):
            x = P[k, j]
            if x != 0.0:
                indices[i] = j + shift
                data[i] = x
                i += 1
    return indptr, indices, data
