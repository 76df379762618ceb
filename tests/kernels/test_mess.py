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
    with pytest.raises(InputError, match="not the smallest and largest"):
        MessReference.from_dict({"values": [[1.0, 2.0]], "minimum": [0.5], "maximum": [2.0]})


def _previous_mess_cells(X, reference, block_cells=16384):
    # The implementation before the bucketed search (envelope 2026-12, kernels/mess.py),
    # kept verbatim as the reference the new kernel must equal to the last bit.
    n_ref = reference.values.shape[0]
    tables = []
    for i in range(reference.n_variables):
        unique, first = np.unique(reference.values[:, i], return_index=True)
        below = np.r_[first, n_ref]
        two_f = 2.0 * (100.0 * below / n_ref)
        tables.append((unique, np.r_[unique, np.inf], np.minimum(two_f, 200.0 - two_f),
                       np.arange(unique.size, dtype=np.float64)))

    def position_among(table, p):
        unique, padded, _, positions = table
        t = np.interp(p, unique, positions)
        np.fmin(t, unique.size, out=t)
        np.ceil(t, out=t)
        g = t.astype(np.intp)
        g += padded[g] < p
        return g

    def extreme(p, below, lo, hi):
        span = hi - lo
        if span > 0:
            s = np.where(below, p - lo, hi - p) * (100.0 / span)
        else:
            s = np.where(p == lo, 0.0, -100.0)
        s[np.isnan(p)] = np.nan
        return s

    n = X.shape[1]
    best_all = np.empty(n)
    index_all = np.zeros(n, dtype=np.int64)
    for start in range(0, n, block_cells):
        stop = min(start + block_cells, n)
        best = best_all[start:stop]
        best.fill(np.inf)
        index = index_all[start:stop]
        for i, table in enumerate(tables):
            p = X[i, start:stop]
            g = position_among(table, p)
            s = table[2][g]
            g -= 1
            edge = np.flatnonzero(g.view(np.uintp) >= table[0].size - 1)
            if edge.size:
                s[edge] = extreme(p[edge].astype(np.float64), g[edge] < 0,
                                  float(reference.minimum[i]), float(reference.maximum[i]))
            lower = s < best
            np.copyto(index, i, where=lower)
            np.minimum(best, s, out=best)
        index[np.isnan(best)] = -1
    return best_all, index_all


def _hostile_cells(R, rng, dtype):
    """Cells (variables, cells): smooth, on reference values and their float neighbours,
    at and beyond the extremes, far outside, NaN and ±inf."""
    n_vars = R.shape[1]
    on = R[rng.integers(0, R.shape[0], (n_vars, 3000)), np.arange(n_vars)[:, None]].astype(dtype)
    beside = np.nextafter(on, dtype(np.inf)) if dtype == np.float32 else np.nextafter(on, np.inf)
    below = np.nextafter(on, dtype(-np.inf))
    smooth = np.sort(rng.uniform(R.min(0) - 1, R.max(0) + 1, (4000, n_vars)), axis=0).T.astype(dtype)
    far = rng.normal(scale=20, size=(n_vars, 500)).astype(dtype)
    extremes = np.repeat(np.c_[R.min(0), R.max(0)].astype(dtype), 50, axis=1)
    X = np.concatenate([on, beside, below, smooth, far, extremes], axis=1)
    cols = rng.integers(0, X.shape[1], 30)
    X[rng.integers(0, n_vars, 10), cols[:10]] = np.nan
    X[rng.integers(0, n_vars, 10), cols[10:20]] = np.inf
    X[rng.integers(0, n_vars, 10), cols[20:]] = -np.inf
    return X


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_bucketed_kernel_equals_previous_implementation(dtype):
    # Source: the previous implementation (numpy.interp search), copied above as the reference
    from envelope.kernels.mess import mess_cells, mess_layers

    rng = np.random.default_rng(11)
    references = {
        "rounded, with ties": rng.normal(size=(600, 4)).round(1),
        "float32 values": rng.normal(size=(800, 3)).astype(np.float32).astype(np.float64),
        "thinned": rng.gamma(2.0, size=(30_000, 2)),
        "constant variable": np.c_[rng.normal(size=200), np.full(200, 3.0)],
        "continuous, skewed, an outlier (crowded buckets)": np.c_[rng.normal(size=9000), rng.lognormal(0, 2, 9000),
                                                                 np.r_[rng.gamma(0.7, size=8999), 1e30]],
        "one row": np.array([[1.0, 2.0]]),
    }
    for name, R in references.items():
        ref = reference_from_training(R, max_values=10_000 if "crowded" in name else 1000)
        if "crowded" in name:
            assert all(v.index.any_crowded for v in ref.lookup(dtype).variables)
        X = _hostile_cells(R, rng, dtype)
        with np.errstate(invalid="ignore"):
            expected = _previous_mess_cells(X, ref, block_cells=777)
        values, index = mess_cells(X, ref, block_cells=1000)
        np.testing.assert_array_equal(values, expected[0], err_msg=name)
        np.testing.assert_array_equal(index, expected[1], err_msg=name)
        # the raster layers: the same values rounded to float32, NaN for nodata and ±inf
        layers = mess_layers(X, ref)
        nodata = ~np.isfinite(X).all(axis=0)
        np.testing.assert_array_equal(layers[0], np.where(nodata, np.nan, expected[0]).astype(np.float32))
        np.testing.assert_array_equal(layers[1], np.where(nodata | (expected[1] < 0), np.nan, expected[1]))


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
