"""Row-by-row sums, means and SDs against NumPy's own along a contiguous last axis, bit for bit."""

import numpy as np
import pytest

from envelope.kernels.rowwise import mean_rows, std_rows, sum_rows


def _rows(n, rng):
    """(n, 500) values over ten orders of magnitude, with NaN, -inf and signed zeros."""
    values = rng.normal(size=(n, 500)) * 10.0 ** rng.uniform(-5, 5, size=(n, 500))
    values[rng.random(values.shape) < 0.01] = np.nan
    values[rng.random(values.shape) < 0.01] = -np.inf
    values[rng.random(values.shape) < 0.02] = -0.0
    values[:, :3] = -0.0  # columns of negative zeros only: NumPy's sum gives +0.0
    return values


def _bits(a):
    return np.asarray(a, dtype=np.float64).view(np.int64)


# Every branch of the pairwise order: under 8 rows, 8..128 (with and without a remainder),
# and the halving beyond 128.
@pytest.mark.parametrize("n", [1, 2, 3, 6, 7, 8, 9, 12, 15, 16, 17, 24, 127, 128, 129, 300])
def test_bit_identical_to_numpy_along_a_contiguous_axis(n):
    # Source: NumPy itself (np.sum / np.mean / np.std over the last axis of a C-ordered copy).
    rows = _rows(n, np.random.default_rng(n))
    cells_last = np.ascontiguousarray(rows.T)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.testing.assert_array_equal(_bits(sum_rows(rows)), _bits(cells_last.sum(axis=-1)))
        np.testing.assert_array_equal(_bits(mean_rows(rows)), _bits(cells_last.mean(axis=-1)))
        for ddof in (0, 1):
            if n > ddof:
                np.testing.assert_array_equal(_bits(std_rows(rows, ddof)), _bits(cells_last.std(axis=-1, ddof=ddof)))


def test_order_differs_from_walking_the_rows():
    # Analytic (IEEE 754 doubles, spacing 2 at 1e16, ties to even): added one at a time each
    # + 1 is a tie that rounds back to 1e16; in the pairwise order (1e16 + 1) + (1 + 1) and
    # ((1 + 1) + (1 + 1)) reach 1e16 + 6, and the four remaining ones end at 1e16 + 8. So the
    # checks above tell the two orders apart.
    rows = np.array([[1e16]] + [[1.0]] * 11)
    one_by_one = rows[0].copy()
    for r in rows[1:]:
        one_by_one = one_by_one + r
    assert one_by_one[0] == 1e16
    assert sum_rows(rows)[0] == rows[:, 0].sum() == 1e16 + 8


def test_scalars_per_row_and_the_input_left_alone():
    # Analytic: 0 + 1 + ... + 11 = 66, mean 5.5, population SD sqrt(143 / 12).
    months = np.arange(12.0)
    kept = months.copy()
    assert sum_rows(months) == 66.0 and mean_rows(months) == 5.5
    assert std_rows(months) == pytest.approx(np.sqrt(143 / 12), rel=1e-15)
    np.testing.assert_array_equal(months, kept)
