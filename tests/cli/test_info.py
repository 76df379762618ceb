"""`envelope info` on each input format, and its one-line errors on bad input."""

import json

import numpy as np
import pytest
import xarray as xr
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.writing import write_raster
from envelope.kernels.areas import ellipsoid_band_area
from tests.conftest import make_stack


def _run(*args):
    return CliRunner().invoke(cli, ["info", *map(str, args)])


@pytest.fixture
def stack():
    s = make_stack(nx=10, ny=6, res=1.0, lon0=-150.0, lat0=45.0).assign_coords(units=("variable", ["degC", "mm"]))
    s[1, 0, :] = np.nan  # the whole northern row of "p" is nodata
    return s


def _expected_valid_area(stack):
    # Source: WGS84 closed-form graticule areas (REFERENCES.md item 6); rows 2..6 of 1° x 10 cells
    return float(ellipsoid_band_area(39.0, 44.0, 10.0)) / 1e6


@pytest.mark.parametrize("suffix", [".tif", ".nc"])
def test_info_json_multivariable(tmp_path, stack, suffix):
    path = write_raster(stack, tmp_path / f"clim{suffix}")
    result = _run(path, "--json")
    assert result.exit_code == 0, result.output
    info = json.loads(result.output)
    assert info["format"] == ("GeoTIFF" if suffix == ".tif" else "NetCDF")
    assert info["crs"] == "EPSG:4326" and info["shape"] == [6, 10]
    assert info["resolution"] == pytest.approx([1.0, 1.0])
    assert info["bounds"] == pytest.approx([-150.0, 39.0, -140.0, 45.0])
    names = {v["name"]: v for v in info["variables"]}
    assert names["t"]["units"] == "degC" and names["p"]["units"] == "mm"
    # Common practice, no source: min/max/nodata share of the array written
    assert names["t"]["min"] == pytest.approx(float(np.nanmin(stack.values[0])))
    assert names["p"]["max"] == pytest.approx(float(np.nanmax(stack.values[1])))
    assert names["p"]["nodata_share"] == pytest.approx(1 / 6) and names["t"]["nodata_share"] == 0
    assert info["nodata_share"] == pytest.approx(1 / 6)
    assert info["valid_area_km2"] == pytest.approx(_expected_valid_area(stack), rel=1e-9)


def test_info_single_band_table(tmp_path, stack):
    path = write_raster(stack.isel(variable=0, drop=True).rename("tmean"), tmp_path / "tmean.tif")
    result = _run(path)
    assert result.exit_code == 0, result.output
    assert "EPSG:4326" in result.output and "6 rows x 10 columns" in result.output
    assert "tmean" in result.output and "km²" in result.output


@pytest.mark.parametrize("make, phrase", [
    # Common practice, no source: one line on stderr naming the path, exit status 2
    (lambda p: None, "file not found"),
    (lambda p: p.write_text("station,value\na,1\n"), "not a readable raster"),
    (lambda p: p.write_bytes(b""), "file is empty"),
])
def test_info_bad_inputs(tmp_path, make, phrase):
    path = tmp_path / "broken.tif"
    make(path)
    result = _run(path)
    assert result.exit_code == 2
    assert phrase in result.output and str(path) in result.output
    assert len(result.output.strip().splitlines()) == 1


def test_info_bad_netcdf(tmp_path):
    path = tmp_path / "notes.nc"
    path.write_text("this is not a NetCDF file\n")
    result = _run(path)
    assert result.exit_code == 2 and "not a readable NetCDF file" in result.output
    assert len(result.output.strip().splitlines()) == 1


def test_quick_reports_where_numbers_come_from(stack, tmp_path):
    path = tmp_path / "s.tif"
    write_raster(stack, path)  # a small COG: no overview, no statistics tags
    result = _run(path, "--quick", "--json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.output)
    assert summary["source"] == {"ranges": "data", "area": "data"}
    assert summary["valid_area_km2"] == pytest.approx(_expected_valid_area(stack), rel=1e-9)
    assert "--quick" in _run("--help").output
