"""Study regions from vector files and class polygons for planning GIS (envelope.io.vectors, envelope.polygons)."""

import json

import numpy as np
import pyogrio
import pyproj
import pytest
import shapely
import xarray as xr
import rioxarray  # noqa: F401
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.errors import InputError
from envelope.io.vectors import region_mask, write_polygons
from envelope.io.writing import write_raster
from envelope.kernels.change import CHANGE_CLASSES, CHANGE_NODATA
from envelope.polygons import class_polygons


def _layer(values, res=0.5, lon0=-150.0, lat0=-40.0, crs="EPSG:4326"):
    values = np.asarray(values)
    ny, nx = values.shape
    da = xr.DataArray(values, dims=("y", "x"), coords={"y": lat0 - res * (np.arange(ny) + 0.5),
                                                        "x": lon0 + res * (np.arange(nx) + 0.5)})
    return da.rio.write_crs(crs)


def _write_region(path, geoms, crs):
    wkb = np.asarray([shapely.to_wkb(g) for g in geoms], dtype=object)
    pyogrio.raw.write(path, wkb, [np.arange(len(geoms))], ["id"], geometry_type="Polygon", crs=crs)
    return path


def test_region_in_another_crs_burns_the_cells_whose_centre_is_inside(tmp_path):
    grid = _layer(np.zeros((12, 16), dtype=np.float32))
    # a triangle in Web Mercator over part of the grid
    to_merc = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True)
    corners = [to_merc.transform(lon, lat) for lon, lat in ((-149.2, -40.3), (-142.6, -41.1), (-147.0, -45.7))]
    triangle = shapely.Polygon(corners)
    path = _write_region(tmp_path / "region.gpkg", [triangle], "EPSG:3857")
    mask = region_mask(path, grid).values > 0
    # Source: shapely.contains_xy on the cell centres projected with pyproj (an independent route;
    # cells within ~1 % of a cell of the edge may differ by the densification, none here)
    lon, lat = np.meshgrid(grid["x"].values, grid["y"].values)
    mx, my = to_merc.transform(lon, lat)
    expected = shapely.contains_xy(triangle, mx, my)
    assert mask.sum() > 10
    np.testing.assert_array_equal(mask, expected)


def test_region_outside_the_grid_is_refused(tmp_path):
    grid = _layer(np.zeros((4, 4), dtype=np.float32))
    far = _write_region(tmp_path / "far.geojson", [shapely.box(10, 10, 11, 11)], "EPSG:4326")
    with pytest.raises(InputError, match="does not overlap the grid"):
        region_mask(far, grid)
    points = tmp_path / "pts.geojson"
    pyogrio.raw.write(points, np.asarray([shapely.to_wkb(shapely.Point(-149, -41))], dtype=object), [np.arange(1)],
                      ["id"], geometry_type="Point", crs="EPSG:4326")
    with pytest.raises(InputError, match="holds no polygon"):
        region_mask(points, grid)


@pytest.mark.parametrize("suffix", [".gpkg", ".geojson"])
def test_class_polygons_dissolved_with_true_areas(tmp_path, suffix):
    rng = np.random.default_rng(2)
    codes = rng.integers(0, len(CHANGE_CLASSES), size=(10, 14)).astype(np.uint8)
    codes[0, 0] = CHANGE_NODATA
    classes = _layer(codes)
    features = class_polygons(classes, CHANGE_CLASSES, nodata=CHANGE_NODATA)
    out = write_polygons(features, tmp_path / f"change{suffix}", pyproj.CRS("EPSG:4326"))
    meta, _, wkb, (code, name, area) = pyogrio.raw.read(out)
    assert meta["fields"].tolist() == ["class", "name", "area_km2"]
    assert pyproj.CRS(meta["crs"]).equals(pyproj.CRS("EPSG:4326"))
    assert code.tolist() == list(CHANGE_CLASSES) and name.tolist() == list(CHANGE_CLASSES.values())
    geod = pyproj.Geod(ellps="WGS84")
    for k, geom in zip(code, shapely.from_wkb(wkb)):
        # one dissolved geometry per class, covering exactly its cells (unit: cells of 0.5 deg)
        assert geom.geom_type == "MultiPolygon"
        assert geom.area == pytest.approx(0.25 * np.count_nonzero(codes == k), rel=1e-12)
        # Source: pyproj.Geod.geometry_area_perimeter (Karney 2013 geodesic polygon area). Cell edges
        # along parallels are not geodesics, so the two differ slightly for 0.5 deg cells.
        geodesic_km2 = abs(geod.geometry_area_perimeter(geom)[0]) / 1e6
        assert area[list(code).index(k)] == pytest.approx(geodesic_km2, rel=2e-3)


def test_change_polygons_from_the_command(tmp_path):
    now = _layer(np.linspace(0, 1, 48, dtype=np.float32).reshape(6, 8))
    fut = _layer(np.linspace(1, 0, 48, dtype=np.float32).reshape(6, 8))
    write_raster(now, tmp_path / "now.tif")
    write_raster(fut, tmp_path / "fut.tif")
    res = CliRunner().invoke(cli, ["change", "--now", str(tmp_path / "now.tif"), "--future", str(tmp_path / "fut.tif"),
                                   "--threshold", "0.5", "--out", str(tmp_path / "c.tif"), "--summary",
                                   str(tmp_path / "c.json"), "--polygons", str(tmp_path / "c.geojson")])
    assert res.exit_code == 0, res.output
    summary = json.loads((tmp_path / "c.json").read_text())
    _, _, _, (code, name, area) = pyogrio.raw.read(tmp_path / "c.geojson")
    # the polygon areas are the summary's class areas (the same true cell areas)
    by_name = dict(zip(name, area))
    for key in ("lost", "gained"):
        assert by_name[key] == pytest.approx(summary["area_km2"][key], rel=1e-9)
    bad = CliRunner().invoke(cli, ["change", "--now", str(tmp_path / "now.tif"), "--future", str(tmp_path / "fut.tif"),
                                   "--threshold", "0.5", "--out", str(tmp_path / "d.tif"), "--summary",
                                   str(tmp_path / "d.json"), "--polygons", str(tmp_path / "d.shp")])
    assert bad.exit_code == 2 and "expected .gpkg or .geojson" in bad.output
    assert not (tmp_path / "d.tif").exists()
