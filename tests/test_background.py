"""Background sampling: an area quadrature drawn with replacement, seeds, bias weighting, mask, buffer,
exclusions, laziness; the bias corrections (weighted background, effort as a covariate) on simulated records."""

import logging

import dask.array as dsa
import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr
from scipy.stats import binomtest
from sklearn.metrics.pairwise import haversine_distances

from tests.conftest import make_stack
from envelope.background import draw_background, drop_unrecorded, resolve_bias_method, sample_background
from envelope.errors import GridMismatchError, InputError
from envelope.grids import cell_area_km2
from envelope.models import PointProcessModel
from envelope.records import EARTH_RADIUS_M, values_at


def stack_with_holes():
    grid = make_stack(nx=30, ny=20)
    grid[0, :5, :] = np.nan      # a missing band in one variable
    grid[1, :, 25:] = np.nan     # and a missing strip in the other
    return grid


def test_distinct_valid_cells_with_centres_and_values():
    # Common practice, no source: background cells are distinct cells where every variable is known;
    # repeated draws are counted in `weight`, which sums to the number of draws.
    grid = stack_with_holes()
    cells = sample_background(grid, 200, seed=3, with_values=True)
    assert cells["weight"].sum() == 200 and (cells["weight"] >= 1).all()
    assert (cells["weight"] == np.round(cells["weight"])).all()
    assert len(cells) < 200  # 200 draws with replacement from 375 cells repeat some (P(no repeat) ~ 1e-30)
    assert not cells.duplicated(["row", "col"]).any()
    assert (cells["row"] >= 5).all() and (cells["col"] < 25).all()
    np.testing.assert_array_equal(cells["x"], grid["x"].values[cells["col"]])
    np.testing.assert_array_equal(cells["y"], grid["y"].values[cells["row"]])
    # Source: NumPy fancy indexing as the reference for the values
    raw = grid.values
    np.testing.assert_array_equal(cells[["t", "p"]].to_numpy(), raw[:, cells["row"], cells["col"]].T)


def test_seeded_reproducible():
    # Common practice, no source: numpy default_rng with the same seed gives the same draw.
    grid = stack_with_holes()
    a = sample_background(grid, 100, seed=11)
    pd.testing.assert_frame_equal(a, sample_background(grid, 100, seed=11))
    assert not a.equals(sample_background(grid, 100, seed=12))


def test_uniform_draw_is_uniform_over_valid_cells():
    # Source: binomial test (scipy.stats.binomtest). Draws are independent; cell areas depend on the row
    # only, so within rows 5-19 a draw falls in columns 0-11 with probability 12/25 = 180/375.
    grid = stack_with_holes()
    hits = np.zeros((20, 30))
    for seed in range(300):
        cells = sample_background(grid, 25, seed=seed)
        hits[cells["row"], cells["col"]] += cells["weight"]
    left = hits[5:, :12].sum()  # 15 x 12 = 180 of the 375 valid cells
    assert hits.sum() == 300 * 25
    assert binomtest(int(left), 300 * 25, 180 / 375).pvalue > 1e-3


def _geodesic_row_areas(grid):
    """Area (km2) of one cell of each row, from pyproj.Geod on WGS84 (the reference)."""
    geod = pyproj.Geod(ellps="WGS84")
    res = float(abs(grid["y"].values[1] - grid["y"].values[0]))
    x0 = float(grid["x"].values[0])
    out = []
    for lat in grid["y"].values:
        lons = [x0 - res / 2, x0 + res / 2, x0 + res / 2, x0 - res / 2]
        lats = [lat - res / 2, lat - res / 2, lat + res / 2, lat + res / 2]
        out.append(abs(geod.polygon_area_perimeter(lons, lats)[0]) / 1e6)
    return np.array(out)


def test_draw_is_per_unit_area_on_a_geographic_grid():
    # Source: pyproj.Geod geodesic cell areas on WGS84 as expected draw shares; chi-square goodness of fit
    # (scipy.stats.chisquare). On a 10-70 N grid the per-cell draw (per_area=False) is rejected outright.
    from scipy.stats import chisquare

    grid = make_stack(nx=100, ny=120, lon0=0.0, lat0=70.0, res=0.5)
    expected_share = _geodesic_row_areas(grid) / _geodesic_row_areas(grid).sum()
    n = 10_000  # fewer than the 12 000 cells: drawn at random, about 83 per row
    for per_area, ok in ((True, True), (False, False)):
        cells = sample_background(grid, n, seed=4, per_area=per_area)
        per_row = np.bincount(cells["row"], weights=cells["weight"], minlength=120)
        p = chisquare(per_row, n * expected_share).pvalue
        assert (p > 1e-3) if ok else (p < 1e-12)


def test_fewer_valid_cells_than_asked_takes_all_and_warns(caplog):
    # Source: pyproj.Geod geodesic cell areas (WGS84): with every cell taken once, the weights are the
    # exact area quadrature of the grid (proportional to cell area, mean 1).
    grid = stack_with_holes()
    with caplog.at_level(logging.WARNING, logger="envelope.background"):
        cells = sample_background(grid, 10_000)
    assert len(cells) == 15 * 25
    assert "fewer than the 10000 asked" in caplog.text
    assert cells["weight"].mean() == pytest.approx(1.0)
    area = _geodesic_row_areas(grid)[cells["row"]]
    np.testing.assert_allclose(cells["weight"], area / area.mean(), rtol=1e-6)


def test_bias_weighting_three_to_one():
    # Source: binomial test (scipy.stats.binomtest). One draw per seed: P(heavy half) = 3*50 / (3*50 + 50) = 0.75.
    grid = make_stack(nx=10, ny=10)
    bias = np.ones((10, 10))
    bias[:, :5] = 3.0
    bias[0, 9] = 0.0      # never sampled
    bias[1, 9] = np.nan   # never sampled
    heavy = 0
    draws = 1500
    for seed in range(draws):
        cells = sample_background(grid, 1, seed=seed, bias=bias, per_area=False)
        assert (cells["row"].iloc[0], cells["col"].iloc[0]) not in {(0, 9), (1, 9)}
        heavy += int(cells["col"].iloc[0] < 5)
    assert binomtest(heavy, draws, 150 / 198).pvalue > 1e-3


def test_bias_zero_nan_and_negative():
    # Common practice, no source.
    grid = make_stack(nx=10, ny=10)
    bias = np.zeros((10, 10))
    bias[2, 3] = 1.0
    bias[4, 4] = np.nan
    cells = sample_background(grid, 5, bias=bias)
    assert cells[["row", "col"]].values.tolist() == [[2, 3]]
    bias[7, 7] = -0.5
    with pytest.raises(InputError, match=r"bias: 1 cells are negative \(lowest -0.5\)"):
        sample_background(grid, 5, bias=bias)
    with pytest.raises(GridMismatchError, match="bias: shape"):
        sample_background(grid, 5, bias=np.ones((9, 10)))


def test_mask_restricts():
    # Common practice, no source: only nonzero mask cells may be drawn.
    grid = make_stack(nx=30, ny=20)
    mask = grid.isel(variable=0, drop=True).copy(data=np.zeros((20, 30), dtype="float32"))
    mask[10:, 10:20] = 1
    cells = sample_background(grid, 50, seed=2, mask=mask)
    assert cells["weight"].sum() == 50
    assert (cells["row"] >= 10).all() and cells["col"].between(10, 19).all()


def test_buffer_around_records():
    # Source: sklearn haversine_distances on the same sphere (exact set) and pyproj.Geod WGS84 geodesics
    # (within 0.6 %: sphere vs ellipsoid, from memory at most ~0.5 %).
    grid = make_stack(nx=40, ny=40, res=0.05)
    records = pd.DataFrame({"x": grid["x"].values[[5, 30]], "y": grid["y"].values[[8, 25]]})
    cells = sample_background(grid, 100_000, buffer_km=12, records=records)
    lon, lat = np.meshgrid(grid["x"].values, grid["y"].values)
    cell_points = np.radians(np.column_stack([lat.ravel(), lon.ravel()]))
    record_points = np.radians(records[["y", "x"]].to_numpy())
    nearest_km = haversine_distances(cell_points, record_points).min(axis=1) * EARTH_RADIUS_M / 1000
    want = set(np.flatnonzero(nearest_km <= 12).tolist())
    assert set((cells["row"] * 40 + cells["col"]).tolist()) == want
    geod = pyproj.Geod(ellps="WGS84")
    for k in range(len(records)):
        _, _, metres = geod.inv(cells["x"].to_numpy(), cells["y"].to_numpy(),
                                np.full(len(cells), records["x"][k]), np.full(len(cells), records["y"][k]))
        if k == 0:
            nearest = metres
        else:
            nearest = np.minimum(nearest, metres)
    assert nearest.max() <= 12_000 * 1.006
    with pytest.raises(InputError, match="buffer_km: given without records"):
        sample_background(grid, 10, buffer_km=12)


def test_buffer_projected_is_euclidean():
    # Source: scipy.spatial.distance.cdist (Euclidean) as the reference.
    from scipy.spatial.distance import cdist

    grid = make_stack(nx=30, ny=30, lon0=200_000.0, lat0=5_000_000.0, res=1000.0, crs="EPSG:32605")
    records = np.array([[grid["x"].values[10], grid["y"].values[10]]])
    cells = sample_background(grid, 10_000, buffer_km=5.5, records=records)
    lon, lat = np.meshgrid(grid["x"].values, grid["y"].values)
    want = np.flatnonzero(cdist(np.column_stack([lon.ravel(), lat.ravel()]), records).min(axis=1) <= 5500)
    assert sorted((cells["row"] * 30 + cells["col"]).tolist()) == want.tolist()


def test_exclude_cells():
    # Common practice, no source: presence cells can be kept out of the background.
    grid = make_stack(nx=5, ny=4)
    excluded = pd.DataFrame({"row": [0, 1, 3], "col": [0, 4, 2]})
    cells = sample_background(grid, 100, exclude_cells=excluded)
    assert len(cells) == 17
    assert not set(zip(cells["row"], cells["col"])) & {(0, 0), (1, 4), (3, 2)}


def test_nothing_to_draw_and_bad_n():
    # Common practice, no source.
    grid = make_stack(nx=5, ny=4)
    with pytest.raises(InputError, match=r"no cell can be drawn \(valid 20, inside mask 0"):
        sample_background(grid, 10, mask=np.zeros((4, 5)))
    with pytest.raises(InputError, match="n: 0"):
        sample_background(grid, 0)


def test_dask_stack_read_once_chunk_by_chunk():
    # Source: dask block calls counted; the 2-D valid mask needs each block once, values only the drawn blocks.
    raw = np.random.default_rng(0).normal(size=(2, 60, 60)).astype("float32")
    raw[0, :10, :] = np.nan
    calls = []

    def count(block, block_info=None):
        calls.append(block_info[0]["chunk-location"])
        return block

    lazy = dsa.from_array(raw, chunks=(1, 20, 20)).map_blocks(count, dtype="float32")
    grid = make_stack(nx=60, ny=60).copy(data=lazy)
    cells = sample_background(grid, 500, seed=5)
    assert len(calls) == 18 and len(set(calls)) == 18   # 2 x 3 x 3 blocks, each once
    assert (cells["row"] >= 10).all()
    calls.clear()
    values = values_at(grid, cells["row"][:3], cells["col"][:3])
    np.testing.assert_array_equal(values, raw[:, cells["row"][:3], cells["col"][:3]].T)
    assert len(calls) <= 2 * 3


def test_with_replacement_keeps_the_bias_ratio_when_most_cells_are_drawn():
    # Source: binomial test (scipy.stats.binomtest). Draws are independent with P(cell) proportional to
    # area x bias; on an equal-area grid with bias 27 on one half and 1 on the other, a draw lands in the
    # heavy half with probability 27/28 however large a share of the 10 000 cells is drawn (9 000 here).
    # Without replacement the heavy cells saturate at one draw each (issue 13: ratio 10 where 27 was wanted).
    grid = make_stack(nx=100, ny=100, lon0=0.0, lat0=4_000_000.0, res=10_000.0, crs="EPSG:6933")
    bias = np.ones((100, 100))
    bias[:, :50] = 27.0
    cells = sample_background(grid, 9000, seed=8, bias=bias)
    heavy = cells.loc[cells["col"] < 50, "weight"].sum()
    assert cells["weight"].sum() == 9000
    assert binomtest(int(heavy), 9000, 27 / 28).pvalue > 1e-3
    light_cells = cells.loc[cells["col"] >= 50]
    ratio = (heavy / 5000) / (light_cells["weight"].sum() / 5000)
    assert 20 < ratio < 37  # draws per cell, heavy / light; the expectation is 27


# ----------------------------------------------------------------------------- simulated records

def _smooth_field(rng, shape, sigma):
    from scipy.ndimage import gaussian_filter

    f = gaussian_filter(rng.normal(size=shape), sigma, mode="wrap")
    return (f - f.mean()) / f.std()


def _one_variable_grid(values, crs, x0, y0, res):
    ny, nx = values.shape
    da = xr.DataArray(values[None].astype("float32"), dims=("variable", "y", "x"),
                      coords={"variable": ["v"], "y": y0 - res * (np.arange(ny) + 0.5),
                              "x": x0 + res * (np.arange(nx) + 0.5)})
    return da.rio.write_crs(crs)


def _linear_ppm(x_presence, x_background, w_background, effort=None):
    """Unpenalised point-process fit with one linear feature on the variable's own scale."""
    X = np.r_[x_presence, x_background][:, None]
    y = np.r_[np.ones(x_presence.size), np.zeros(x_background.size)]
    w = np.r_[np.ones(x_presence.size), w_background]
    extra = {} if effort is None else {"effort": effort}
    return PointProcessModel(classes=("linear",), standardize=False, C=np.inf).fit(X, y, sample_weight=w, **extra)


def test_records_made_per_km2_give_a_flat_response_on_a_10_70N_grid():
    # Analytic: records drawn uniformly per km2 (a homogeneous Poisson process, Warton & Shepherd 2010)
    # carry no effect of the latitude-correlated variable t, so the true response is flat. "Flat" is
    # measured as the fitted relative intensity at the warm end of t's range (95th percentile over the
    # grid cells) divided by that at the cold end (5th percentile): exp(slope x (t95 - t5)), which must be
    # within 1/1.15 .. 1.15. Over seeds 0-19 this ratio ranged 0.90-1.08 with the per-area background,
    # and 1.97-2.34 with a per-cell background (issue 13 reported 2.3).
    rng = np.random.default_rng(0)
    lat = 70.0 - 0.25 * (np.arange(240) + 0.5)
    t = (30.0 - 0.5 * lat)[:, None] + 2.0 * _smooth_field(rng, (240, 240), 6)
    grid = _one_variable_grid(t, "EPSG:4326", 0.0, 70.0, 0.25)
    area = cell_area_km2(grid).values
    counts = rng.poisson(10_000 * area / area.sum())   # about 10 000 records, uniform per km2
    rows, cols = np.nonzero(counts)
    x_presence = np.repeat(t[rows, cols], counts[rows, cols])
    t5, t95 = np.percentile(t, [5, 95])
    ratio = {}
    for per_area in (True, False):
        cells = sample_background(grid, 40_000, seed=0, per_area=per_area)  # fewer than the 57 600 cells
        model = _linear_ppm(x_presence, t[cells["row"], cells["col"]], cells["weight"].to_numpy())
        ratio[per_area] = float(np.exp(model.coef_[0] * (t95 - t5)))
    assert 1 / 1.15 < ratio[True] < 1.15
    assert ratio[False] > 1.5  # the per-cell background shows a spurious preference for the cold end


def _biased_records(seed, size=150):
    """Truth: intensity exp(0.7 v) per (equal-area) cell; records thinned by effort exp(v + u) / max.

    ``v`` and ``u`` are independent smooth fields, so log effort is correlated with v (r about 0.7)
    but not collinear with it.
    """
    rng = np.random.default_rng(seed)
    v = _smooth_field(rng, (size, size), 5)
    u = _smooth_field(rng, (size, size), 5)
    effort = np.exp(v + u)
    intensity = np.exp(0.7 * v)
    counts = rng.poisson(1500 * intensity / intensity.sum() * effort.max() / effort.mean())
    kept = rng.binomial(counts, effort / effort.max())
    rows, cols = np.nonzero(kept)
    rows, cols = np.repeat(rows, kept[rows, cols]), np.repeat(cols, kept[rows, cols])
    grid = _one_variable_grid(v, "EPSG:6933", 0.0, 4_000_000.0, 10_000.0)
    return grid, v, effort, rows, cols


@pytest.mark.parametrize("method", ["covariate", "weighted"])
def test_bias_correction_recovers_the_true_slope_on_a_grid_smaller_than_the_background(method):
    # Analytic: the simulation's true log-linear slope is 0.7 (records = a Poisson process of intensity
    # exp(0.7 v), thinned by an effort surface correlated with v). With a correction the fitted linear
    # coefficient must be within 15 % of 0.7; uncorrected it is far off (1.25-1.98 over seeds 0-19,
    # corrected 0.67-0.76 for both methods). The grid has 22 500 cells and 30 000 background points
    # are asked for, so every cell is taken (before this change the bias layer was then ignored).
    # Source for the model-based (covariate) correction: Warton, Renner & Ramp (2013) PLoS ONE 8: e79168;
    # for the weighted background: Phillips et al. (2009) Ecological Applications 19: 181-197.
    grid, v, effort, rows, cols = _biased_records(seed=0)
    plain = draw_background(grid, 30_000, seed=0)
    uncorrected = _linear_ppm(v[rows, cols], v[plain.table["row"], plain.table["col"]],
                              plain.table["weight"].to_numpy()).coef_[0]
    assert uncorrected > 1.2
    drawn = draw_background(grid, 30_000, seed=0, bias=effort, bias_method=method)
    assert drawn.info["n_draws"] is None and drawn.info["n_cells"] == 150 * 150
    effort_rows = None if method == "weighted" else np.r_[drawn.effort_at(rows, cols), drawn.effort]
    model = _linear_ppm(v[rows, cols], v[drawn.table["row"], drawn.table["col"]],
                        drawn.table["weight"].to_numpy(), effort=effort_rows)
    assert model.coef_[0] == pytest.approx(0.7, rel=0.15)
    if method == "covariate":
        # Analytic: records are proportional to effort, so the slope of log effort is 1
        assert model.effort_coef_ == pytest.approx(1.0, rel=0.15)
        assert drawn.bias_correction == "covariate"
    else:
        assert drawn.bias_correction == "weighted-background"


def test_resolve_bias_method_and_bad_combinations():
    # Common practice, no source: the documented defaults and one-line errors naming the parameter.
    assert resolve_bias_method("auto", "pointprocess", True) == "covariate"
    assert resolve_bias_method("auto", "brt", True) == "weighted"
    assert resolve_bias_method("weighted", "pointprocess", True) == "weighted"
    assert resolve_bias_method("auto", "pointprocess", False) is None
    with pytest.raises(InputError, match="bias_method: 'covariate' works with the point-process model only"):
        resolve_bias_method("covariate", "forest", True)
    with pytest.raises(InputError, match="bias_method: 'weighted' needs a bias"):
        resolve_bias_method("weighted", "pointprocess", False)
    with pytest.raises(InputError, match="bias_method: 'both'; expected one of auto, covariate, weighted"):
        resolve_bias_method("both", "pointprocess", True)


def test_covariate_background_leaves_out_unrecorded_cells_and_records():
    # Common practice, no source: log effort does not exist where effort is 0 or NaN, so such cells are
    # not background and records there are dropped (counted as no_effort).
    from envelope.records import Records

    grid = make_stack(nx=10, ny=10)
    bias = np.ones((10, 10))
    bias[:, 0] = 0.0
    bias[0, :] = np.nan
    drawn = draw_background(grid, 500, seed=1, bias=bias, bias_method="covariate")
    assert (drawn.table["col"] > 0).all() and (drawn.table["row"] > 0).all()
    np.testing.assert_array_equal(drawn.effort, 1.0)
    assert drawn.info["bias_correction"] == "covariate" and drawn.info["per_area"]
    table = pd.DataFrame({"row": [0, 5, 5], "col": [3, 0, 4], "x": 0.0, "y": 0.0})
    records = Records(table=table, n_read=3, dropped={"absent": 0}, crs="EPSG:4326")
    kept, n_dropped = drop_unrecorded(records, bias, grid)
    assert n_dropped == 2 and kept.table[["row", "col"]].values.tolist() == [[5, 4]]
    assert kept.dropped == {"absent": 0, "no_effort": 2}
    with pytest.raises(InputError, match="effort_at: this background was drawn without"):
        draw_background(grid, 50, bias=bias, bias_method="weighted").effort_at([1], [1])
