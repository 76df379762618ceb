"""One-row, one-column and one-cell grids through info, fit and project; ±inf climate projected as nodata."""

import json

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner
from rasterio.transform import from_origin

from envelope.cli.main import cli
from envelope.io.modelfile import save_model
from envelope.kernels.mess import reference_from_training
from envelope.models import PointProcessModel

NAMES = ("t", "p")
RES = 0.1
WEST, NORTH = -150.0, 45.0


def _write(path, ny, nx, values=None):
    """A GeoTIFF written by rasterio itself: its transform is the reference the outputs must keep."""
    rng = np.random.default_rng(ny * 100 + nx)
    data = rng.normal(size=(len(NAMES), ny, nx)).astype("float32") if values is None else values
    with rasterio.open(path, "w", driver="GTiff", height=ny, width=nx, count=len(NAMES), dtype="float32",
                       crs="EPSG:4326", transform=from_origin(WEST, NORTH, RES, RES), nodata=-9999) as dst:
        dst.write(data)
        for i, name in enumerate(NAMES, start=1):
            dst.set_band_description(i, name)
    return path


def _model(path):
    rng = np.random.default_rng(0)
    X = np.r_[rng.normal(0.5, 0.5, (60, 2)), rng.normal(0, 1, (600, 2))]
    y = np.r_[np.ones(60), np.zeros(600)]
    model = PointProcessModel(classes=("linear",), C=20.0).fit(X, y)
    meta = {"variables": [{"name": n, "min": float(X[:, j].min()), "max": float(X[:, j].max())}
                          for j, n in enumerate(NAMES)],
            "threshold": {"value": 0.3, "rule": "max_tss"}, "mess_reference": reference_from_training(X).to_dict()}
    return save_model(path, model, meta)


SHAPES = [(1, 10), (10, 1), (1, 1)]


@pytest.mark.parametrize("shape", SHAPES, ids=["one-row", "one-column", "one-cell"])
def test_info_reads_resolution_from_the_transform(tmp_path, shape):
    from pyproj import Geod

    path = _write(tmp_path / "g.tif", *shape)
    res = CliRunner().invoke(cli, ["info", str(path), "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.output)
    assert out["shape"] == list(shape)
    assert out["resolution"] == pytest.approx([RES, RES])
    # Source: rasterio's own bounds of the file it wrote
    with rasterio.open(path) as src:
        assert out["bounds"] == pytest.approx(list(src.bounds))
        left, bottom, right, top = src.bounds
    # Source: pyproj.Geod polygon area on WGS84; the parallels are densified so the geodesic
    # edges follow them (a graticule cell is bounded by parallels, not geodesics)
    along = np.linspace(left, right, 2001)
    lons = np.r_[along, along[::-1]]
    lats = np.r_[np.full(along.size, bottom), np.full(along.size, top)]
    area = abs(Geod(ellps="WGS84").polygon_area_perimeter(lons, lats)[0]) / 1e6
    assert out["valid_area_km2"] == pytest.approx(area, rel=1e-6)


@pytest.mark.parametrize("shape", SHAPES, ids=["one-row", "one-column", "one-cell"])
def test_project_keeps_the_georeferencing(tmp_path, shape):
    path = _write(tmp_path / "g.tif", *shape)
    model = _model(tmp_path / "m.envm")
    res = CliRunner().invoke(cli, ["project", str(model), "--climate", str(path), "--out", str(tmp_path / "s.tif"),
                                   "--mess", str(tmp_path / "mess.tif"), "--binary", str(tmp_path / "b.tif")])
    assert res.exit_code == 0, res.output
    with rasterio.open(path) as src:
        expected = src.transform
    for name in ("s.tif", "mess.tif", "b.tif"):
        # Source: rasterio reads back the written geotransform; it must equal the input's
        with rasterio.open(tmp_path / name) as out:
            assert out.transform.almost_equals(expected), name
            assert out.shape == shape


def test_fit_on_one_row_and_one_column(tmp_path):
    # Common practice, no source: a line of cells can still be cut into spatial blocks
    rng = np.random.default_rng(3)
    for shape in ((1, 40), (40, 1)):
        path = _write(tmp_path / f"g{shape[0]}.tif", *shape)
        ny, nx = shape
        lon = rng.uniform(WEST, WEST + nx * RES, 60)
        lat = rng.uniform(NORTH - ny * RES, NORTH, 60)
        records = tmp_path / f"r{shape[0]}.csv"
        records.write_text("decimalLongitude,decimalLatitude\n" + "".join(f"{x:.5f},{y:.5f}\n" for x, y in zip(lon, lat)))
        res = CliRunner().invoke(cli, ["fit", "--presences", str(records), "--climate", str(path),
                                       "--out", str(tmp_path / f"m{shape[0]}.envm"), "--background", "100",
                                       "--folds", "3"])
        assert res.exit_code == 0, res.output
        assert (tmp_path / f"m{shape[0]}.envm").exists()


def test_fit_on_one_cell_is_a_clear_error(tmp_path):
    path = _write(tmp_path / "g.tif", 1, 1)
    records = tmp_path / "r.csv"
    records.write_text("decimalLongitude,decimalLatitude\n" + "-149.95,44.95\n" * 8)
    res = CliRunner().invoke(cli, ["fit", "--presences", str(records), "--climate", str(path),
                                   "--out", str(tmp_path / "m.envm")])
    assert res.exit_code == 2
    assert "Traceback" not in res.output and "r.csv" in res.output
    assert not (tmp_path / "m.envm").exists()


def test_infinite_climate_is_nodata_and_counted(tmp_path):
    values = np.random.default_rng(1).normal(size=(2, 4, 5)).astype("float32")
    values[0, 0, 0], values[1, 2, 3] = np.inf, -np.inf
    path = _write(tmp_path / "g.tif", 4, 5, values=values)
    model = _model(tmp_path / "m.envm")
    res = CliRunner().invoke(cli, ["project", str(model), "--climate", str(path), "--out", str(tmp_path / "s.tif"),
                                   "--mess", str(tmp_path / "mess.tif")])
    assert res.exit_code == 0, res.output
    assert "2 cells with +inf/-inf" in res.output
    with rasterio.open(tmp_path / "s.tif") as src:
        suit = src.read(1)
        assert src.tags()["infinite_climate_cells"] == "2"
    with rasterio.open(tmp_path / "mess.tif") as src:
        mess = src.read(1)
    # Analytic: exactly the two cells with a non-finite variable are nodata, all others finite
    bad = ~np.isfinite(values).all(axis=0)
    assert np.array_equal(np.isnan(suit), bad)
    assert np.array_equal(np.isnan(mess), bad)
