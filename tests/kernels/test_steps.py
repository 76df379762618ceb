"""The bucketed step-function lookup against numpy.searchsorted, on ties, float neighbours, ±inf and NaN."""

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.steps import above, at_least, step_index


def _hostile(pivots, dtype, rng):
    """Values on, just beside and between the pivots, far outside them, ±inf and NaN."""
    p = pivots.astype(dtype)
    up, down = np.nextafter(p, dtype(np.inf)), np.nextafter(p, dtype(-np.inf))
    spread = rng.normal(scale=3 * (np.abs(p).max() + 1), size=3000).astype(dtype)
    smooth = np.sort(rng.uniform(p.min() - 1, p.max() + 1, 2000)).astype(dtype)  # neighbours close, as on a grid
    special = np.array([np.inf, -np.inf, np.nan, 0.0, -0.0, np.finfo(dtype).max, -np.finfo(dtype).max,
                        np.finfo(dtype).tiny / 4], dtype=dtype)
    return np.r_[p, up, down, spread, smooth, smooth[::-1], special]


def _pivot_sets(rng):
    return {
        "rounded normal (ties)": rng.normal(size=400).round(2),
        "lattice": np.arange(-50.0, 50.0, 0.01),
        "clustered": np.r_[rng.normal(size=100), 1e-7 * np.arange(40), [1e-300, -1e-300, 0.0]],
        "continuous, skewed": rng.lognormal(0, 2, 5000),
        "one far outlier": np.r_[rng.normal(size=2000), 1e30],
        "single": np.array([2.5]),
        "huge range": np.array([-1e30, -1.0, 0.0, 3.0, 1e30]),
    }


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("points", [False, True])
def test_event_count_equals_searchsorted(dtype, points):
    # Source: numpy.searchsorted (reference library): #(pivots <= x) is side="right",
    # #(pivots < x) side="left"; NaN counts no event by this module's convention
    rng = np.random.default_rng(8)
    for name, raw in _pivot_sets(rng).items():
        pivots = np.unique(raw.astype(dtype))
        index = step_index(raw, dtype, points=points)
        np.testing.assert_array_equal(index.pivots, pivots)
        x = _hostile(pivots, dtype, rng)
        expected = np.searchsorted(pivots, x, side="right")
        if points:
            expected = expected + np.searchsorted(pivots, x, side="left")
        expected[np.isnan(x)] = 0
        np.testing.assert_array_equal(index.events(x), expected, err_msg=name)


def test_crowded_buckets_are_searched():
    # Source: numpy.searchsorted; pivots one float apart cannot be split by buckets
    base = np.float32(1.0)
    pivots = np.r_[base, np.nextafter(base, np.float32(2)), np.float32(1000.0), np.float32(-1000.0)]
    index = step_index(pivots, np.float32, points=True, max_buckets=64)
    assert index.any_crowded
    p = np.sort(pivots)
    x = np.r_[p, np.nextafter(p, np.float32(np.inf)), np.nextafter(p, np.float32(-np.inf)), np.float32(1.5)]
    np.testing.assert_array_equal(index.events(x), np.searchsorted(p, x, "right") + np.searchsorted(p, x, "left"))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_above_and_at_least_are_exact_cut_points(dtype):
    # Analytic: for every x of the dtype, x > v iff x >= above(v) and x >= v iff x >= at_least(v)
    # (checked by comparing in float64, where both sides are exact)
    rng = np.random.default_rng(3)
    v = np.r_[rng.normal(size=200), rng.normal(size=50).astype(np.float32), [0.0, -0.0, 1e39, -1e39, 1e-50]]
    with np.errstate(over="ignore"):  # ±1e39 is beyond float32
        near = v.astype(dtype)
    x = np.r_[rng.normal(size=500).astype(dtype), near, np.nextafter(near, dtype(np.inf)),
              np.nextafter(near, dtype(-np.inf))]
    x = x[np.isfinite(x)]
    a, b = above(v, dtype), at_least(v, dtype)
    assert a.dtype == dtype and b.dtype == dtype
    x64 = x.astype(np.float64)[:, None]
    np.testing.assert_array_equal(x64 > v, x[:, None] >= a)
    np.testing.assert_array_equal(x64 >= v, x[:, None] >= b)


def test_bad_input():
    # Common practice, no source: NaN pivots and integer dtypes are refused with the parameter named
    with pytest.raises(InputError, match="pivots: NaN"):
        step_index([1.0, np.nan], np.float32)
    with pytest.raises(InputError, match="dtype: int32"):
        step_index([1.0], np.int32)
    with pytest.raises(InputError, match="table: 2 entries; expected 4"):
        step_index([1.0, 2.0, 3.0], np.float64).expand([0, 1], -1)
