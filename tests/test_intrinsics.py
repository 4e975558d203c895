"""The low-level helpers of the compiled loops: borrowed views and prefetch hints."""

import numpy as np
import pytest
from numba import njit

from caredecide.solvers._intrinsics import borrowed, prefetch


@njit
def _scaled_sum(arrays):
    # Borrow a nested tuple, write through one view and read through the others.
    matrix, flag, (vector, counts) = borrowed(arrays)
    total = 0.0
    for i in range(matrix.shape[0]):
        for j in range(matrix.shape[1]):
            matrix[i, j] *= 2.0
            total += matrix[i, j] * vector[j]
    counts[0] += 1
    return total if flag else -total


@njit
def _hinted_sum(array):
    # Prefetch every line of each next row (and past the end) while summing.
    total = 0.0
    for d in range(array.shape[0]):
        for k in range(0, 2 * array.shape[1] + 64, 8):
            prefetch(array, d + 1, k)
        for k in range(array.shape[1]):
            total += array[d, k]
    return total


def test_borrowed_views_read_and_write_the_same_data_as_the_arrays():
    # Expected by hand: the matrix doubled in place, then its rows dotted with the vector.
    matrix = np.array([[1.0, 2.0], [3.0, 4.0]])
    vector = np.array([10.0, 100.0])
    counts = np.zeros(1, dtype=np.int64)
    total = _scaled_sum((matrix, True, (vector, counts)))
    np.testing.assert_array_equal(matrix, [[2.0, 4.0], [6.0, 8.0]])
    assert total == 2 * 10 + 4 * 100 + 6 * 10 + 8 * 100
    assert counts[0] == 1
    assert _scaled_sum((matrix, False, (vector, counts))) == -(
        4 * 10 + 8 * 100 + 12 * 10 + 16 * 100
    )
    assert counts[0] == 2


def test_prefetch_hints_change_no_result_even_past_the_end():
    rng = np.random.default_rng(5)
    array = rng.random((50, 37))
    assert _hinted_sum(array) == pytest.approx(array.sum(), rel=1e-12)
