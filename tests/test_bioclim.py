"""Grid wrapper for bioclimatic variables: same numbers as the kernel, lazy, grid and value checks."""

import dask
import dask.array as dsa
import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from dask.callbacks import Callback

from envelope.bioclim import bioclim, check_monthly
from envelope.errors import GridMismatchError, InputError

# Source: REFERENCES item 5 inputs (hand-made 12-month series).
TMIN = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8], dtype=float)
TMAX = TMIN + np.array([8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8], dtype=float)
PREC = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110], dtype=float)


def monthly(series, ny=4, nx=5, shift=None, chunks=None, lat0=-20.0):
    """A (month, y, x) stack repeating ``series`` in every cell; south rows optionally shifted 6 months."""
    data = np.broadcast_to(np.asarray(series, float)[:, None, None], (12, ny, nx)).copy()
    if shift:
        data[:, ny // 2:, :] = np.roll(np.asarray(series, float), shift)[:, None, None]
    da = xr.DataArray(data.astype("float32"), dims=("month", "y", "x"),
                      coords={"month": np.arange(1, 13), "y": lat0 - np.arange(ny) - 0.5,
                              "x": -150.0 + np.arange(nx) + 0.5})
    da = da.rio.write_crs("EPSG:4326")
    return da.chunk({"month": 4, "y": 2, "x": 3}) if chunks else da


class CountComputes(Callback):
    def __init__(self):
        super().__init__()
        self.count = 0

    def _start(self, dsk):
        self.count += 1


def test_grid_values_match_reference_and_layout():
    # Source: REFERENCES item 5 table (wrap=True, ddof=0).
    out = bioclim(monthly(TMIN), monthly(TMAX), monthly(PREC))
    assert out.dims == ("variable", "y", "x") and out.dtype == np.float32
    assert list(out["variable"].values[:3]) == ["BIO1", "BIO2", "BIO3"] and out["variable"].values[-1] == "GDD5"
    np.testing.assert_allclose(out.sel(variable="BIO1").values, 6.166667, atol=1e-5)
    np.testing.assert_allclose(out.sel(variable="BIO16").values, 300)
    np.testing.assert_allclose(out.sel(variable="BIO4").values, 832.749796, rtol=1e-6)
    assert out["units"].sel(variable="BIO12").item() == "mm"
    assert out["long_name"].sel(variable="BIO15").item() == "precipitation seasonality"
    assert out.rio.crs.to_epsg() == 4326


def test_southern_rows_pick_their_own_quarters_without_wrap():
    # Source: REFERENCES item 5 series; southern rows shifted 6 months. Without wrap the
    # northern rows give BIO8 = -2.833333 (JFM) and the southern rows' wettest quarter is
    # JJA (= the original DJF) with BIO8 = -4.5 and BIO16 = 300.
    out = bioclim(monthly(TMIN, shift=6), monthly(TMAX, shift=6), monthly(PREC, shift=6), wrap=False)
    bio8 = out.sel(variable="BIO8").values
    np.testing.assert_allclose(bio8[:2], -2.833333, atol=1e-5)
    np.testing.assert_allclose(bio8[2:], -4.5, atol=1e-5)
    np.testing.assert_allclose(out.sel(variable="BIO16").values[2:], 300)


def test_wrapper_stays_lazy_and_computes_once():
    # Common practice, no source (xarray habit: lazy wrappers stay lazy).
    tmin, tmax, prec = (monthly(s, chunks=True) for s in (TMIN, TMAX, PREC))
    counter = CountComputes()
    with counter:
        out = bioclim(tmin, tmax, prec, variables=["BIO1", "BIO12"])
        assert isinstance(out.data, dsa.Array)
        assert counter.count == 0
        values = out.compute()
    assert counter.count == 1
    np.testing.assert_allclose(values.sel(variable="BIO12").values, 465)
    assert list(values["variable"].values) == ["BIO1", "BIO12"]


def test_nan_cells_stay_nan():
    tmin = monthly(TMIN)
    tmin[3, 0, 0] = np.nan
    out = bioclim(tmin, monthly(TMAX), monthly(PREC))
    assert np.isnan(out.values[:, 0, 0]).all()
    assert np.isfinite(out.values[:, 1, 1]).all()


def test_mismatched_grids_and_wrong_month_count():
    shifted = monthly(PREC).assign_coords(x=monthly(PREC)["x"] + 0.5)
    with pytest.raises(GridMismatchError, match="prec"):
        bioclim(monthly(TMIN), monthly(TMAX), shifted)
    with pytest.raises(InputError, match="tmax: 11 months; expected 12"):
        bioclim(monthly(TMIN), monthly(TMAX).isel(month=slice(0, 11)), monthly(PREC))
    with pytest.raises(InputError, match="'BIO20' is not a bioclimatic variable"):
        bioclim(monthly(TMIN), monthly(TMAX), monthly(PREC), variables=["BIO20"])


def test_value_checks_name_the_file():
    bad = monthly(PREC)
    bad[0, 0, 0] = -1.0
    with pytest.raises(InputError, match=r"p\.tif: 1 cell-months of negative precipitation"):
        check_monthly(monthly(TMIN), monthly(TMAX), bad, names={"prec": "p.tif"})
    with pytest.raises(InputError, match="tmin > tmax in 240 cell-months"):
        check_monthly(monthly(TMAX), monthly(TMIN), monthly(PREC))
    with pytest.raises(InputError, match="kelvin"):
        check_monthly(monthly(TMIN + 273.15), monthly(TMAX + 273.15), monthly(PREC))
    check_monthly(monthly(TMIN, chunks=True), monthly(TMAX, chunks=True), monthly(PREC, chunks=True))
