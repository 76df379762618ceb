"""MESS and most-dissimilar variable on the worked example of REFERENCES item 4 and a slow reference."""

import json

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.mess import MessReference, mess, reference_from_training

REF = np.column_stack([np.arange(1.0, 11.0), np.arange(10.0, 101.0, 10.0)])


@pytest.mark.parametrize("v1,s1", [
    # Source: REFERENCES item 4 (COMPUTED from Elith, Kearney & Phillips 2010): v1 -> S_1, reference {1..10}
    (0, -100 / 9), (1, 0.0), (3.5, 60.0), (5.5, 100.0), (7.5, 60.0), (10, 20.0), (10.5, -50 / 9), (12, -200 / 9),
])
def test_single_variable_table(v1, s1):
    ref = reference_from_training(REF[:, :1])
    values, index = mess(np.array([[v1]]), ref)
    assert values[0] == pytest.approx(s1, abs=1e-9)
    assert index[0] == 0


def test_two_variable_points_and_most_dissimilar():
    # Source: REFERENCES item 4 — (v1, v2) -> MESS, MoD.
    ref = reference_from_training(REF)
    pts = np.array([[3.5, 55], [12, 55], [5.5, 55], [7.5, 95], [0, 200]])
    values, index = mess(pts, ref)
    np.testing.assert_allclose(values, [60, -200 / 9, 100, 20, -1000 / 9], atol=1e-9)
    assert index[[0, 1, 3, 4]].tolist() == [0, 0, 1, 1]


def test_discontinuity_at_the_maximum():
    # Source: REFERENCES item 4 — f uses "<", so p = max gives 20 while p = max + eps is slightly negative.
    ref = reference_from_training(REF[:, :1])
    values, _ = mess(np.array([[10.0], [10.0 + 1e-9]]), ref)
    assert values[0] == pytest.approx(20.0, abs=1e-9)
    assert -1e-6 < values[1] < 0


def test_ties_at_the_extremes():
    # From memory (Elith et al. 2010 formula, f = % strictly smaller): a repeated maximum keeps
    # f = 100 * (n - repeats) / n at p = max; at p = min f = 0 and S = 0.
    ref = reference_from_training(np.array([1.0, 1.0, 2.0, 3.0, 3.0, 3.0])[:, None])
    values, _ = mess(np.array([[3.0], [1.0]]), ref)
    assert values[0] == pytest.approx(2 * (100 - 50), abs=1e-9)
    assert values[1] == pytest.approx(0.0, abs=1e-12)


def test_nan_rows():
    # Common practice, no source: a cell with any missing variable has no MESS and index -1.
    ref = reference_from_training(np.vstack([REF, [np.nan, 5.0]]))  # the NaN row is dropped
    assert ref.n_source == 10
    values, index = mess(np.array([[np.nan, 50.0], [5.5, np.nan], [5.5, 55.0]]), ref)
    assert np.isnan(values[:2]).all() and index[:2].tolist() == [-1, -1]
    assert values[2] == pytest.approx(100.0)


def _slow_mess(X, R):
    # Obvious reference: the piecewise formula of Elith et al. (2010) written out per cell.
    out = []
    for row in X:
        s = []
        for i, p in enumerate(row):
            r = R[:, i]
            lo, hi = r.min(), r.max()
            f = 100.0 * np.sum(r < p) / r.size
            if f == 0:
                s.append(100 * (p - lo) / (hi - lo))
            elif f <= 50:
                s.append(2 * f)
            elif f < 100:
                s.append(2 * (100 - f))
            else:
                s.append(100 * (hi - p) / (hi - lo))
        out.append((min(s), int(np.argmin(s))))
    return np.array([o[0] for o in out]), np.array([o[1] for o in out])


def test_vectorised_matches_slow_reference():
    # Source: the formula of REFERENCES item 4, implemented cell by cell.
    rng = np.random.default_rng(3)
    R = rng.normal(size=(500, 3)).round(1)
    X = rng.normal(scale=1.6, size=(400, 3)).round(1)
    values, index = mess(X, reference_from_training(R))
    slow_values, slow_index = _slow_mess(X, R)
    np.testing.assert_allclose(values, slow_values, atol=1e-9)
    np.testing.assert_array_equal(index, slow_index)


def test_thinned_reference_keeps_extremes_and_is_close():
    # Common practice, no source: order statistics at evenly spaced ranks shift f by at most ~100/max_values.
    rng = np.random.default_rng(4)
    R = rng.normal(size=(50_000, 2))
    X = rng.normal(scale=1.3, size=(2000, 2))
    full = reference_from_training(R, max_values=100_000)
    thin = reference_from_training(R, max_values=1000)
    assert thin.values.shape == (1000, 2)
    np.testing.assert_array_equal(thin.values[[0, -1]], full.values[[0, -1]])
    inside = np.all((X > R.min(0)) & (X < R.max(0)), axis=1)
    diff = np.abs(mess(X, thin)[0] - mess(X, full)[0])[inside]
    assert diff.max() <= 2 * 100 / 1000 + 1e-9


def test_round_trip_through_json():
    # Common practice, no source: the model-file form gives identical MESS values.
    ref = reference_from_training(REF)
    back = MessReference.from_dict(json.loads(json.dumps(ref.to_dict())))
    X = np.array([[3.5, 55], [12, 55], [0, 200]])
    np.testing.assert_array_equal(mess(X, back)[0], mess(X, ref)[0])
    assert back.percentiles.shape == ref.percentiles.shape


def test_bad_input():
    # Common practice, no source: wrong width, all-NaN reference and a broken stored reference are refused.
    ref = reference_from_training(REF)
    with pytest.raises(InputError, match=r"X: shape \(2, 3\)"):
        mess(np.zeros((2, 3)), ref)
    with pytest.raises(InputError, match="no complete rows"):
        reference_from_training(np.full((3, 2), np.nan))
    with pytest.raises(InputError, match="'minimum' is missing"):
        MessReference.from_dict({"values": [[1.0, 2.0]], "maximum": [2.0]})


def test_count_below_equals_searchsorted():
    # Source: numpy.searchsorted(side="left") on the sorted reference (reference library)
    from envelope.kernels.mess import count_below

    rng = np.random.default_rng(8)
    R = np.sort(np.r_[rng.normal(size=400).round(2), np.full(30, 0.5), [1e-300, -1e-300]])
    ref = reference_from_training(R[:, None])
    table = ref.counting_tables[0]
    uniq = np.unique(R)
    p = np.r_[rng.normal(scale=2, size=3000), uniq, np.nextafter(uniq, np.inf), np.nextafter(uniq, -np.inf),
              [np.inf, -np.inf, np.nan, 0.0, uniq[0] - 1e-12]]
    smooth = np.sort(rng.normal(size=2000))  # neighbouring cells close together, as on a grid
    for values in (p, smooth, smooth[::-1], p.astype(np.float32)):
        expected = np.searchsorted(R, values, side="left")
        expected[np.isnan(values)] = R.size  # NaN sorts last in numpy
        np.testing.assert_array_equal(count_below(table, values), expected)


def test_mess_cells_variable_major_float32():
    # Source: mess() on the same cells as a (cells, variables) float64 table
    from envelope.kernels.mess import mess_cells

    rng = np.random.default_rng(4)
    R = rng.normal(size=(300, 3)).round(1)
    X = rng.normal(scale=1.8, size=(3, 5000)).round(1).astype(np.float32)
    X[1, 7] = np.nan
    ref = reference_from_training(R)
    v32, i32 = mess_cells(X, ref, block_cells=777)
    v64, i64 = mess(X.T.astype(np.float64), ref)
    np.testing.assert_array_equal(v32, v64)
    np.testing.assert_array_equal(i32, i64)
    assert np.isnan(v32[7]) and i32[7] == -1


def test_reference_counts_each_cell_once():
    # Analytic: rows sharing a cell id are one cell; the reference equals that of the distinct cells
    X = np.array([[1.0, 10.0], [2.0, 20.0], [3.0, 30.0], [2.0, 20.0], [4.0, 40.0]])
    cells = np.array([7, 3, 9, 3, 1])  # the second and fourth rows are the same cell
    ref = reference_from_training(X, cells=cells)
    assert ref.n_source == 4
    np.testing.assert_array_equal(ref.values, reference_from_training(X[[0, 1, 2, 4]]).values)
    # Source: numpy.percentile of the distinct rows (the doubled row would move the median to 2)
    np.testing.assert_allclose(ref.percentiles[5], np.percentile(X[[0, 1, 2, 4]], 50, axis=0))
    with pytest.raises(InputError, match="cells"):
        reference_from_training(X, cells=cells[:3])
