"""Sums, means and SDs over the first axis, row by row, with the bits NumPy gives along a contiguous axis."""

from __future__ import annotations

import numpy as np

__all__ = ["mean_rows", "std_rows", "sum_rows"]

# NumPy sums a contiguous axis pairwise (numpy/_core/src/umath/loops_utils.h.src,
# ``pairwise_sum``): fewer than 8 values one after another, up to 128 values in 8 running
# partial sums combined as ((r0+r1)+(r2+r3))+((r4+r5)+(r6+r7)) plus the remainder one by one,
# and longer runs split in halves (a multiple of 8 first); the reduction then adds that to
# its identity 0.0. Reducing a first axis instead walks the rows one after another, which
# rounds differently, so a month-first kernel uses these to give bit for bit what a
# month-last one gives (tests/kernels/test_rowwise.py checks against NumPy itself).
_PAIRWISE_BLOCK = 128


def _pairwise(rows, start: int, n: int) -> np.ndarray:
    if n < 8:
        total = -0.0 + rows[start]
        for i in range(start + 1, start + n):
            total += rows[i]
        return total
    if n <= _PAIRWISE_BLOCK:
        partial = [rows[start + j] for j in range(8)]
        i = 8
        while i < n - n % 8:
            partial = [partial[j] + rows[start + i + j] for j in range(8)]
            i += 8
        total = ((partial[0] + partial[1]) + (partial[2] + partial[3])) + \
                ((partial[4] + partial[5]) + (partial[6] + partial[7]))
        for k in range(start + i, start + n):
            total += rows[k]
        return total
    half = n // 2
    half -= half % 8
    return _pairwise(rows, start, half) + _pairwise(rows, start + half, n - half)


def sum_rows(values: np.ndarray) -> np.ndarray:
    """Sum over the first axis, bit-identical to ``np.moveaxis(values, 0, -1).copy().sum(-1)``.

    Parameters
    ----------
    values : ndarray, shape (n, ...), floating point, n >= 1
        Each ``values[i]`` is one row (a month, a model); rows are added elementwise, so
        a C-ordered array is read as contiguous rows.

    Returns
    -------
    ndarray, shape (...)
    """
    return 0.0 + _pairwise(values, 0, values.shape[0])


def mean_rows(values: np.ndarray) -> np.ndarray:
    """Mean over the first axis, bit-identical to ``np.mean`` along a contiguous last axis."""
    return sum_rows(values) / values.shape[0]


def std_rows(values: np.ndarray, ddof: int = 0) -> np.ndarray:
    """Standard deviation over the first axis, bit-identical to ``np.std(..., ddof=ddof)``
    along a contiguous last axis (the same steps as NumPy's ``_var``: mean, squared
    deviations, their sum over ``n - ddof``, square root)."""
    n = values.shape[0]
    deviation = values - mean_rows(values)
    np.square(deviation, out=deviation)
    return np.sqrt(sum_rows(deviation) / max(n - ddof, 0))
