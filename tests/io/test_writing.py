"""Several rasters from one dask pass: each input window read once, late tags, progress, COG layout."""

import numpy as np
import pytest
import rasterio

from envelope.io import blocks
from envelope.io.rasters import open_climate, open_layer, read_tags
from envelope.io.writing import RasterOutput, write_raster, write_rasters
from tests.conftest import make_stack


@pytest.fixture
def read_log(monkeypatch):
    """Records (bands, window) of every WindowReader read."""
    calls = []
    original = blocks.WindowReader.__getitem__

    def logged(self, key):
        out = original(self, key)
        calls.append((tuple(self.bands), tuple((k.start, k.stop) for k in key[1:])))
        return out

    monkeypatch.setattr(blocks.WindowReader, "__getitem__", logged)
    return calls


def test_open_climate_reads_only_wanted_bands(tmp_path, read_log):
    stack = make_stack(nx=30, ny=20, variables=("a", "b", "c", "d"))
    write_raster(stack, tmp_path / "s.tif")
    read_log.clear()
    sub = open_climate(tmp_path / "s.tif", variables=["d", "b"], chunks={"y": 10, "x": 30})
    # Source: the same bands read through rasterio-backed open_climate without selection
    np.testing.assert_array_equal(sub.values, stack.sel(variable=["d", "b"]).values)
    assert list(sub["variable"].values) == ["d", "b"]
    assert read_log and all(bands == (2, 4) for bands, _ in read_log)  # a and c never read


def test_outputs_of_one_graph_read_each_window_once(tmp_path, read_log):
    stack = make_stack(nx=40, ny=30)
    write_raster(stack, tmp_path / "s.tif")
    read_log.clear()
    climate = open_climate(tmp_path / "s.tif", chunks={"y": 10, "x": 20})
    total = (climate.sel(variable="t") + climate.sel(variable="p")).rename("sum")
    diff = (climate.sel(variable="t") - climate.sel(variable="p")).rename("diff")
    count = climate.sel(variable="t").notnull().sum().data
    (n,) = write_rasters([RasterOutput(total, tmp_path / "sum.tif", tags=lambda also: {"cells": int(also[0])}),
                          RasterOutput(diff, tmp_path / "diff.tif", tags={"kind": "difference"}),
                          RasterOutput(diff, tmp_path / "diff.nc", tags=lambda also: {"cells": int(also[0])})],
                         also=[count])
    assert int(n) == 30 * 40
    windows = [w for _, w in read_log]
    # both GeoTIFFs and the count in one pass: 3 x 2 chunks, each read once; the NetCDF
    # file (second pass) reads them once more
    assert len(windows) == 12 and len(set(windows)) == 6
    assert windows[:6] and len(set(windows[:6])) == 6
    # Source: the arithmetic done by numpy on the same values
    np.testing.assert_allclose(open_layer(tmp_path / "sum.tif").values, (stack[0] + stack[1]).values)
    np.testing.assert_allclose(open_layer(tmp_path / "diff.nc").values, (stack[0] - stack[1]).values)
    np.testing.assert_allclose(open_layer(tmp_path / "diff.tif").values, (stack[0] - stack[1]).values)
    assert read_tags(tmp_path / "diff.tif")["kind"] == "difference"
    assert read_tags(tmp_path / "sum.tif")["cells"] == 1200 and read_tags(tmp_path / "diff.nc")["cells"] == 1200


def test_progress_reports_every_task(tmp_path):
    stack = make_stack(nx=64, ny=64).chunk({"y": 16, "x": 16})
    seen = []
    # Common practice, no source: a progress report ends with every task done
    write_rasters([RasterOutput(stack, tmp_path / "p.tif")], progress=lambda done, total: seen.append((done, total)))
    assert seen and seen[-1][0] == seen[-1][1] and all(d <= t for d, t in seen)


def test_numpy_layers_and_integer_nodata(tmp_path):
    layer = make_stack(nx=300, ny=200).isel(variable=0, drop=True)
    codes = (layer > 0).astype("float32").where(layer > -1.5)  # NaN where very low
    codes.name = "flag"
    write_rasters([RasterOutput(codes, tmp_path / "c.tif", categories={0: "no", 1: "yes"}, nodata=255,
                                dtype="uint8")])
    with rasterio.open(tmp_path / "c.tif") as src:  # Source: rasterio / GDAL metadata of the file
        values = src.read(1)
        assert src.nodata == 255 and src.dtypes[0] == "uint8"
        assert src.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG" and src.overviews(1)
    expected = np.where(np.isnan(codes.values), 255, codes.values).astype("uint8")
    np.testing.assert_array_equal(values, expected)


def test_same_file_twice_refused(tmp_path):
    from envelope.errors import InputError

    stack = make_stack()
    # Common practice, no source: one file cannot hold two outputs; nothing is written
    with pytest.raises(InputError, match="the same file is given twice"):
        write_rasters([RasterOutput(stack, tmp_path / "x.tif"), RasterOutput(stack, tmp_path / "x.tif")])
    assert list(tmp_path.iterdir()) == []


def test_streamed_overviews_match_gdal_average_and_leave_no_files(tmp_path):
    # A streamed float raster brings its own overview levels (envelope.io.overviews): the COG
    # is the same at full resolution and in layout; its first overview equals GDAL's own
    # AVERAGE overview of the same data (Source: GDAL's COG driver, OVERVIEWS=AUTO,
    # RESAMPLING=AVERAGE, on the in-memory copy), and every level is the mean of the valid
    # cells of its f x f groups (numpy.nanmean as reference; GDAL's deeper levels differ from
    # that where a group holds NaN, as measured here). No staging, level or VRT file is left.
    import dask.array as dsa
    import rioxarray  # noqa: F401
    import xarray as xr

    rng = np.random.default_rng(1)
    ny, nx = 1100, 1400
    values = rng.normal(size=(2, ny, nx)).astype(np.float32)
    values[values > 2.2] = np.nan
    values[:, :40, :60] = np.nan

    def grid(data):
        da = xr.DataArray(data, dims=("variable", "y", "x"),
                          coords={"variable": ["a", "b"], "y": 50.0 - 0.01 * (np.arange(ny) + 0.5),
                                  "x": -150.0 + 0.01 * (np.arange(nx) + 0.5)})
        return da.rio.write_crs("EPSG:4326")
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    write_rasters([RasterOutput(grid(dsa.from_array(values, chunks=(2, 512, 512))), out_dir / "streamed.tif",
                                tags={"threshold": 0.5})])
    write_raster(grid(values), tmp_path / "gdal.tif", tags={"threshold": 0.5})
    assert sorted(p.name for p in out_dir.iterdir()) == ["streamed.tif"]
    with rasterio.open(out_dir / "streamed.tif") as a, rasterio.open(tmp_path / "gdal.tif") as b:
        assert a.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
        assert a.overviews(1) == b.overviews(1) == [2, 4]
        assert a.descriptions == b.descriptions == ("a", "b") and a.tags()["threshold"] == b.tags()["threshold"]
        np.testing.assert_array_equal(a.read(), values)
    for level, f in enumerate((2, 4)):
        with rasterio.open(out_dir / "streamed.tif", overview_level=level) as oa:
            got = oa.read()
        h, w = -(-ny // f), -(-nx // f)
        pad = np.full((2, h * f, w * f), np.nan)
        pad[:, :ny, :nx] = values
        with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning):
            ref = np.nanmean(pad.reshape(2, h, f, w, f), axis=(2, 4))
        np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-7, equal_nan=True)
        if level == 0:
            with rasterio.open(tmp_path / "gdal.tif", overview_level=0) as ob:
                np.testing.assert_allclose(got, ob.read(), rtol=1e-6, atol=1e-7, equal_nan=True)


@pytest.mark.parametrize("predictor, expected", [(None, "3"), (1, None), (2, "2")])
def test_predictor_of_a_float_raster(tmp_path, predictor, expected, caplog):
    # Source: GDAL's IMAGE_STRUCTURE metadata of the written file (GDAL omits PREDICTOR when
    # there is none); the values read back are the same whichever predictor (lossless DEFLATE);
    # the COG driver's option takes NO / STANDARD / FLOATING_POINT and warns on anything else
    stack = make_stack(nx=300, ny=200).chunk({"y": 128, "x": 128})
    with caplog.at_level("WARNING"):
        write_rasters([RasterOutput(stack, tmp_path / "p.tif", predictor=predictor)])
    assert not [r for r in caplog.records if "PREDICTOR" in r.getMessage()]
    with rasterio.open(tmp_path / "p.tif") as src:
        assert src.tags(ns="IMAGE_STRUCTURE").get("PREDICTOR") == expected
        assert src.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"
        np.testing.assert_array_equal(src.read(), stack.values)


@pytest.mark.parametrize("predictor, dtype, message", [(4, None, "predictor 4"),
                                                      (3, "uint8", "predictor 3 .floating point. for an integer")])
def test_bad_predictor_refused(tmp_path, predictor, dtype, message):
    from envelope.errors import InputError

    # Source: the TIFF 6.0 specification (Predictor tag 317: 1 = none, 2 = horizontal
    # differencing) and GDAL's GeoTIFF driver (3 = floating point, float rasters only)
    with pytest.raises(InputError, match=message):
        write_rasters([RasterOutput(make_stack(), tmp_path / "x.tif", predictor=predictor, dtype=dtype, nodata=255)])
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("chunks", [None, (2, 512, 512), (2, 300, 700)])
def test_nearest_bands_take_the_first_cell_of_each_group(tmp_path, chunks):
    # A band of codes (an index stored as float, as in a MESS raster) gets overviews holding
    # codes that exist: the top-left cell of each f x f group (numpy strided slicing as
    # reference), while the other band keeps the mean of the valid cells (numpy.nanmean).
    # In memory, in aligned chunks and in chunks that do not hold whole groups (rechunked).
    import dask.array as dsa
    import rioxarray  # noqa: F401
    import xarray as xr

    rng = np.random.default_rng(4)
    ny, nx = 1100, 1400
    values = np.stack([rng.normal(size=(ny, nx)), rng.integers(0, 19, size=(ny, nx))]).astype(np.float32)
    values[:, :40, :60] = np.nan
    data = values if chunks is None else dsa.from_array(values, chunks=chunks)
    da = xr.DataArray(data, dims=("variable", "y", "x"),
                      coords={"variable": ["mess", "most_dissimilar"], "y": 50.0 - 0.01 * (np.arange(ny) + 0.5),
                              "x": -150.0 + 0.01 * (np.arange(nx) + 0.5)}).rio.write_crs("EPSG:4326")
    write_rasters([RasterOutput(da, tmp_path / "m.tif", nearest_bands=(1,))])
    with rasterio.open(tmp_path / "m.tif") as src:
        assert src.overviews(2) == [2, 4] and src.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
        np.testing.assert_array_equal(src.read(), values)
    for level, f in enumerate((2, 4)):
        with rasterio.open(tmp_path / "m.tif", overview_level=level) as ov:
            got = ov.read()
        np.testing.assert_array_equal(got[1], values[1, ::f, ::f])
        assert set(np.unique(got[1][np.isfinite(got[1])])) <= set(range(19))
        h, w = -(-ny // f), -(-nx // f)
        pad = np.full((h * f, w * f), np.nan)
        pad[:ny, :nx] = values[0]
        with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning):
            ref = np.nanmean(pad.reshape(h, f, w, f), axis=(1, 3))
        np.testing.assert_allclose(got[0], ref, rtol=1e-6, atol=1e-7, equal_nan=True)


def test_bad_nearest_band_refused(tmp_path):
    from envelope.errors import InputError

    # Common practice, no source: a band number outside the raster names the option
    with pytest.raises(InputError, match=r"nearest_bands \[5\]"):
        write_rasters([RasterOutput(make_stack(), tmp_path / "x.tif", nearest_bands=(5,))])
    assert list(tmp_path.iterdir()) == []
