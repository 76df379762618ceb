"""12-month stacks: open_monthly / write_monthly / gridded_variables / kind_of_units against files written by
rasterio and xarray themselves (month and time axes, cftime calendars, row order, 0-360 longitudes, units)."""

import cftime
import numpy as np
import pandas as pd
import pytest
import rasterio
import xarray as xr
from rasterio.transform import Affine, from_origin

from envelope.errors import InputError
from envelope.io.monthly import (PRECIPITATION, TEMPERATURE, gridded_variables, kind_of_units, open_monthly,
                                 write_monthly)

NY, NX = 3, 4
LAT_DESC = np.array([45.75, 45.25, 44.75])          # 0.5-degree cell centres, north-up
LON = np.array([-149.75, -149.25, -148.75, -148.25])


def _values(months=12):
    """value = 100 * month + 10 * row + column: every cell-month is identifiable."""
    m, i, j = np.meshgrid(np.arange(1, months + 1), np.arange(NY), np.arange(NX), indexing="ij")
    return (100.0 * m + 10.0 * i + j).astype("float32")


def _tif(path, data, *, units=None, crs="EPSG:4326", transform=from_origin(-150.0, 46.0, 0.5, 0.5)):
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0],
                       dtype="float32", crs=crs, transform=transform) as dst:
        dst.write(data.astype("float32"))
        for b in range(1, data.shape[0] + 1):
            if units:
                dst.update_tags(b, units=units)
    return path


def _nc(path, data, *, dims=("month", "lat", "lon"), coords=None, name="tas", units=None, extra=None):
    coords = {"month": np.arange(1, data.shape[0] + 1), "lat": LAT_DESC, "lon": LON} if coords is None else coords
    attrs = {"units": units} if units is not None else {}
    ds = xr.Dataset({name: (dims, data, attrs), **(extra or {})}, coords=coords)
    ds.to_netcdf(path, engine="netcdf4")
    return path


def _stack(data=None, *, crs="EPSG:4326", units="degC", y=LAT_DESC, x=LON):
    data = _values() if data is None else data
    da = xr.DataArray(data, dims=("month", "y", "x"), coords={"month": np.arange(1, 13), "y": y, "x": x},
                      attrs={"units": units})
    return da.rio.write_crs(crs)


# --------------------------------------------------------------------------- layouts
def test_geotiff_bands_are_months_north_up_lazy_float32(tmp_path):
    path = _tif(tmp_path / "tmin.tif", _values(), units="degC")
    da = open_monthly(path, name="tmin", units=TEMPERATURE)
    # Source: the file as written by rasterio above (band b = month b, from_origin = north-up centres)
    assert da.dims == ("month", "y", "x") and da.dtype == np.float32 and da.name == "tmin"
    assert da["month"].values.tolist() == list(range(1, 13))
    np.testing.assert_array_equal(da["y"].values, LAT_DESC)
    np.testing.assert_array_equal(da["x"].values, LON)
    np.testing.assert_array_equal(da.values, _values())
    assert da.rio.crs.to_epsg() == 4326
    assert da.attrs == {"units": "degC", "source": str(path)}
    # Common practice, no source: lazy (dask) with the month axis in one chunk
    assert da.chunks is not None and da.chunks[0] == (12,)


def test_south_up_geotiff_is_flipped_north_up(tmp_path):
    # Analytic: a positive row step puts row 0 at the SOUTH edge; flipping keeps each value at its coordinate
    data = _values()
    path = _tif(tmp_path / "south.tif", data, transform=Affine(0.5, 0.0, -150.0, 0.0, 0.5, 44.5))
    da = open_monthly(path, name="t")
    np.testing.assert_array_equal(da["y"].values, LAT_DESC)
    np.testing.assert_array_equal(da.values, data[:, ::-1, :])


def test_geotiff_on_0_360_longitudes(tmp_path):
    # Analytic: longitude 210.25 E is -149.75 (lambda - 360), values stay with their cells
    data = _values()
    path = _tif(tmp_path / "east.tif", data, transform=from_origin(210.0, 46.0, 0.5, 0.5))
    da = open_monthly(path, name="t")
    np.testing.assert_allclose(da["x"].values, LON, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(da.values, data)


def test_global_netcdf_on_0_360_is_rotated_to_minus_180_180(tmp_path):
    # Analytic: on a global grid lambda in [180, 360) maps to lambda - 360 and moves to the west end,
    # so the column of 190.5 E (index 190) is found at -169.5 and x increases monotonically.
    lon = np.arange(0.5, 360.0, 1.0)
    data = np.broadcast_to(lon[None, None, :], (12, 2, 360)).astype("float32") + np.arange(12)[:, None, None]
    path = _nc(tmp_path / "global.nc", data, coords={"month": np.arange(1, 13), "lat": [0.5, -0.5], "lon": lon})
    da = open_monthly(path, name="tas")
    assert da["x"].values[0] == -179.5 and da["x"].values[-1] == 179.5
    assert np.all(np.diff(da["x"].values) > 0)
    np.testing.assert_array_equal(da.sel(x=-169.5).values, data[:, :, 190])
    np.testing.assert_array_equal(da.sel(x=10.5).values, data[:, :, 10])


@pytest.mark.parametrize("calendar", ["noleap", "360_day", "standard"])
def test_netcdf_time_axis_months_from_cftime_dates(tmp_path, calendar):
    # Source: CF conventions 1.11 section 4.4.1 (calendars) via cftime; the file is stored July..June,
    # so months must come from the dates, not the order of the steps.
    order = np.r_[6:12, 0:6]
    times = [cftime.datetime(2001, m, 15, calendar=calendar) for m in range(1, 13)]
    path = tmp_path / f"{calendar}.nc"
    ds = xr.Dataset({"tas": (("time", "lat", "lon"), _values()[order])},
                    coords={"time": [times[k] for k in order], "lat": LAT_DESC, "lon": LON})
    ds["time"].encoding.update(units="days since 2001-01-01", calendar=calendar)
    ds.to_netcdf(path, engine="netcdf4")
    # the calendar really is in the file
    with xr.open_dataset(path, decode_times=xr.coders.CFDatetimeCoder(use_cftime=True)) as check:
        assert check["time"].values[0].calendar == calendar
    da = open_monthly(path, name="tas")
    assert da["month"].values.tolist() == list(range(1, 13))
    np.testing.assert_array_equal(da.values, _values())


def test_netcdf_month_axis_is_ordered_by_its_coordinate(tmp_path):
    # Common practice, no source: a month coordinate says which month each step is (the file is July..June)
    order = np.r_[6:12, 0:6]
    path = _nc(tmp_path / "perm.nc", _values()[order],
               coords={"month": order + 1, "lat": LAT_DESC, "lon": LON})
    da = open_monthly(path, name="tas")
    np.testing.assert_array_equal(da.values, _values())
    # Common practice, no source: a month dim without coordinate values is January .. December in file order
    bare = tmp_path / "bare.nc"
    xr.Dataset({"tas": (("month", "lat", "lon"), _values()[order])},
               coords={"lat": LAT_DESC, "lon": LON}).to_netcdf(bare, engine="netcdf4")
    np.testing.assert_array_equal(open_monthly(bare, name="tas").values, _values()[order])


@pytest.mark.parametrize("lat", [LAT_DESC, LAT_DESC[::-1]], ids=["descending", "ascending"])
def test_netcdf_rows_north_up_either_way(tmp_path, lat):
    # Analytic: reordering rows keeps every value at its latitude; the result is north-up
    data = _values()
    path = _nc(tmp_path / "t.nc", data, coords={"month": np.arange(1, 13), "lat": lat, "lon": LON})
    da = open_monthly(path, name="tas")
    np.testing.assert_array_equal(da["y"].values, LAT_DESC)
    for i, phi in enumerate(lat):
        np.testing.assert_array_equal(da.sel(y=phi).values, data[:, i, :])


def test_netcdf_with_only_2d_lat_lon(tmp_path):
    # CF conventions 1.11 section 5.2: 2-D auxiliary lat(y, x)/lon(y, x) of a regular grid
    # (ascending latitude, 0..360 longitudes, as models write them) read as the 1-D grid
    data = _values()
    la, lo = np.meshgrid(LAT_DESC[::-1], LON + 360.0, indexing="ij")
    coords = {"month": np.arange(1, 13), "lat": (("y", "x"), la, {"standard_name": "latitude"}),
              "lon": (("y", "x"), lo, {"standard_name": "longitude"})}
    da = open_monthly(_nc(tmp_path / "aux.nc", data[:, ::-1], dims=("month", "y", "x"), coords=coords), name="tas")
    np.testing.assert_array_equal(da["y"].values, LAT_DESC)
    np.testing.assert_array_equal(da["x"].values, LON)
    np.testing.assert_array_equal(da.values, data)
    assert da.rio.crs.to_epsg() == 4326
    curvy = {**coords, "lon": (("y", "x"), lo + la / 10.0, {"standard_name": "longitude"})}
    with pytest.raises(InputError, match=r"curvy\.nc: a curvilinear grid .*regrid it first"):
        open_monthly(_nc(tmp_path / "curvy.nc", data, dims=("month", "y", "x"), coords=curvy), name="tas")


def test_netcdf_size_one_extra_dim_is_dropped_and_named_variable_is_picked(tmp_path):
    # Common practice, no source: a size-1 level dim (e.g. 2 m height) is squeezed; name= picks a variable
    data = _values()[:, None]
    path = tmp_path / "two.nc"
    xr.Dataset({"tmin": (("month", "height", "lat", "lon"), data), "tmax": (("month", "height", "lat", "lon"), data + 5)},
               coords={"month": np.arange(1, 13), "height": [2.0], "lat": LAT_DESC, "lon": LON}).to_netcdf(path)
    np.testing.assert_array_equal(open_monthly(path, name="tmax").values, _values() + 5)
    np.testing.assert_array_equal(open_monthly(path, name="x", variable="tmin").values, _values())


# --------------------------------------------------------------------------- units
@pytest.mark.parametrize("units", ["K", "kelvin", "degK"])
@pytest.mark.parametrize("fmt", ["tif", "nc"])
def test_kelvin_is_converted_to_celsius(tmp_path, units, fmt):
    # Source: SI Brochure (BIPM, 9th ed. 2019) section 2.3.1 and CF conventions (UDUNITS): t/degC = T/K - 273.15.
    # Tolerance: float32(273.15) is within half a float32 ulp at 273 (1.53e-5) of 273.15; the subtraction of
    # two float32 numbers within a factor 2 of each other is exact (Sterbenz lemma).
    celsius = np.linspace(-40.0, 45.0, 12 * NY * NX).reshape(12, NY, NX)
    kelvin = (celsius + 273.15).astype("float32")
    path = _tif(tmp_path / "k.tif", kelvin, units=units) if fmt == "tif" else _nc(tmp_path / "k.nc", kelvin, units=units)
    da = open_monthly(path, name="tmin", units=TEMPERATURE)
    assert da.attrs["units"] == "degC" and da.dtype == np.float32
    np.testing.assert_allclose(da.values, kelvin.astype(np.float64) - 273.15, rtol=0, atol=1.6e-5)
    np.testing.assert_allclose(da.values, celsius, rtol=0, atol=5e-5)   # + the float32 rounding of the file


@pytest.mark.parametrize("units", ["degC", "°C", "Celsius", "degrees_C", "degree_Celsius"])
def test_celsius_spellings_pass_unchanged(tmp_path, units):
    # Common practice, no source (CF / UDUNITS spellings of degree Celsius)
    path = _nc(tmp_path / "c.nc", _values(), units=units)
    da = open_monthly(path, name="tmin", units=TEMPERATURE)
    assert da.attrs["units"] == "degC"
    np.testing.assert_array_equal(da.values, _values())


@pytest.mark.parametrize("units", ["mm", "mm/month", "kg m-2", "millimetres"])
def test_monthly_precipitation_totals_pass_unchanged(tmp_path, units):
    # Analytic: 1 kg m-2 of water is a 1 mm layer (density 1000 kg m-3), so "kg m-2" totals are mm as they are
    path = _tif(tmp_path / "p.tif", _values(), units=units)
    da = open_monthly(path, name="prec", units=PRECIPITATION)
    assert da.attrs["units"] == "mm"
    np.testing.assert_array_equal(da.values, _values())


@pytest.mark.parametrize("units,expect,phrase", [
    ("kg m-2 s-1", PRECIPITATION, "expected monthly precipitation totals in mm"),
    ("mm/day", PRECIPITATION, "expected monthly precipitation totals in mm"),
    ("m", PRECIPITATION, "expected monthly precipitation totals in mm"),
    ("degC", PRECIPITATION, "expected monthly precipitation totals in mm"),
    ("mm", TEMPERATURE, r"expected a temperature in degC \(or K\)"),
    ("degF", TEMPERATURE, r"expected a temperature in degC \(or K\)"),
])
def test_wrong_units_are_refused_naming_the_file(tmp_path, units, expect, phrase):
    # Common practice, no source: documented units only; the message names the file and the units found
    path = _nc(tmp_path / "odd.nc", _values(), units=units)
    with pytest.raises(InputError, match=rf"odd\.nc: units '{units}'; {phrase}"):
        open_monthly(path, name="v", units=expect)


def test_missing_units_are_taken_as_the_callers_and_units_none_converts_nothing(tmp_path):
    # Common practice, no source: documented in open_monthly (a stack without units is taken to be in
    # degC / mm as the caller states), so no units is not an error
    bare = _nc(tmp_path / "bare.nc", _values())
    da = open_monthly(bare, name="tmin", units=TEMPERATURE)
    assert da.attrs["units"] == ""
    np.testing.assert_array_equal(da.values, _values())
    # Analytic: units=None checks nothing, so kelvin values come back as stored, labelled K
    kelvin = _nc(tmp_path / "k.nc", _values(), units="K")
    da = open_monthly(kelvin, name="tmin")
    assert da.attrs["units"] == "K"
    np.testing.assert_array_equal(da.values, _values())


@pytest.mark.parametrize("units,kind", [
    ("degC", TEMPERATURE), (" Celsius ", TEMPERATURE), ("K", TEMPERATURE), ("kelvin", TEMPERATURE),
    ("mm", PRECIPITATION), ("kg m-2", PRECIPITATION), ("mm month-1", PRECIPITATION),
    ("kg m-2 s-1", None), ("mm/day", None), ("degF", None), ("", None), (None, None),
])
def test_kind_of_units(units, kind):
    # Common practice, no source: CF / UDUNITS spellings of degC, K and monthly mm totals
    assert kind_of_units(units) == kind


# --------------------------------------------------------------------------- round trip
@pytest.mark.parametrize("suffix", [".tif", ".nc"])
@pytest.mark.parametrize("crs,y,x", [("EPSG:4326", LAT_DESC, LON),
                                     ("EPSG:3035", np.array([3.5e6, 3.49e6, 3.48e6]),
                                      np.array([4.0e6, 4.01e6, 4.02e6, 4.03e6]))])
def test_write_then_open_is_exact(tmp_path, suffix, crs, y, x):
    # Common practice, no source: write_monthly -> open_monthly returns the same cells, months, grid and units
    data = _values()
    data[3, 1, 2] = np.nan
    stack = _stack(data, crs=crs, y=y, x=x, units="mm")
    path = write_monthly(stack, tmp_path / f"prec{suffix}")
    back = open_monthly(path, name="prec", units=PRECIPITATION)
    assert back.dims == ("month", "y", "x") and back["month"].values.tolist() == list(range(1, 13))
    np.testing.assert_array_equal(back.values, data)          # NaN in the same place, values bit for bit
    np.testing.assert_allclose(back["y"].values, y, rtol=0, atol=1e-6)
    np.testing.assert_allclose(back["x"].values, x, rtol=0, atol=1e-6)
    assert back.rio.crs == stack.rio.crs and back.attrs["units"] == "mm"
    if suffix == ".tif":
        with rasterio.open(path) as src:   # Source: rasterio reading the written bands
            assert list(src.descriptions) == [f"M{m:02d}" for m in range(1, 13)]


# --------------------------------------------------------------------------- gridded_variables
def test_gridded_variables_lists_3d_variables_only(tmp_path):
    # Common practice, no source: 2-D masks and scalars are not climate stacks; a GeoTIFF has no variables
    path = tmp_path / "model.nc"
    xr.Dataset({"tmin": (("month", "lat", "lon"), _values()), "tmax": (("month", "lat", "lon"), _values()),
                "land": (("lat", "lon"), np.ones((NY, NX)))},
               coords={"month": np.arange(1, 13), "lat": LAT_DESC, "lon": LON}).to_netcdf(path)
    assert gridded_variables(path) == ["tmin", "tmax"]
    assert gridded_variables(_tif(tmp_path / "t.tif", _values())) is None
    with pytest.raises(InputError, match=r"nothere\.nc: file not found"):
        gridded_variables(tmp_path / "nothere.nc")
    junk = tmp_path / "junk.nc"
    junk.write_text("not a netcdf file")
    with pytest.raises(InputError, match=r"junk\.nc: cannot read as NetCDF"):
        gridded_variables(junk)


# --------------------------------------------------------------------------- bad inputs
def _times(months):
    return pd.DatetimeIndex([f"2001-{m:02d}-15" for m in months])


BAD = {
    "thirteen_bands.tif": (lambda p: _tif(p, _values(13)), r"13 bands; expected 12 monthly bands"),
    "no_crs.tif": (lambda p: _tif(p, _values(), crs=None), "no CRS in the file"),
    "eleven.nc": (lambda p: _nc(p, _values(11)), r"11 steps along 'month'; expected 12 months"),
    "series.nc": (lambda p: _nc(p, np.concatenate([_values(), _values()]), dims=("time", "lat", "lon"),
                                coords={"time": _times(list(range(1, 13)) * 2), "lat": LAT_DESC, "lon": LON}),
                  r"24 steps along 'time'; expected 12 months"),
    "two_januaries.nc": (lambda p: _nc(p, _values(), dims=("time", "lat", "lon"),
                                       coords={"time": _times([1, 1] + list(range(3, 13))), "lat": LAT_DESC,
                                               "lon": LON}),
                         r"time steps fall in months \[1, 3, 4, .*expected each month 1..12 once"),
    "month_zero.nc": (lambda p: _nc(p, _values(), coords={"month": np.arange(12), "lat": LAT_DESC, "lon": LON}),
                      r"month values \[0, 1, .*expected each month 1..12 once"),
    "members.nc": (lambda p: _nc(p, _values()[:, None].repeat(2, axis=1), dims=("month", "member", "lat", "lon"),
                                 coords={"month": np.arange(1, 13), "lat": LAT_DESC, "lon": LON}),
                   r"extra dim 'member' of size 2; expected only month, y, x"),
    "projected.nc": (lambda p: _nc(p, _values(), dims=("month", "y", "x"),
                                   coords={"month": np.arange(1, 13), "y": [3.5e6, 3.49e6, 3.48e6],
                                           "x": [4.0e6, 4.01e6, 4.02e6, 4.03e6]}),
                     "projected x/y but no grid mapping"),
    "no_month.nc": (lambda p: _nc(p, _values(), dims=("season", "lat", "lon"),
                                  coords={"lat": LAT_DESC, "lon": LON}),
                    r"dims \('season', 'lat', 'lon'\); expected a month or time dim"),
    "climate.grd": (lambda p: (p.write_text("x"), p)[1], r"suffix '\.grd'; expected a GeoTIFF"),
}


@pytest.mark.parametrize("filename", sorted(BAD))
def test_bad_files_name_the_file(tmp_path, filename):
    # Common practice, no source: one InputError line starting with the file and saying what was expected
    make, phrase = BAD[filename]
    path = make(tmp_path / filename)
    with pytest.raises(InputError, match=rf"{filename.replace('.', r'[.]')}: {phrase}"):
        open_monthly(path, name="tas")


def test_unknown_or_ambiguous_variable_and_missing_file(tmp_path):
    # Common practice, no source: the message names the file and lists what it holds
    path = tmp_path / "model.nc"
    xr.Dataset({"tmin": (("month", "lat", "lon"), _values()), "tmax": (("month", "lat", "lon"), _values())},
               coords={"month": np.arange(1, 13), "lat": LAT_DESC, "lon": LON}).to_netcdf(path)
    with pytest.raises(InputError, match=r"model\.nc: no variable 'tavg'; found tmin, tmax"):
        open_monthly(path, name="t", variable="tavg")
    with pytest.raises(InputError, match=r"model\.nc: 2 gridded variables \(tmin, tmax\); expected one, or one "
                                         r"called 'prec'"):
        open_monthly(path, name="prec")
    with pytest.raises(InputError, match=r"absent\.tif: file not found \(tmin\)"):
        open_monthly(tmp_path / "absent.tif", name="tmin")
