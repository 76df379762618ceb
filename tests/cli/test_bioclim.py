"""`envelope bioclim`: BIO layers from 12-band files, and every bad input stops with exit 2 and no output."""

import numpy as np
import pandas as pd
import pytest
import rasterio
import rioxarray  # noqa: F401
import xarray as xr
from click.testing import CliRunner

from envelope.cli.main import cli

# Source: REFERENCES item 5 inputs (hand-made 12-month series).
TMIN = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8], dtype=float)
TMAX = TMIN + np.array([8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8], dtype=float)
PREC = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110], dtype=float)


def write_months(path, series, bands=12, x0=-150.0, units=None):
    data = np.broadcast_to(np.asarray(series, float)[:bands, None, None], (bands, 3, 4)).astype("float32")
    da = xr.DataArray(data, dims=("band", "y", "x"),
                      coords={"band": np.arange(1, bands + 1), "y": [-20.5, -21.5, -22.5],
                              "x": x0 + np.arange(4) + 0.5}).rio.write_crs("EPSG:4326")
    da.rio.to_raster(path)
    if units:
        with rasterio.open(path, "r+") as dst:
            for i in range(1, bands + 1):
                dst.update_tags(i, units=units)
    return str(path)


@pytest.fixture
def inputs(tmp_path):
    return {"tmin": write_months(tmp_path / "tmin.tif", TMIN, units="degC"),
            "tmax": write_months(tmp_path / "tmax.tif", TMAX),
            "prec": write_months(tmp_path / "prec.tif", PREC, units="mm")}


def run(inputs, out, *extra):
    return CliRunner().invoke(cli, ["bioclim", "--tmin", inputs["tmin"], "--tmax", inputs["tmax"],
                                    "--prec", inputs["prec"], "--out", str(out), *extra])


def test_writes_named_bands_with_reference_values(inputs, tmp_path):
    # Source: REFERENCES item 5 table (wrap=True: BIO8 = -4.5, BIO16 = 300; ddof=1: BIO4 = 869.778795).
    out = tmp_path / "bio.tif"
    result = run(inputs, out, "--ddof", "1")
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as src:
        names = list(src.descriptions)
        data = src.read()
        assert src.tags(12)["units"] == "mm" and src.tags(1)["units"] == "degC"
    assert names[:19] == [f"BIO{i}" for i in range(1, 20)] and names[19] == "GDD5"
    np.testing.assert_allclose(data[names.index("BIO8")], -4.5, atol=1e-5)
    np.testing.assert_allclose(data[names.index("BIO16")], 300)
    np.testing.assert_allclose(data[names.index("BIO4")], 869.778795, rtol=1e-6)


def test_no_wrap_and_variable_subset_from_netcdf_with_time(tmp_path, inputs):
    # Source: REFERENCES item 5 wrap=False column (BIO8 = -2.833333, BIO16 = 210). NetCDF in
    # kelvin with a 12-date time axis and ascending latitude; months read from the dates.
    times = pd.date_range("1990-01-01", periods=12, freq="MS") + pd.Timedelta(days=15)
    order = np.r_[6:12, 0:6]      # file stored July..June: months must come from the dates
    ds = xr.Dataset({"tasmin": (("time", "lat", "lon"), np.broadcast_to(
        (TMIN + 273.15)[order, None, None], (12, 3, 4)).astype("float32"))},
        coords={"time": times[order], "lat": [-22.5, -21.5, -20.5], "lon": 210.0 + np.arange(4) + 0.5})
    ds["tasmin"].attrs["units"] = "K"
    ds.to_netcdf(tmp_path / "tmin.nc")
    out = tmp_path / "bio.tif"
    result = CliRunner().invoke(cli, ["bioclim", "--tmin", str(tmp_path / "tmin.nc"), "--tmax", inputs["tmax"],
                                      "--prec", inputs["prec"], "--out", str(out), "--no-wrap",
                                      "--variables", "BIO8,BIO16"])
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as src:
        assert list(src.descriptions) == ["BIO8", "BIO16"]
        np.testing.assert_allclose(src.read(1), -2.833333, atol=1e-4)
        np.testing.assert_allclose(src.read(2), 210)


def test_eleven_months_is_named(inputs, tmp_path):
    inputs["prec"] = write_months(tmp_path / "p11.tif", PREC, bands=11)
    result = run(inputs, tmp_path / "bio.tif")
    assert result.exit_code == 2
    assert "p11.tif: 11 bands; expected 12" in result.output
    assert not (tmp_path / "bio.tif").exists()


def test_mismatched_grids(inputs, tmp_path):
    inputs["tmax"] = write_months(tmp_path / "tmax_moved.tif", TMAX, x0=-149.0)
    result = run(inputs, tmp_path / "bio.tif")
    assert result.exit_code == 2 and "tmax_moved.tif" in result.output
    assert not (tmp_path / "bio.tif").exists()


def test_tmin_above_tmax_is_an_error_with_the_count(inputs, tmp_path):
    swapped = dict(inputs, tmin=inputs["tmax"], tmax=inputs["tmin"])
    result = run(swapped, tmp_path / "bio.tif")
    assert result.exit_code == 2
    assert "tmin > tmax in 144 cell-months" in result.output     # 12 months x 3 x 4 cells
    assert not (tmp_path / "bio.tif").exists()


def test_negative_precipitation_names_the_file(inputs, tmp_path):
    inputs["prec"] = write_months(tmp_path / "wet.tif", PREC - 50)
    result = run(inputs, tmp_path / "bio.tif")
    assert result.exit_code == 2
    assert "wet.tif:" in result.output and "negative precipitation" in result.output
    assert not (tmp_path / "bio.tif").exists()


def test_wrong_units_and_existing_output(inputs, tmp_path):
    inputs["prec"] = write_months(tmp_path / "rate.tif", PREC, units="kg m-2 s-1")
    result = run(inputs, tmp_path / "bio.tif")
    assert result.exit_code == 2 and "rate.tif: units 'kg m-2 s-1'" in result.output
    out = tmp_path / "exists.tif"
    out.write_text("x")
    result = run(dict(inputs, prec=str(tmp_path / "tmin.tif")), out)
    assert result.exit_code == 2 and "add --overwrite" in result.output
