"""Monthly CF series as climatologies: calendars (cftime), periods, several files, CF names and units, bad input."""

import json

import cftime
import numpy as np
import pytest
import rasterio
import xarray as xr
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.errors import InputError
from envelope.io.series import expand_paths, open_monthly_series, parse_period

NY, NX = 3, 4
LAT = np.array([45.75, 45.25, 44.75])
LON = np.array([200.25, 200.75, 201.25, 201.75])    # 0-360 longitudes, as climate models write them


def write_series(path, years, fn, *, var="tas", units="K", calendar="noleap", standard_name=None,
                 cell_methods=None, extra_vars=None, dtype="float64", pattern=1.0):
    """A CF series of monthly means stamped mid-month; value of each step = fn(year, month) (+ row/col x pattern)."""
    times = [cftime.datetime(y, m, 15, calendar=calendar) for y in years for m in range(1, 13)]
    rows = (np.arange(NY)[:, None] * 0.25 + np.arange(NX)[None, :] * 0.0625) * pattern  # a cell pattern
    data = np.stack([fn(t.year, t.month) + rows for t in times]).astype(dtype)
    attrs = {} if units is None else {"units": units}
    if standard_name:
        attrs["standard_name"] = standard_name
    if cell_methods:
        attrs["cell_methods"] = cell_methods
    data_vars = {var: (("time", "lat", "lon"), data, attrs)}
    for name, (values, a) in (extra_vars or {}).items():
        data_vars[name] = (("time", "lat", "lon"), np.broadcast_to(values, data.shape).copy(), a)
    ds = xr.Dataset(data_vars, coords={"time": times, "lat": ("lat", LAT, {"units": "degrees_north"}),
                                       "lon": ("lon", LON, {"units": "degrees_east"})})
    encoding = {"time": {"units": "days since 1850-01-01", "calendar": calendar}}
    ds.to_netcdf(path, encoding=encoding)
    return path


def _alternating(base):
    """base(month) + 0.5 in even years, - 0.5 in odd years: the mean over whole pairs of years is base."""
    return lambda y, m: base(m) + (0.5 if y % 2 == 0 else -0.5)


# ------------------------------------------------------------------ climatology values


def test_noleap_series_gives_the_exact_climatology_over_the_period(tmp_path):
    path = write_series(tmp_path / "tas.nc", range(1985, 2026), _alternating(lambda m: 10.0 * m), units="degC")
    clim = open_monthly_series(path, name="tmean", units="temperature", period=(1991, 2020))
    assert clim.dims == ("month", "y", "x") and clim.chunks is not None     # lazy
    values = clim.values
    # Analytic: 30 years, 15 at +0.5 and 15 at -0.5 -> the mean is 10 * month (+ the cell pattern); noleap
    # months have the same days every year, so the day weights cancel
    cells = np.arange(NY)[:, None] * 0.25 + np.arange(NX)[None, :] * 0.0625
    np.testing.assert_array_equal(values, (10.0 * np.arange(1, 13)[:, None, None] + cells[None]).astype("float32"))
    assert clim.attrs["period"] == "1991-2020" and clim.attrs["calendar"] == "noleap"
    # longitudes 200.25 .. 201.75 (0-360) read as -159.75 .. -158.25, north-up kept
    np.testing.assert_allclose(clim["x"].values, LON - 360.0)
    np.testing.assert_allclose(clim["y"].values, LAT)


def test_temperature_weighted_by_days_precipitation_totals_by_days(tmp_path):
    # standard calendar: February has 28 days in 2019 and 29 in 2020
    t = write_series(tmp_path / "t.nc", [2019, 2020], lambda y, m: float(y == 2020), units="degC", calendar="standard")
    clim = open_monthly_series(t, name="tmean", period=(2019, 2020)).values[:, 0, 0]
    # Analytic: the mean over all February days is (28 * 0 + 29 * 1) / 57; January (31 + 31 days) 1/2
    assert clim[1] == pytest.approx(29.0 / 57.0, abs=1e-7)
    assert clim[0] == pytest.approx(0.5, abs=1e-7)
    rate = 1.0 / 86400.0       # kg m-2 s-1: 1 mm of water per day
    p = write_series(tmp_path / "p.nc", [2019, 2020], lambda y, m: rate - 0 * y, units="kg m-2 s-1",
                     calendar="standard", var="pr", standard_name="precipitation_flux")
    pclim = open_monthly_series(p, name="prec", units="precipitation", period=(2019, 2020)).values[:, 0, 0]
    # Analytic: monthly totals 1 mm/day x days; February (28 + 29) / 2 = 28.5 mm, January 31, April 30
    # (the cell pattern adds 0 at cell (0, 0))
    np.testing.assert_allclose(pclim[[0, 1, 3]], [31.0, 28.5, 30.0], rtol=1e-6)


@pytest.mark.parametrize("calendar, feb, days", [("noleap", 28.0, 365), ("360_day", 30.0, 360),
                                                  ("all_leap", 29.0, 366), ("365_day", 28.0, 365)])
def test_precipitation_flux_in_mm_per_month_with_the_calendars_days(tmp_path, calendar, feb, days):
    p = write_series(tmp_path / "p.nc", range(2001, 2004), lambda y, m: 2.0 / 86400.0, units="kg m-2 s-1",
                     calendar=calendar, var="pr")
    clim = open_monthly_series(p, name="prec", units="precipitation").values[:, 0, 0]
    # Analytic: 2 mm/day times each month's days in that calendar (cftime); a year sums to 2 x its days
    assert clim[1] == pytest.approx(2.0 * feb, rel=1e-6)
    assert clim.sum() == pytest.approx(2.0 * days, rel=1e-6)


@pytest.mark.parametrize("standard_name, units, value, expected", [
    # Source: CF Standard Name Table v84 canonical units: air_temperature K, precipitation_flux kg m-2 s-1,
    # precipitation_amount kg m-2; 0 degC = 273.15 K (SI brochure, 9th ed., 2.3.1); 1 kg m-2 of liquid water
    # is 1 mm deep (density 1000 kg m-3)
    ("air_temperature", "K", 273.15, 0.0),
    ("air_temperature", "K", 300.0, 26.85),
    ("air_temperature", "degC", 12.5, 12.5),
    ("precipitation_flux", "kg m-2 s-1", 1.0 / 86400.0, 31.0),      # January, noleap: 31 days x 1 mm/day
    ("precipitation_amount", "kg m-2", 42.0, 42.0),
    ("precipitation_flux", "mm/day", 3.0, 93.0),
])
def test_units_converted_from_the_canonical_units_of_the_cf_standard_names(tmp_path, standard_name, units,
                                                                          value, expected):
    path = write_series(tmp_path / "v.nc", [2000, 2001], lambda y, m: value, units=units, var="v",
                        standard_name=standard_name)
    kind = "temperature" if standard_name == "air_temperature" else "precipitation"
    clim = open_monthly_series(path, name="x", units=kind)
    assert clim.attrs["units"] == ("degC" if kind == "temperature" else "mm")
    assert float(clim.values[0, 0, 0]) == pytest.approx(expected, rel=1e-6, abs=1e-5)


def test_variables_found_by_cf_standard_name_and_cell_methods(tmp_path):
    path = write_series(tmp_path / "both.nc", [2000, 2001], lambda y, m: 280.0, var="lo",
                        standard_name="air_temperature", cell_methods="time: minimum",
                        extra_vars={"hi": (np.float64(290.0), {"units": "K", "standard_name": "air_temperature",
                                                               "cell_methods": "time: maximum"})})
    # Source: CF conventions 1.11 section 7.3 (cell_methods "time: minimum" / "time: maximum")
    tmin = open_monthly_series(path, name="tmin", units="temperature")
    tmax = open_monthly_series(path, name="tmax", units="temperature")
    assert float(tmin.values[0, 0, 0]) == pytest.approx(280.0 - 273.15, abs=1e-5)
    assert float(tmax.values[0, 0, 0]) == pytest.approx(290.0 - 273.15, abs=1e-5)
    # CMIP-style names without standard names: tasmin / pr
    named = write_series(tmp_path / "named.nc", [2000], lambda y, m: 1.0, var="pr", units="mm",
                         extra_vars={"pr_bnds": (np.float64(0.0), {"units": "mm"})})
    assert float(open_monthly_series(named, name="prec", units="precipitation").values[0, 0, 0]) == 1.0


# ------------------------------------------------------------------ several files, globs


def test_decade_files_as_one_series_by_repeat_or_glob(tmp_path):
    fn = _alternating(lambda m: m * 1.0)
    whole = write_series(tmp_path / "whole.nc", range(1991, 2021), fn, units="degC")
    parts = [write_series(tmp_path / f"tas_{a}-{a + 9}.nc", range(a, a + 10), fn, units="degC")
             for a in (2011, 1991, 2001)]           # given out of order: combined by their time coordinates
    one = open_monthly_series(whole, name="t", period=(1991, 2020)).values
    repeated = open_monthly_series(parts, name="t", period=(1991, 2020))
    globbed = open_monthly_series(str(tmp_path / "tas_*.nc"), name="t", period=(1991, 2020))
    # Source: the single file holding the same 30 years (xarray.open_mfdataset combines by coordinates)
    np.testing.assert_array_equal(repeated.values, one)
    np.testing.assert_array_equal(globbed.values, one)
    assert globbed.attrs["n_files"] == 3
    assert [p.name for p in expand_paths(str(tmp_path / "tas_*.nc"))] == [
        "tas_1991-2000.nc", "tas_2001-2010.nc", "tas_2011-2020.nc"]


def test_a_twelve_step_file_is_still_a_climatology(tmp_path):
    path = write_series(tmp_path / "clim.nc", [2000], lambda y, m: float(m), units="degC")
    da = open_monthly_series(path, name="tmin", units="temperature")
    np.testing.assert_array_equal(da.values[:, 0, 0], np.arange(1, 13, dtype="float32"))


# ------------------------------------------------------------------ bad input


def test_bad_series_one_line_errors(tmp_path):
    fn = lambda y, m: 280.0  # noqa: E731
    a = write_series(tmp_path / "a.nc", range(1991, 2001), fn, calendar="noleap")
    b = write_series(tmp_path / "b.nc", range(2001, 2011), fn, calendar="360_day")
    with pytest.raises(InputError, match=r"mixed calendars in one series \(a\.nc noleap, b\.nc 360_day\)"):
        open_monthly_series([a, b], name="t", period=(1991, 2010))
    with pytest.raises(InputError, match=r"a\.nc: period 1981-2010 is not covered \(the files run 1991-01 … 2000-12\)"):
        open_monthly_series(a, name="t", period=(1981, 2010))
    gap = tmp_path / "gap.nc"
    full = xr.open_dataset(a, decode_times=xr.coders.CFDatetimeCoder(use_cftime=True)).load()
    full.isel(time=[i for i in range(120) if i not in (26, 27)]).to_netcdf(gap)
    with pytest.raises(InputError, match=r"gap\.nc: months missing from 1991-2000: 1993-03, 1993-04"):
        open_monthly_series(gap, name="t", period=(1991, 2000))
    bare = write_series(tmp_path / "bare.nc", range(1991, 1993), fn, units=None)
    with pytest.raises(InputError, match=r"bare\.nc: variable 'tas' has no units attribute"):
        open_monthly_series(bare, name="t", period=(1991, 1992))
    with pytest.raises(InputError, match=r"nothing_\*\.nc': the pattern matches no file"):
        open_monthly_series(str(tmp_path / "nothing_*.nc"), name="t")
    with pytest.raises(InputError, match="expected FIRST-LAST years"):
        parse_period("1991")


def test_two_files_holding_the_same_months_are_refused(tmp_path):
    # Common practice, no source: a glob that matches a second version of a decade file (or another
    # ensemble member) must not be combined silently. Before this check, xarray's combine kept one
    # file's values for the shared months (found by probing: BIO1 moved by 1.25 degC without a word).
    first = write_series(tmp_path / "tas_1991-2000.nc", range(1991, 2001), lambda y, m: 280.0)
    write_series(tmp_path / "tas_1991-2000_v2.nc", range(1991, 2001), lambda y, m: 285.0)
    write_series(tmp_path / "tas_2001-2010.nc", range(2001, 2011), lambda y, m: 280.0)
    with pytest.raises(InputError, match=r"tas_1991-2000_v2\.nc: month 1991-01 is also in tas_1991-2000\.nc; "
                                         r"expected each month in one file") as info:
        open_monthly_series(str(tmp_path / "tas_*.nc"), name="t", period=(1991, 2010))
    assert "\n" not in str(info.value)
    # the two decade files alone combine, and give the analytic climatology (280 K = 6.85 degC + cell pattern)
    clim = open_monthly_series([first, tmp_path / "tas_2001-2010.nc"], name="t", period=(1991, 2010))
    np.testing.assert_allclose(clim.values[:, 0, 0], 280.0 - 273.15, atol=1e-5)  # float32 output


# ------------------------------------------------------------------ commands


def _bio_series(tmp_path):
    """tmin = month, tmax = 10 + month (K), prec totals 10 x month mm (kg m-2 s-1), noleap, 1991-2020."""
    days = [31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31]
    files = {}
    for decade in (1991, 2001, 2011):
        years = range(decade, decade + 10)
        files.setdefault("tmin", []).append(write_series(
            tmp_path / f"tasmin_{decade}.nc", years, _alternating(lambda m: 273.15 + m), var="tasmin"))
        files.setdefault("tmax", []).append(write_series(
            tmp_path / f"tasmax_{decade}.nc", years, _alternating(lambda m: 283.15 + m), var="tasmax"))
        files.setdefault("prec", []).append(write_series(
            tmp_path / f"pr_{decade}.nc", years, lambda y, m: 10.0 * m / (86400.0 * days[m - 1]) * (1.5 if y % 2 else 0.5),
            var="pr", units="kg m-2 s-1", pattern=2.0 ** -20))   # a plausible rate (~1e-6 kg m-2 s-1) per cell
    # the earlier years the period leaves out
    write_series(tmp_path / "tasmin_1981.nc", range(1981, 1991), lambda y, m: 400.0, var="tasmin")
    return files


def test_bioclim_from_noleap_series_gives_analytic_bio1_to_bio19(tmp_path):
    files = _bio_series(tmp_path)
    out = tmp_path / "bio.tif"
    args = ["bioclim", "--tmin", str(tmp_path / "tasmin_*.nc"), "--tmax", str(tmp_path / "tasmax_*.nc"),
            "--period", "1991-2020", "--out", str(out)]
    for f in files["prec"]:
        args += ["--prec", str(f)]
    result = CliRunner().invoke(cli, args)
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as src:
        names = list(src.descriptions)
        bio = {n: float(src.read(i + 1)[0, 0]) for i, n in enumerate(names)}
        tags = src.tags()
    assert tags["period"] == "1991-2020" and tags["calendar"] == "noleap"
    m = np.arange(1, 13)
    sd = np.sqrt(((m - m.mean()) ** 2).mean())   # population SD of 1..12 (ddof 0) = sqrt(143/12)
    # Analytic, from the definitions of O'Donnell & Ignizio (2012) USGS Data Series 691 for the climatology
    # tmin = m (+ cell 0), tmax = 10 + m, tmean = 5 + m, prec = 10 m mm; quarters wrap round the year end
    expected = {
        "BIO1": 11.5, "BIO2": 10.0, "BIO3": 100.0 * 10.0 / 21.0, "BIO4": 100.0 * sd, "BIO5": 22.0, "BIO6": 1.0,
        "BIO7": 21.0, "BIO8": 16.0, "BIO9": 7.0, "BIO10": 16.0, "BIO11": 7.0, "BIO12": 780.0, "BIO13": 120.0,
        "BIO14": 10.0, "BIO15": 100.0 * 10.0 * sd / 65.0, "BIO16": 330.0, "BIO17": 60.0, "BIO18": 330.0,
        "BIO19": 60.0,
    }
    for key, value in expected.items():
        assert bio[key] == pytest.approx(value, rel=1e-5, abs=1e-4), key


def test_bioclim_bad_series_exit_2_one_line(tmp_path):
    _bio_series(tmp_path)
    base = ["--tmax", str(tmp_path / "tasmax_*.nc"), "--prec", str(tmp_path / "pr_*.nc"), "--out",
            str(tmp_path / "bio.tif")]
    result = CliRunner().invoke(cli, ["bioclim", "--tmin", str(tmp_path / "tasmin_*.nc"), "--period", "1971-2000"]
                                + base)
    # Common practice, no source: one line naming the file and what was expected, exit 2, nothing written
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "period 1971-2000 is not covered" in lines[0]
    assert not (tmp_path / "bio.tif").exists()
    (tmp_path / "tasmin_1981.nc").unlink()
    write_series(tmp_path / "tasmin_1981.nc", range(1981, 1991), lambda y, m: 280.0, var="tasmin", calendar="360_day")
    mixed = CliRunner().invoke(cli, ["bioclim", "--tmin", str(tmp_path / "tasmin_*.nc"), "--period", "1991-2020"]
                               + base)
    assert mixed.exit_code == 2 and len(mixed.output.strip().splitlines()) == 1
    assert "mixed calendars in one series (tasmin_1981.nc 360_day, tasmin_1991.nc noleap)" in mixed.output


def test_delta_single_form_from_model_series(tmp_path):
    from envelope.io.monthly import open_monthly

    base = np.zeros((12, NY, NX), "float32")
    with rasterio.open(tmp_path / "tmin.tif", "w", driver="GTiff", height=NY, width=NX, count=12, dtype="float32",
                       crs="EPSG:4326", transform=rasterio.transform.from_origin(-160.0, 46.0, 0.5, 0.5)) as dst:
        dst.write(base)
        for b in range(1, 13):
            dst.update_tags(b, units="degC")
    for decade in (1991, 2001, 2011):
        write_series(tmp_path / f"hist_{decade}.nc", range(decade, decade + 10), lambda y, m: 280.0,
                     var="tasmin", standard_name="air_temperature", cell_methods="time: minimum")
    write_series(tmp_path / "fut_2041-2070.nc", range(2036, 2076), lambda y, m: 282.0 + (y >= 2041) * 1.0,
                 var="tasmin")
    out = tmp_path / "tmin_2050.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(tmp_path / "tmin.tif"),
                                      "--model-historical", str(tmp_path / "hist_*.nc"), "--period", "1991-2020",
                                      "--model-future", str(tmp_path / "fut_2041-2070.nc"),
                                      "--future-period", "2041-2070", "--out", str(out)])
    assert result.exit_code == 0, result.output
    future = open_monthly(out, name="tmin").values
    # Analytic: additive delta 283 K - 280 K = 3 degC added to a 0 degC baseline (the model's cell pattern is
    # the same in both periods and cancels)
    np.testing.assert_allclose(future, 3.0, atol=1e-5)
    with rasterio.open(out) as src:
        tags = src.tags()
    assert tags["historical_period"] == "1991-2020" and tags["future_period"] == "2041-2070"
    missing = CliRunner().invoke(cli, ["delta", "--baseline", str(tmp_path / "tmin.tif"),
                                       "--model-historical", str(tmp_path / "hist_*.nc"), "--period", "1991-2020",
                                       "--model-future", str(tmp_path / "fut_2041-2070.nc"),
                                       "--future-period", "2061-2090", "--out", str(tmp_path / "x.tif")])
    assert missing.exit_code == 2 and "period 2061-2090 is not covered" in missing.output
    json.dumps(tags)


def _as_2d_latlon(src, dst):
    """The same file with its 1-D lat/lon replaced by CF auxiliary 2-D lat(y, x) / lon(y, x)."""
    with xr.open_dataset(src, decode_times=False) as ds:
        ds = ds.load()
    la, lo = np.meshgrid(ds["lat"].values, ds["lon"].values, indexing="ij")
    out = ds.rename({"lat": "y", "lon": "x"}).drop_vars(["y", "x"]).assign_coords(
        lat=(("y", "x"), la, {"standard_name": "latitude", "units": "degrees_north"}),
        lon=(("y", "x"), lo, {"standard_name": "longitude", "units": "degrees_east"}))
    out.to_netcdf(dst)
    return dst


def test_series_with_only_2d_lat_lon_reads_as_its_1d_twin(tmp_path):
    # CF conventions 1.11 section 5.2 (auxiliary coordinate variables): a regular grid written
    # as 2-D lat/lon is the same grid; the 1-D twin is the reference
    for decade in (1991, 2001):
        write_series(tmp_path / f"tas_{decade}.nc", range(decade, decade + 10), _alternating(lambda m: 280.0 + m))
        _as_2d_latlon(tmp_path / f"tas_{decade}.nc", tmp_path / f"aux_{decade}.nc")
    ref = open_monthly_series(str(tmp_path / "tas_*.nc"), name="tmin")
    aux = open_monthly_series(str(tmp_path / "aux_*.nc"), name="tmin")
    np.testing.assert_array_equal(aux.values, ref.values)
    np.testing.assert_array_equal(aux["x"].values, ref["x"].values)
    np.testing.assert_array_equal(aux["y"].values, ref["y"].values)
    assert aux.rio.crs == ref.rio.crs


def test_delta_refuses_a_model_variable_of_another_quantity(tmp_path):
    # Common practice, no source: a ratio of temperatures applied to precipitation is meaningless
    with rasterio.open(tmp_path / "prec.tif", "w", driver="GTiff", height=NY, width=NX, count=12, dtype="float32",
                       crs="EPSG:4326", transform=rasterio.transform.from_origin(-160.0, 46.0, 0.5, 0.5)) as dst:
        dst.write(np.full((12, NY, NX), 50.0, "float32"))
        for b in range(1, 13):
            dst.update_tags(b, units="mm")
    for name in ("hist", "fut"):
        write_series(tmp_path / f"{name}.nc", range(1991, 1993), lambda y, m: 280.0, var="tasmin")
    out = tmp_path / "prec_2050.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(tmp_path / "prec.tif"), "--model-historical",
                                      str(tmp_path / "hist.nc"), "--model-future", str(tmp_path / "fut.nc"),
                                      "--out", str(out)])
    assert result.exit_code == 2 and not out.exists()
    assert "hist.nc: the model variable holds temperature ('degC') but the baseline" in result.output
    assert "holds precipitation ('mm')" in result.output and len(result.output.strip().splitlines()) == 1
