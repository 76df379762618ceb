"""Delta (change-factor) method: exact constant anomalies, ratio floor, bilinear against SciPy, 0-360 grids."""

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from dask.callbacks import Callback
from pyproj import Transformer
from scipy.interpolate import RegularGridInterpolator

from envelope.delta import change_factor_kernel, delta
from envelope.errors import GridMismatchError, InputError


def grid(values, y, x, crs="EPSG:4326", chunks=None):
    da = xr.DataArray(np.asarray(values, dtype="float32"), dims=("month", "y", "x"),
                      coords={"month": np.arange(1, 13), "y": np.asarray(y, float), "x": np.asarray(x, float)})
    da = da.rio.write_crs(crs)
    return da.chunk({"y": 3, "x": 4}) if chunks else da


def model_pair(rng, y, x, change, method="additive"):
    hist = rng.uniform(5, 50, size=(12, len(y), len(x)))
    fut = hist + change if method == "additive" else hist * change
    return grid(hist, y, x), grid(fut, y, x)


def fine_baseline(rng, lat0=40.0, lon0=-120.0, ny=7, nx=9, res=0.25):
    y = lat0 - res * (np.arange(ny) + 0.5)
    x = lon0 + res * (np.arange(nx) + 0.5)
    return grid(rng.uniform(0, 30, size=(12, ny, nx)), y, x)


def test_constant_anomaly_reproduces_baseline_plus_anomaly():
    # Analytic: bilinear interpolation of a constant field is that constant (Hay et al. 2000 method).
    rng = np.random.default_rng(0)
    base = fine_baseline(rng)
    change = np.arange(12, dtype=float)[:, None, None] * 0.25 + 1.0   # a different anomaly per month
    hist, fut = model_pair(rng, np.arange(30, 50, 2.0), np.arange(-130, -100, 2.0), change)
    out = delta(base, hist, fut, method="additive")
    np.testing.assert_allclose(out.values, base.values + change, atol=1e-4)
    assert out.dims == ("month", "y", "x") and out.dtype == np.float32


def test_constant_ratio_reproduces_baseline_times_ratio():
    # Analytic: a constant ratio 1.2 above the floor multiplies the baseline by 1.2.
    rng = np.random.default_rng(1)
    base = fine_baseline(rng)
    hist, fut = model_pair(rng, np.arange(30, 50, 2.0), np.arange(-130, -100, 2.0), 1.2, method="ratio")
    out = delta(base, hist, fut, method="ratio")
    np.testing.assert_allclose(out.values, base.values * 1.2, rtol=1e-5)


def test_ratio_floor_and_cap():
    # Common practice, no source: floor both periods (dry in both -> ratio 1), optional cap.
    hist = np.array([0.0, 0.5, 4.0, 10.0])
    fut = np.array([0.0, 3.0, 0.2, 30.0])
    np.testing.assert_allclose(change_factor_kernel(hist, fut, method="ratio", ratio_floor=1.0),
                               [1.0, 3.0, 0.25, 3.0])
    np.testing.assert_allclose(change_factor_kernel(hist, fut, method="ratio", ratio_floor=1.0, max_ratio=2.0),
                               [1.0, 2.0, 0.25, 2.0])
    with pytest.raises(InputError, match="ratio floor"):
        change_factor_kernel(hist, fut, method="ratio", ratio_floor=0.0)
    with pytest.raises(InputError, match="expected one of additive, ratio"):
        change_factor_kernel(hist, fut, method="multiply")


def test_bilinear_matches_scipy_on_a_geographic_grid_with_ascending_latitude():
    # Source: scipy.interpolate.RegularGridInterpolator(method="linear") on the model grid.
    rng = np.random.default_rng(2)
    my, mx = np.arange(30.5, 50, 1.5), np.arange(-129.5, -105, 2.0)      # ascending latitude
    hist, fut = model_pair(rng, my, mx, rng.normal(size=(12, len(my), len(mx))))
    base = fine_baseline(rng)
    out = delta(base, hist, fut, method="additive")
    anomaly = (fut - hist).values.transpose(1, 2, 0)
    ref = RegularGridInterpolator((my, mx), anomaly, method="linear")
    yy, xx = np.meshgrid(base["y"].values, base["x"].values, indexing="ij")
    expected = base.values + ref(np.column_stack([yy.ravel(), xx.ravel()])).T.reshape(12, *yy.shape)
    np.testing.assert_allclose(out.values, expected, atol=1e-4)


def test_bilinear_onto_a_projected_baseline():
    # Source: pyproj Transformer for the cell centres + scipy RegularGridInterpolator (linear).
    rng = np.random.default_rng(3)
    my, mx = np.arange(-40.0, -20.0, 2.0)[::-1], np.arange(-160.0, -130.0, 2.5)   # north-up model
    hist, fut = model_pair(rng, my, mx, rng.normal(size=(12, len(my), len(mx))))
    laea = "+proj=laea +lat_0=-30 +lon_0=-145 +datum=WGS84 +units=m"
    y = 200_000 - 50_000 * (np.arange(6) + 0.5)
    x = -300_000 + 50_000 * (np.arange(8) + 0.5)
    base = grid(rng.uniform(0, 20, size=(12, 6, 8)), y, x, crs=laea)
    out = delta(base, hist, fut, method="additive")
    lon, lat = Transformer.from_crs(laea, "EPSG:4326", always_xy=True).transform(*np.meshgrid(x, y))
    anomaly = (fut - hist).values[:, ::-1].transpose(1, 2, 0)
    ref = RegularGridInterpolator((my[::-1], mx), anomaly, method="linear")
    expected = base.values + ref(np.column_stack([lat.ravel(), lon.ravel()])).T.reshape(12, 6, 8)
    np.testing.assert_allclose(out.values, expected, atol=1e-4)
    assert out.rio.crs == base.rio.crs


def test_global_model_on_0_360_longitudes_interpolates_across_both_seams():
    # Source: scipy RegularGridInterpolator on the model grid in whichever longitude
    # convention makes the point interior: lon 179.5 is interior on 0..360, lon -0.5 on -180..180.
    rng = np.random.default_rng(4)
    my = np.arange(-88.75, 90, 2.5)                    # ascending latitude, as many model files
    mx = np.arange(1.25, 360, 2.5)                     # 0..360 longitudes
    change = rng.normal(size=(12, len(my), len(mx)))
    hist, fut = model_pair(rng, my, mx, change)
    base = grid(rng.uniform(0, 20, size=(12, 2, 4)), [10.3, -5.7], [-179.6, -0.5, 179.5, 0.4])
    out = delta(base, hist, fut, method="additive").values - base.values
    anomaly = (fut - hist).values.transpose(1, 2, 0)
    ref_0_360 = RegularGridInterpolator((my, mx), anomaly)
    order = np.argsort(((mx + 180) % 360) - 180)
    ref_180 = RegularGridInterpolator((my, np.sort(((mx + 180) % 360) - 180)), anomaly[:, order])
    for i, lat in enumerate([10.3, -5.7]):
        np.testing.assert_allclose(out[:, i, 0], ref_0_360([[lat, 180.4]])[0], atol=1e-4)
        np.testing.assert_allclose(out[:, i, 1], ref_180([[lat, -0.5]])[0], atol=1e-4)
        np.testing.assert_allclose(out[:, i, 2], ref_0_360([[lat, 179.5]])[0], atol=1e-4)
        np.testing.assert_allclose(out[:, i, 3], ref_180([[lat, 0.4]])[0], atol=1e-4)


def test_stays_lazy_and_keeps_nodata():
    # Common practice, no source: a lazy baseline gives a lazy result; NaN baseline cells stay NaN.
    rng = np.random.default_rng(5)
    base = fine_baseline(rng)
    base[:, 0, 0] = np.nan
    hist, fut = model_pair(rng, np.arange(30, 50, 2.0), np.arange(-130, -100, 2.0), 1.0)
    calls = []

    class Count(Callback):
        def _start(self, dsk):
            calls.append(1)

    with Count():
        out = delta(base.chunk({"y": 3, "x": 4}), hist, fut, method="additive")
        assert out.chunks is not None and not calls
        values = out.values
    assert len(calls) == 1
    assert np.isnan(values[:, 0, 0]).all() and np.isfinite(values[:, 1:, 1:]).all()


def test_bad_model_grids_are_named():
    rng = np.random.default_rng(6)
    base = fine_baseline(rng)
    hist, fut = model_pair(rng, np.arange(30, 50, 2.0), np.arange(-130, -100, 2.0), 1.0)
    moved = fut.assign_coords(x=fut["x"] + 1.0)
    with pytest.raises(GridMismatchError, match="fut.nc: .*differs from hist.nc"):
        delta(base, hist, moved, method="additive", names={"historical": "hist.nc", "future": "fut.nc"})
    small_h, small_f = model_pair(rng, np.arange(30, 36, 2.0), np.arange(-130, -124, 2.0), 1.0)
    with pytest.raises(InputError, match="hist.nc: does not cover the baseline grid"):
        delta(base, small_h, small_f, method="additive", names={"historical": "hist.nc"})
    # the point is written as near the model's longitudes as it can be (-119.9, not 240.1 a turn away)
    east_h, east_f = model_pair(rng, np.arange(30, 50, 2.0), np.arange(250, 260, 2.0), 1.0)
    with pytest.raises(InputError, match=r"does not cover the baseline grid \(e\.g\. point x=-119\.9, .*"
                                         r"model covers x -111\.\.-101"):
        delta(base, east_h, east_f, method="additive", names={"historical": "hist.nc"})
