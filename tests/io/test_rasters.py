"""Raster readers and writers against files written by rasterio and xarray themselves."""

import logging

import netCDF4
import numpy as np
import pandas as pd
import pytest
import rasterio
import xarray as xr
from pyproj import CRS
from rasterio.transform import from_origin

from envelope.errors import GridMismatchError, InputError, OutputExistsError
from envelope.io.rasters import open_climate, open_layer, read_tags
from envelope.io.writing import write_raster
from tests.conftest import make_stack

RNG = np.random.default_rng(7)


def _tif(path, data, *, descriptions=None, units=None, nodata=None, crs="EPSG:4326",
         transform=from_origin(-150.0, 45.0, 0.1, 0.1), dtype="float32"):
    data = np.asarray(data, dtype=dtype)
    if data.ndim == 2:
        data = data[None]
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1],
                       count=data.shape[0], dtype=dtype, crs=crs, transform=transform, nodata=nodata) as dst:
        dst.write(data)
        for i in range(data.shape[0]):
            if descriptions:
                dst.set_band_description(i + 1, descriptions[i])
            if units:
                dst.update_tags(i + 1, units=units[i])
    return path


def _nc(path, ds):
    ds.to_netcdf(path, engine="netcdf4")
    return path


def _lat_lon_ds(lat, lon, **variables):
    return xr.Dataset({k: (("lat", "lon"), v, {"units": "degC"}) for k, v in variables.items()},
                      coords={"lat": ("lat", lat, {"units": "degrees_north"}),
                              "lon": ("lon", lon, {"units": "degrees_east"})})


# --------------------------------------------------------------------------- GeoTIFF readers


def test_multiband_descriptions_units_nodata(tmp_path):
    data = RNG.normal(size=(3, 6, 8)).astype("float32")
    data[1, 2, 3] = -9999.0
    path = _tif(tmp_path / "clim.tif", data, descriptions=["bio1", "bio12", "gdd5"],
                units=["degC", "mm", "degC day"], nodata=-9999.0)
    stack = open_climate(path)
    # Source: the file as written by rasterio above (descriptions, tags, nodata)
    assert stack.dims == ("variable", "y", "x") and stack.dtype == np.float32
    assert list(stack["variable"].values) == ["bio1", "bio12", "gdd5"]
    assert list(stack["units"].values) == ["degC", "mm", "degC day"]
    assert stack.chunks is not None and stack.rio.crs.to_epsg() == 4326
    assert np.isnan(stack.values[1, 2, 3])
    np.testing.assert_array_equal(stack.values[0], data[0])
    assert stack["y"].values[0] == pytest.approx(44.95) and stack["x"].values[0] == pytest.approx(-149.95)
    picked = open_climate(path, variables=["gdd5", "bio1"], rename={"bio12": "prec"})
    assert list(picked["variable"].values) == ["gdd5", "bio1"]
    with pytest.raises(InputError, match="variables: tmax not found .*bio1, prec, gdd5"):
        open_climate(path, variables=["tmax"], rename={"bio12": "prec"})


def test_multiband_without_descriptions_warns(tmp_path, caplog):
    path = _tif(tmp_path / "anon.tif", RNG.normal(size=(2, 4, 5)))
    with caplog.at_level(logging.WARNING, logger="envelope.io.rasters"):
        stack = open_climate(path)
    # Common practice, no source: unnamed bands fall back to band_1.. with a warning
    assert list(stack["variable"].values) == ["band_1", "band_2"]
    assert "band_1" in caplog.text


def test_single_band_set_and_grid_mismatch(tmp_path):
    a = _tif(tmp_path / "tmin.tif", RNG.normal(size=(5, 7)))
    b = _tif(tmp_path / "prec.tif", RNG.normal(size=(5, 7)))
    stack = open_climate([a, b])
    assert list(stack["variable"].values) == ["tmin", "prec"]  # file stems name the variables
    c = _tif(tmp_path / "wind.tif", RNG.normal(size=(5, 7)), transform=from_origin(-150.0, 45.0, 0.2, 0.2))
    with pytest.raises(GridMismatchError, match=r"wind\.tif: resolution 0\.2 differs from .*tmin\.tif 0\.1"):
        open_climate([a, b, c])


def test_open_layer_band_and_categorical(tmp_path):
    classes = RNG.integers(1, 6, size=(4, 6)).astype("uint8")
    classes[0, 0] = 255
    path = _tif(tmp_path / "cover.tif", classes, descriptions=["cover"], nodata=255, dtype="uint8")
    layer = open_layer(path, categorical=True)
    assert layer.dims == ("y", "x") and layer.dtype == np.uint8 and layer.rio.nodata == 255
    np.testing.assert_array_equal(layer.values, classes)  # Source: the rasterio-written file
    as_float = open_layer(path)
    assert as_float.dtype == np.float32 and np.isnan(as_float.values[0, 0])
    multi = _tif(tmp_path / "two.tif", RNG.normal(size=(2, 3, 3)), descriptions=["a", "b"])
    assert open_layer(multi, band="b").name == "b"
    with pytest.raises(InputError, match="holds 2 layers"):
        open_layer(multi)
    with pytest.raises(InputError, match="band 3 does not exist"):
        open_layer(multi, band=3)


# --------------------------------------------------------------------------- NetCDF readers


def test_netcdf_ascending_lat_and_360_longitudes(tmp_path):
    lat = np.array([40.5, 41.5, 42.5])                 # ascending (south-up) rows
    lon = np.array([45.0, 135.0, 225.0, 315.0])        # a global 0–360 grid
    values = np.arange(12, dtype="float32").reshape(3, 4)
    path = _nc(tmp_path / "c.nc", _lat_lon_ds(lat, lon, t=values))
    stack = open_climate(path)
    # Common practice, no source: north-up (y descending), longitudes -180..180 sorted west to east
    np.testing.assert_allclose(stack["y"].values, [42.5, 41.5, 40.5])
    np.testing.assert_allclose(stack["x"].values, [-135.0, -45.0, 45.0, 135.0])
    # value at (lat 42.5, lon 225 = -135) is values[2, 2]
    assert float(stack.sel(variable="t", y=42.5, x=-135.0)) == values[2, 2]
    assert stack.rio.crs.to_epsg() == 4326  # lat/lon without CRS => EPSG:4326
    assert list(stack["units"].values) == ["degC"]
    regional = open_climate(_nc(tmp_path / "r.nc", _lat_lon_ds(lat, np.array([200.5, 201.5]), t=values[:, :2])))
    np.testing.assert_allclose(regional["x"].values, [-159.5, -158.5])
    straddling = _nc(tmp_path / "s.nc", _lat_lon_ds(lat, np.array([178.5, 179.5, 180.5]), t=values[:, :3]))
    # a grid over the 180° meridian keeps its columns side by side (issue 15): x runs past 180
    np.testing.assert_allclose(open_climate(straddling)["x"].values, [178.5, 179.5, 180.5])


def test_netcdf_descending_lat_kept(tmp_path):
    lat = np.array([42.5, 41.5, 40.5])
    values = RNG.normal(size=(3, 2)).astype("float32")
    stack = open_climate(_nc(tmp_path / "d.nc", _lat_lon_ds(lat, np.array([10.5, 11.5]), t=values)))
    np.testing.assert_array_equal(stack.values[0], values)  # Source: the xarray-written file


def test_netcdf_fill_missing_and_packed(tmp_path):
    lat, lon = np.array([1.5, 0.5]), np.array([0.5, 1.5, 2.5])
    filled = np.array([[1.0, -9999.0, 3.0], [4.0, 5.0, 6.0]], dtype="float32")
    missing = np.array([[-1.0, 2.0, 3.0], [4.0, 5.0, 1e20]], dtype="float32")
    true_packed = np.array([[12.25, -3.5, 0.0], [7.75, 20.0, -10.0]])
    ds = xr.Dataset(coords={"lat": lat, "lon": lon})
    ds["a"] = (("lat", "lon"), filled)
    ds["b"] = (("lat", "lon"), missing)
    ds["c"] = (("lat", "lon"), true_packed)
    ds["b"].attrs["missing_value"] = np.float32(1e20)
    encoding = {"a": {"_FillValue": -9999.0},
                "c": {"dtype": "int16", "scale_factor": 0.25, "add_offset": 5.0, "_FillValue": -32768}}
    path = tmp_path / "packed.nc"
    ds.to_netcdf(path, engine="netcdf4", encoding=encoding)
    with netCDF4.Dataset(path) as raw:  # Source: netCDF4 itself confirms the packing on disk
        assert raw["c"].dtype == np.int16 and raw["c"].scale_factor == 0.25
    stack = open_climate(path)
    a, b, c = (stack.sel(variable=v).values for v in "abc")
    assert np.isnan(a[0, 1]) and a[0, 2] == 3.0                 # _FillValue honoured
    assert np.isnan(b[1, 2]) and b[0, 0] == -1.0                # missing_value honoured
    np.testing.assert_allclose(c, true_packed, atol=0.125)  # scale/offset decoded (±scale/2)
    assert stack.dtype == np.float32


def test_netcdf_time_axis(tmp_path):
    lat, lon = np.array([1.5, 0.5]), np.array([0.5, 1.5])
    times = pd.date_range("2001-01-01", periods=3, freq="YS")
    data = np.arange(12, dtype="float32").reshape(3, 2, 2)
    ds = xr.Dataset({"t": (("time", "lat", "lon"), data)}, coords={"time": times, "lat": lat, "lon": lon})
    three = _nc(tmp_path / "three.nc", ds)
    one = _nc(tmp_path / "one.nc", ds.isel(time=[1]))
    np.testing.assert_array_equal(open_climate(one).values[0], data[1])  # length-one time squeezed
    with pytest.raises(InputError, match=r"three\.nc: 3 time steps"):
        open_climate(three)
    np.testing.assert_array_equal(open_climate(three, time=2).values[0], data[2])
    np.testing.assert_array_equal(open_climate(three, time="2002-01-01").values[0], data[1])
    with pytest.raises(InputError, match="matches 0 time steps"):
        open_climate(three, time="1990-01-01")


def test_netcdf_projected_xy_with_grid_mapping(tmp_path):
    crs = CRS.from_epsg(3035)
    x = 4321000.0 + 1000.0 * (np.arange(4) + 0.5)
    y = 3210000.0 - 1000.0 * (np.arange(3) + 0.5)
    ds = xr.Dataset({"t": (("y", "x"), RNG.normal(size=(3, 4)).astype("float32"), {"grid_mapping": "lambert"})},
                    coords={"x": ("x", x, {"standard_name": "projection_x_coordinate", "units": "m"}),
                            "y": ("y", y, {"standard_name": "projection_y_coordinate", "units": "m"})})
    ds["lambert"] = xr.DataArray(np.int32(0), attrs={**crs.to_cf(), "crs_wkt": crs.to_wkt()})
    stack = open_climate(_nc(tmp_path / "proj.nc", ds))
    # Source: pyproj CRS.to_cf / crs_wkt as written above
    assert CRS.from_user_input(stack.rio.crs.to_wkt()).equals(crs)
    assert stack.rio.transform().a == pytest.approx(1000.0)
    bare = ds.drop_vars("lambert")
    bare["t"].attrs.pop("grid_mapping")
    with pytest.raises(InputError, match=r"bare\.nc: unknown CRS"):
        open_climate(_nc(tmp_path / "bare.nc", bare))


def test_netcdf_regular_grid_given_as_2d_lat_lon(tmp_path):
    """A regular grid whose only coordinates are CF auxiliary 2-D lat(y, x) / lon(y, x)
    (CF conventions 1.8, section 5.2) reads as the same grid written with 1-D axes."""
    lat = np.array([40.5, 41.5, 42.5])
    lon = np.array([200.5, 201.5, 202.5, 203.5])
    values = RNG.normal(size=(3, 4)).astype("float32")
    one_d = open_climate(_nc(tmp_path / "one_d.nc", _lat_lon_ds(lat, lon, t=values)))
    lon2, lat2 = np.meshgrid(lon, lat)
    ds = xr.Dataset({"t": (("y", "x"), values, {"units": "degC", "coordinates": "lat lon"})},
                    coords={"lat": (("y", "x"), lat2, {"units": "degrees_north", "standard_name": "latitude"}),
                            "lon": (("y", "x"), lon2, {"units": "degrees_east", "standard_name": "longitude"})})
    two_d = open_climate(_nc(tmp_path / "two_d.nc", ds))
    # Source: the 1-D file above, read by the same reader (values, axes, CRS and transform equal)
    np.testing.assert_array_equal(two_d.values, one_d.values)
    np.testing.assert_array_equal(two_d["x"].values, one_d["x"].values)
    np.testing.assert_array_equal(two_d["y"].values, one_d["y"].values)
    assert two_d.rio.crs == one_d.rio.crs and two_d.rio.transform() == one_d.rio.transform()
    # a curvilinear grid (rows not of one latitude) is refused, naming what to do
    ds["lat"] = (("y", "x"), lat2 + 0.01 * lon2, ds["lat"].attrs)
    with pytest.raises(InputError, match=r"curved\.nc: a curvilinear grid .*regrid it first"):
        open_climate(_nc(tmp_path / "curved.nc", ds))


@pytest.mark.parametrize("content, phrase", [
    # Common practice, no source: bad inputs give one line naming the path and what was expected
    (None, "file not found"), (b"", "file is empty"), (b"not a raster at all\n", "not a readable"),
])
@pytest.mark.parametrize("name", ["bad.tif", "bad.nc"])
def test_bad_files(tmp_path, content, phrase, name):
    path = tmp_path / name
    if content is not None:
        path.write_bytes(content)
    with pytest.raises(InputError, match=phrase) as info:
        open_climate(path)
    assert str(path) in str(info.value) and "expected" in str(info.value)


def test_netcdf_without_2d_variables(tmp_path):
    path = _nc(tmp_path / "flat.nc", xr.Dataset({"v": ("station", np.arange(3.0))}))
    with pytest.raises(InputError, match=r"flat\.nc: no 2-D data variables"):
        open_climate(path)


def test_geotiff_without_crs(tmp_path):
    path = _tif(tmp_path / "nocrs.tif", np.ones((3, 3)), crs=None)
    with pytest.raises(InputError, match=r"nocrs\.tif: no CRS"):
        open_climate(path)


# --------------------------------------------------------------------------- writers


def test_geotiff_round_trip_tags_and_layout(tmp_path):
    stack = make_stack(nx=300, ny=280).assign_coords(units=("variable", ["degC", "mm"]))
    stack[0, 5, 5] = np.nan
    path = tmp_path / "out.tif"
    write_raster(stack.chunk({"x": 100, "y": 100}), path, tags={"threshold": 0.42, "rule": "max TSS",
                                                                 "inputs": {"a": 1}})
    back = open_climate(path)
    # Source: values written are read back (rasterio), NaN nodata kept
    np.testing.assert_array_equal(back.values, stack.values)
    assert list(back["variable"].values) == ["t", "p"] and list(back["units"].values) == ["degC", "mm"]
    assert read_tags(path)["threshold"] == 0.42 and read_tags(path)["inputs"] == {"a": 1}
    assert read_tags(path)["rule"] == "max TSS"
    with rasterio.open(path) as src:  # Source: rasterio profile / GDAL IMAGE_STRUCTURE metadata
        assert src.profile["tiled"] and src.profile["blockxsize"] <= 512
        assert src.profile["compress"].lower() == "deflate"
        assert src.overviews(1)  # internal overviews
        assert src.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"
        assert src.tags(ns="IMAGE_STRUCTURE").get("PREDICTOR") == "3"


def test_categorical_geotiff_and_netcdf(tmp_path):
    codes = make_stack(variables=("landcover",)).isel(variable=0, drop=True)
    codes = (np.abs(codes) * 2).clip(0, 3).round().astype("uint8").rio.write_crs("EPSG:4326")
    codes.name = "landcover"
    cats = {0: "water", 1: "grassland", 2: "scrub", 3: "woodland"}
    tif = write_raster(codes, tmp_path / "cover.tif", categories=cats, nodata=255, dtype="uint8")
    assert read_tags(tif)["categories"] == cats  # Common practice, no source: JSON tag round trip
    layer = open_layer(tif, categorical=True)
    assert layer.dtype == np.uint8 and layer.rio.nodata == 255
    np.testing.assert_array_equal(layer.values, codes.values)
    nc = write_raster(codes, tmp_path / "cover.nc", categories=cats, nodata=255, dtype="uint8")
    assert read_tags(nc)["categories"] == cats
    with netCDF4.Dataset(nc) as raw:  # Source: CF-1.8 flag_values / flag_meanings read by netCDF4
        assert list(raw["landcover"].flag_values) == [0, 1, 2, 3]
        assert raw["landcover"].flag_meanings.split() == ["water", "grassland", "scrub", "woodland"]


def test_netcdf_writer_cf_attributes(tmp_path):
    stack = make_stack().assign_coords(units=("variable", ["degC", "mm"]))
    stack[1, 0, 0] = np.nan
    path = write_raster(stack.chunk({"x": 10}), tmp_path / "out.nc", tags={"threshold": 0.3})
    with netCDF4.Dataset(path) as raw:  # Source: netCDF4 reading the file written
        assert raw.Conventions == "CF-1.8" and raw.threshold == "0.3"
        assert raw["t"].grid_mapping == "crs" and "crs_wkt" in raw["crs"].ncattrs()
        assert raw["t"].units == "degC" and raw["lat"].units == "degrees_north"
        assert np.isnan(raw["t"]._FillValue) and raw["t"].filters()["zlib"]
    back = open_climate(path)
    np.testing.assert_array_equal(back.values, stack.values)
    assert read_tags(path)["threshold"] == 0.3


def test_writer_refuses_overwrite_and_bad_suffix(tmp_path):
    stack = make_stack()
    path = write_raster(stack, tmp_path / "a.tif")
    with pytest.raises(OutputExistsError, match="add --overwrite"):
        write_raster(stack, path)
    write_raster(stack * 2, path, overwrite=True)
    np.testing.assert_allclose(open_climate(path).values, stack.values * 2)
    with pytest.raises(InputError, match=r"unknown output format '\.png'"):
        write_raster(stack, tmp_path / "a.png")


@pytest.mark.parametrize("suffix", [".tif", ".nc"])
def test_writer_is_atomic(tmp_path, suffix):
    stack = make_stack(nx=40, ny=40).chunk({"y": 10})

    def explode(block):
        if block.size and block.min() < -100:  # only the block holding the marked cell
            raise RuntimeError("disk on fire")
        return block

    values = stack.copy()
    values.data = values.data.copy()
    values[..., 35, 0] = -1000.0
    broken = values.copy(data=values.data.map_blocks(explode, dtype="float32"))
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_raster(broken, tmp_path / f"x{suffix}")
    # Common practice, no source: nothing half-written, no temporary file left behind
    assert list(tmp_path.iterdir()) == []


def test_read_windows_follow_file_blocks(tmp_path):
    # Source: the file's own block layout as rasterio reports it (GDAL block_shapes)
    from envelope.io.rasters import open_climate

    data = RNG.normal(size=(2, 300, 700)).astype("float32")
    tiled = tmp_path / "tiled.tif"
    with rasterio.open(tiled, "w", driver="GTiff", width=700, height=300, count=2, dtype="float32", crs="EPSG:4326",
                       transform=from_origin(-150.0, 45.0, 0.1, 0.1), tiled=True, blockxsize=128,
                       blockysize=128) as dst:
        dst.write(data)
    chunks = open_climate(tiled, chunks={"y": 200, "x": 300}).chunks
    assert chunks[0] == (2,) and set(chunks[1][:-1]) == {256} and set(chunks[2][:-1]) == {256}
    assert open_climate(tiled, chunks={"y": 50, "x": 60}).chunks[1][0] == 50  # below one block: as given
    stripped = _tif(tmp_path / "strips.tif", data)  # GDAL's default layout: strips of whole rows
    with rasterio.open(stripped) as src:
        assert src.block_shapes[0][1] == 700
    chunks = open_climate(stripped, chunks={"y": 100, "x": 350}).chunks
    assert chunks[2] == (700,) and chunks[1][0] == 50  # same cells per window, full rows
    np.testing.assert_array_equal(open_climate(stripped, chunks={"y": 100, "x": 350}).values, data)
