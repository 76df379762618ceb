"""Grid wrappers: same-grid checks, alignment, true cell areas (vs pyproj), validity masks."""

import logging

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from pyproj import Geod, Transformer

from envelope.errors import GridMismatchError, InputError
from envelope.grids import (align_to, cell_area_km2, check_same_grid, grid_signature, is_equal_area,
                            is_geographic, valid_mask)
from envelope.kernels.areas import ellipsoid_band_area
from tests.conftest import make_stack


def _projected(crs, x0, y0, res, nx, ny):
    x = x0 + res * (np.arange(nx) + 0.5)
    y = y0 - res * (np.arange(ny) + 0.5)
    return xr.DataArray(np.ones((ny, nx), "float32"), dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)


def _geodesic_area_km2(lons, lats):
    area, _ = Geod(ellps="WGS84").polygon_area_perimeter(lons, lats)
    return abs(area) / 1e6


# --------------------------------------------------------------------------- check_same_grid


def test_same_grid_passes_and_signature():
    ref = make_stack()
    check_same_grid(ref, make_stack(seed=5))  # Common practice, no source: identical grids pass
    sig = grid_signature(ref)
    # Common practice, no source: make_stack's grid is 15 x 20 cells of 0.1° from (-150, 45)
    assert sig["shape"] == (15, 20) and sig["crs_label"] == "EPSG:4326"
    assert sig["transform"][2] == pytest.approx(-150.0) and sig["transform"][5] == pytest.approx(45.0)
    assert is_geographic(ref) and not is_geographic(make_stack(crs="EPSG:3035"))


@pytest.mark.parametrize("other, phrase", [
    # Common practice, no source: the first difference is named, in the order CRS, resolution, shape, origin
    (make_stack(crs="EPSG:3035", res=0.2), "CRS EPSG:3035 differs from baseline EPSG:4326"),
    (make_stack(res=0.2, nx=21), "resolution 0.2 differs from baseline 0.1"),
    (make_stack(nx=21, lon0=-149.0), "shape 15 x 21 (rows x columns) differs from baseline 15 x 20"),
    (make_stack(lon0=-149.95), "origin/transform"),
])
def test_check_same_grid_names_first_difference(other, phrase):
    with pytest.raises(GridMismatchError) as info:
        check_same_grid(make_stack(), other, ref_name="baseline", other_name="scenario ssp-high/2070")
    assert str(info.value).startswith("scenario ssp-high/2070: ")
    assert phrase in str(info.value)


def test_coordinates_differing_by_float_noise_are_one_grid():
    # Analytic: a NetCDF and a GeoTIFF of one grid differ in their coordinate labels by
    # float noise (3e-14 in the report of issue 19); the transform is the same within any
    # sensible tolerance, so the grids are one grid and `other` comes back on ref's labels.
    ref = make_stack(lon0=0.1, lat0=0.3, res=0.1)
    noisy = ref.assign_coords(x=ref["x"].values + 3e-14, y=ref["y"].values - 3e-14)
    assert not np.array_equal(noisy["x"].values, ref["x"].values)  # the labels really differ
    relabelled = check_same_grid(ref, noisy)
    np.testing.assert_array_equal(relabelled["x"].values, ref["x"].values)
    np.testing.assert_array_equal(relabelled["y"].values, ref["y"].values)
    # arithmetic between the two aligns cell by cell (no NaN from an outer join, no empty inner join)
    assert (ref - relabelled).shape == ref.shape and float(abs(ref - relabelled).max()) == 0.0


# --------------------------------------------------------------------------- align_to


def test_align_to_matches_rasterio_reproject():
    from rasterio.warp import Resampling, reproject

    src = make_stack(nx=40, ny=30, res=0.05, seed=2).isel(variable=0, drop=True)
    ref = make_stack(nx=13, ny=9, res=0.13, lon0=-149.9, lat0=44.9).isel(variable=0, drop=True)
    out = align_to(src, ref, resampling="bilinear")
    expected = np.full(ref.shape, np.nan, dtype="float32")
    # Source: rasterio.warp.reproject, the reference implementation behind the wrapper
    reproject(src.values, expected, src_transform=src.rio.transform(), src_crs="EPSG:4326",
              dst_transform=ref.rio.transform(), dst_crs="EPSG:4326", resampling=Resampling.bilinear,
              src_nodata=np.nan, dst_nodata=np.nan)
    np.testing.assert_allclose(out.values, expected, rtol=1e-6, equal_nan=True)
    check_same_grid(ref, out)  # the result lies exactly on the reference grid
    with pytest.raises(InputError, match="resampling: 'cubic' is not known"):
        align_to(src, ref, resampling="cubic")


def test_align_to_nearest_keeps_class_codes():
    codes = xr.DataArray(np.arange(600, dtype="uint8").reshape(20, 30) % 5 + 1, dims=("y", "x"),
                         coords={"y": 45 - 0.1 * (np.arange(20) + 0.5), "x": -150 + 0.1 * (np.arange(30) + 0.5)})
    codes = codes.rio.write_crs("EPSG:4326")
    ref = make_stack(nx=10, ny=7, res=0.25).isel(variable=0, drop=True)
    out = align_to(codes, ref, resampling="nearest")
    # Common practice, no source: nearest resampling only ever returns codes present in the input
    assert out.dtype == np.uint8 and set(np.unique(out.values)) <= {1, 2, 3, 4, 5}


# --------------------------------------------------------------------------- cell areas


def test_geographic_global_grid_total_and_lazy():
    # Source: WGS84 surface 510 065 621.724 km² (NIMA TR8350.2; REFERENCES.md item 6)
    glob = make_stack(nx=360, ny=180, lon0=-180.0, lat0=90.0, res=1.0, variables=("t",)).chunk({"y": 60, "x": 120})
    area = cell_area_km2(glob)
    assert area.chunks is not None  # still lazy (dask-backed)
    assert float(area.sum()) == pytest.approx(510065621.724, abs=1e-2)
    # Source: REFERENCES.md item 6: 0–1°N × 1° cell = 12 308.463894 km²
    row = int(np.argmin(np.abs(glob["y"].values - 0.5)))
    assert float(area[row, 0]) == pytest.approx(12308.463894, abs=1e-5)


def test_geographic_cells_match_pyproj_geodesic():
    stack = make_stack(nx=4, ny=3, lon0=20.0, lat0=61.0, res=0.5)
    area = cell_area_km2(stack).values
    n = 200
    lon_s = np.linspace(20.5, 21.0, n)
    lons = np.concatenate([lon_s, lon_s[::-1]])
    lats = np.concatenate([np.full(n, 60.0), np.full(n, 60.5)])
    # Source: pyproj.Geod(ellps="WGS84").polygon_area_perimeter, parallel edges densified
    assert area[1, 1] == pytest.approx(_geodesic_area_km2(lons, lats), rel=1e-6)


def test_equal_area_cylindrical_6933_pixel_area():
    to_ease = Transformer.from_crs("EPSG:4326", "EPSG:6933", always_xy=True)
    x0, y1 = to_ease.transform(0.0, 1.0)
    x1, y0 = to_ease.transform(1.0, 0.0)
    grid = xr.DataArray(np.ones((1, 1)), dims=("y", "x"),
                        coords={"y": [0.5 * (y0 + y1)], "x": [0.5 * (x0 + x1)]}).rio.write_crs("EPSG:6933")
    grid = xr.concat([grid, grid.assign_coords(y=grid.y - (y1 - y0))], "y")
    grid = xr.concat([grid, grid.assign_coords(x=grid.x + (x1 - x0))], "x").rio.write_crs("EPSG:6933")
    assert is_equal_area(grid.rio.crs)
    # Source: REFERENCES.md item 6: in EPSG:6933 dx·dy equals the ellipsoidal 0–1°N × 1° cell, 12 308.463894 km²
    assert float(cell_area_km2(grid)[0, 0]) == pytest.approx(12308.463894, rel=1e-9)


def test_laea_3035_cell_matches_geodesic_polygon():
    grid = _projected("EPSG:3035", 4321000.0, 3210000.0, 10000.0, 3, 3)
    assert is_equal_area(grid.rio.crs)
    area = cell_area_km2(grid)
    assert float(area[1, 1]) == pytest.approx(100.0)  # pixel area, 10 km x 10 km
    # Source: pyproj Geod polygon area of the cell's densified boundary mapped to lon/lat
    # (GRS80 and WGS84 differ by ~1e-9 in area; REFERENCES.md item 6 LAEA check)
    x0, x1, y0, y1 = 4331000.0, 4341000.0, 3190000.0, 3200000.0
    t = np.linspace(0, 1, 50, endpoint=False)
    xs = np.concatenate([x0 + (x1 - x0) * t, np.full(50, x1), x1 - (x1 - x0) * t, np.full(50, x0)])
    ys = np.concatenate([np.full(50, y0), y0 + (y1 - y0) * t, np.full(50, y1), y1 - (y1 - y0) * t])
    lons, lats = Transformer.from_crs("EPSG:3035", "EPSG:4326", always_xy=True).transform(xs, ys)
    assert float(area[1, 1]) == pytest.approx(_geodesic_area_km2(lons, lats), rel=1e-6)


def test_web_mercator_areas_from_scale_factors(caplog):
    to_merc = Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True)
    to_geo = Transformer.from_crs("EPSG:3857", "EPSG:4326", always_xy=True)
    x0, y_top = to_merc.transform(10.0, 60.0)
    res = 5000.0
    grid = _projected("EPSG:3857", x0, y_top, res, 4, 6).chunk({"y": 3})
    with caplog.at_level(logging.WARNING, logger="envelope.grids"):
        area = cell_area_km2(grid).values
    assert "not equal-area" in caplog.text
    _, lat_edges = to_geo.transform(np.full(7, x0), y_top - res * np.arange(7))
    lon_edges, _ = to_geo.transform(x0 + res * np.arange(5), np.full(5, y_top))
    exact = ellipsoid_band_area(lat_edges[1:, None], lat_edges[:-1, None], np.diff(lon_edges)[None, :]) / 1e6
    # Source: closed-form WGS84 graticule areas (REFERENCES.md item 6) of the same cells
    # (Mercator rows are parallels, columns meridians); centre-point scale error ~1e-7 for 5 km cells
    np.testing.assert_allclose(area, exact, rtol=1e-5)
    # Source: REFERENCES.md item 6: the naive Web Mercator pixel area is ~3.9x too big at 60°N
    assert 3.8 < (res * res / 1e6) / area[0, 0] < 4.0


def test_utm_cells_match_geodesic_polygon():
    grid = _projected("EPSG:32633", 400000.0, 5600000.0, 20000.0, 3, 3)
    area = cell_area_km2(grid)
    x0, x1, y0, y1 = 420000.0, 440000.0, 5560000.0, 5580000.0
    t = np.linspace(0, 1, 50, endpoint=False)
    xs = np.concatenate([x0 + (x1 - x0) * t, np.full(50, x1), x1 - (x1 - x0) * t, np.full(50, x0)])
    ys = np.concatenate([np.full(50, y0), y0 + (y1 - y0) * t, np.full(50, y1), y1 - (y1 - y0) * t])
    lons, lats = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True).transform(xs, ys)
    # Source: pyproj Geod polygon area of the densified cell boundary; Transverse Mercator
    # scale varies little across a 20 km cell, so the centre-point estimate is good to ~1e-6
    assert float(area[1, 1]) == pytest.approx(_geodesic_area_km2(lons, lats), rel=1e-5)


def test_cell_area_requires_crs():
    bare = xr.DataArray(np.ones((2, 2)), dims=("y", "x"), coords={"y": [1.5, 0.5], "x": [0.5, 1.5]})
    with pytest.raises(InputError, match="no CRS"):
        cell_area_km2(bare)


def test_valid_mask_lazy_and_correct():
    stack = make_stack()
    stack[0, 0, 0] = np.nan
    stack[1, 2, 3] = np.inf
    mask = valid_mask(stack.chunk({"x": 10}))
    assert mask.chunks is not None
    expected = np.isfinite(stack.values).all(axis=0)  # Common practice, no source
    np.testing.assert_array_equal(mask.values, expected)
    assert not expected[0, 0] and not expected[2, 3]


def test_wrappers_do_not_compute():
    from dask.callbacks import Callback

    class ComputeCount(Callback):
        def __init__(self):
            super().__init__()
            self.count = 0

        def _start(self, dsk):
            self.count += 1

    stack = make_stack(nx=50, ny=40).chunk({"x": 25})
    projected = make_stack(nx=50, ny=40, lon0=400000.0, lat0=5600000.0, res=1000.0, crs="EPSG:32633").chunk({"x": 25})
    with ComputeCount() as counter:
        cell_area_km2(stack), cell_area_km2(projected), valid_mask(stack)
    # Common practice, no source (xarray habit): grid wrappers build graphs, they do not compute
    assert counter.count == 0
