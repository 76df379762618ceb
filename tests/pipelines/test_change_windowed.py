"""Range change window by window over stored blocks (huge sparse grids) against the whole-grid computation."""

import json

import numpy as np
import pyproj
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from envelope.errors import InputError
from envelope.io.blocks import stored_block_mask
from envelope.kernels.change import LATITUDE_BINS, latitude_bin, quantile_bin, quantile_in_bin
from envelope.pipelines import change as change_pipeline
from envelope.pipelines.change import range_change, range_change_batch

TILE = 16


def write_sparse(path, values, *, crs="EPSG:4326", origin=(-150.0, 46.0), res=0.05, nodata=-9999.0, description="s"):
    """Tiled GeoTIFF with SPARSE_OK: tiles that are NaN everywhere are never written (not stored)."""
    values = np.asarray(values, dtype="float32")
    ny, nx = values.shape
    with rasterio.open(path, "w", driver="GTiff", height=ny, width=nx, count=1, dtype="float32", crs=crs,
                       transform=from_origin(origin[0], origin[1], res, res), nodata=nodata, tiled=True,
                       blockxsize=TILE, blockysize=TILE, SPARSE_OK="TRUE") as dst:
        dst.set_band_description(1, description)
        for r in range(0, ny, TILE):
            for c in range(0, nx, TILE):
                block = values[r:r + TILE, c:c + TILE]
                if np.isnan(block).all():
                    continue
                dst.write(np.where(np.isnan(block), nodata, block)[None].astype("float32"),
                          window=Window(c, r, block.shape[1], block.shape[0]))
    return path


def sparse_values(rng, shape, keep_tiles):
    """Random suitability where tile (row, col) is in keep_tiles, NaN elsewhere, and a few NaN cells."""
    values = np.full(shape, np.nan, dtype="float32")
    for r, c in keep_tiles:
        values[r * TILE:(r + 1) * TILE, c * TILE:(c + 1) * TILE] = rng.uniform(size=(TILE, TILE))
    values[rng.uniform(size=shape) < 0.02] = np.nan
    return values


def pair(tmp_path, *, crs="EPSG:4326", origin=(-150.0, 46.0), res=0.05, shape=(80, 96), seed=0, mess=True,
         elevation=True):
    rng = np.random.default_rng(seed)
    tiles_now = [(0, 0), (1, 2), (2, 2), (3, 5), (4, 1)]
    tiles_future = [(0, 0), (1, 2), (2, 3), (3, 5), (4, 1), (4, 4)]
    paths = {"now": write_sparse(tmp_path / "now.tif", sparse_values(rng, shape, tiles_now), crs=crs, origin=origin,
                                 res=res),
             "future": write_sparse(tmp_path / "future.tif", sparse_values(rng, shape, tiles_future), crs=crs,
                                    origin=origin, res=res)}
    if mess:
        paths["mess"] = write_sparse(tmp_path / "mess.tif", rng.normal(0, 10, shape), crs=crs, origin=origin, res=res,
                                     description="mess")
    if elevation:
        paths["elevation"] = write_sparse(tmp_path / "elev.tif", rng.uniform(0, 2000, shape), crs=crs, origin=origin,
                                          res=res, description="elevation")
    return paths


def run(tmp_path, paths, name, windowed, **kw):
    out, summary = tmp_path / f"{name}.tif", tmp_path / f"{name}.json"
    result = range_change(paths["now"], paths["future"], out, summary, threshold=0.5, mess=paths.get("mess"),
                          elevation=paths.get("elevation"), windowed=windowed, **kw)
    with rasterio.open(out) as src:
        classes = src.read(1)
    return result, classes, json.loads(summary.read_text())


def assert_same_summary(a, b, rel=1e-12):
    """Counts, class codes and edge latitudes (cell centres) exactly; sums to round-off."""
    assert a["n_cells"] == b["n_cells"]
    for key in ("leading_edge_lat", "trailing_edge_lat", "centroid_now", "centroid_future", "area_km2",
                "range_km2", "mean_elevation_m"):
        if key not in a and key not in b:
            continue
        for sub, value in a[key].items():
            if value is None:
                assert b[key][sub] is None
            else:
                assert b[key][sub] == pytest.approx(value, rel=rel, abs=1e-9), (key, sub)
    for key in ("centroid_shift_km", "centroid_bearing_deg", "leading_edge_shift_km", "trailing_edge_shift_km",
                "elevation_shift_m", "range_change_pct"):
        assert b[key] == pytest.approx(a[key], rel=1e-9, abs=1e-9, nan_ok=True), key
    assert a["poleward"] == b["poleward"] and a["threshold"] == b["threshold"]


def reference_edges(classes, lat, area, codes, q):
    """Area-weighted quantile of latitude over cells with the given codes, by NumPy.

    Source: numpy.quantile(..., weights=, method="inverted_cdf") is Hyndman & Fan (1996)
    definition 1 with weights (NumPy >= 2.0 documentation), the rule docs/change.md names.
    """
    keep = np.isin(classes, codes)
    return float(np.quantile(lat[keep], q, weights=area[keep], method="inverted_cdf"))


def test_stored_block_mask_sees_only_written_tiles(tmp_path):
    paths = pair(tmp_path, mess=False, elevation=False)
    mask, block, shape = stored_block_mask(paths["now"])
    assert block == (TILE, TILE) and shape == (80, 96) and mask.shape == (5, 6)
    assert sorted(zip(*np.nonzero(mask))) == [(0, 0), (1, 2), (2, 2), (3, 5), (4, 1)]


def test_geographic_windowed_equals_whole_grid(tmp_path):
    # Common practice, no source: a reduction window by window equals the one-pass result.
    paths = pair(tmp_path)
    whole, whole_classes, _ = run(tmp_path, paths, "whole", False)
    part, part_classes, written = run(tmp_path, paths, "part", True)
    np.testing.assert_array_equal(part_classes, whole_classes)
    assert_same_summary(whole, part)
    assert written["n_cells"] == part["n_cells"]
    # only the tiles stored in both maps are measured; everything else is nodata
    windows = change_pipeline._windows_with_data(paths["now"], paths["future"])
    assert [(ys.start // TILE, xs.start // TILE) for ys, xs in windows] == [(0, 0), (1, 2), (3, 5), (4, 1)]
    outside = np.ones(part_classes.shape, bool)
    for ys, xs in windows:
        outside[ys, xs] = False
    assert (part_classes[outside] == 255).all() and (part_classes[~outside] != 255).any()
    # the edge latitudes against NumPy's weighted quantile over the grid's true areas
    from envelope.grids import cell_area_km2
    from envelope.io.rasters import open_layer

    area = cell_area_km2(open_layer(paths["now"])).values
    lat = np.broadcast_to(open_layer(paths["now"])["y"].values[:, None], area.shape)
    assert part["leading_edge_lat"]["now"] == reference_edges(part_classes, lat, area, (1, 2, 5), 0.95)
    assert part["trailing_edge_lat"]["future"] == reference_edges(part_classes, lat, area, (2, 3, 4, 5), 0.05)


def test_geographic_cell_areas_against_geodesic_polygons(tmp_path):
    paths = pair(tmp_path, mess=False, elevation=False)
    part, classes, _ = run(tmp_path, paths, "part", True)
    # Source: pyproj.Geod.polygon_area_perimeter (Karney 2013) of each graticule cell with
    # densified parallels (as tests/test_change.py); 0.05-degree cells from 46 N, -150 E.
    geod = pyproj.Geod(ellps="WGS84")
    n = 50
    row_area = []
    for i in range(classes.shape[0]):
        top, bottom = 46.0 - 0.05 * i, 46.0 - 0.05 * (i + 1)
        lons = np.concatenate([np.linspace(-150.0, -149.95, n), np.linspace(-149.95, -150.0, n)])
        lats = np.concatenate([np.full(n, bottom), np.full(n, top)])
        row_area.append(abs(geod.polygon_area_perimeter(lons, lats)[0]) / 1e6)
    row_area = np.array(row_area)
    for code, name in ((1, "lost"), (2, "stable"), (3, "gained")):
        expected = float((row_area[:, None] * (classes == code)).sum())
        assert part["area_km2"][name] == pytest.approx(expected, rel=1e-7)


@pytest.mark.parametrize("origin", [(4_000_000.0, 3_000_000.0), (4_000_000.0, -3_000_000.0)],
                         ids=["north", "south"])
def test_projected_windowed_edges_are_exact(tmp_path, origin):
    # EPSG:3035 (Lambert azimuthal equal-area) has no southern half on land; the grid only
    # needs valid coordinates. The south case makes poleward the southward direction.
    crs = "EPSG:3035" if origin[1] > 0 else "EPSG:6933"
    paths = pair(tmp_path, crs=crs, origin=origin, res=2000.0, seed=4)
    whole, whole_classes, _ = run(tmp_path, paths, "whole", False)
    part, part_classes, _ = run(tmp_path, paths, "part", True)
    np.testing.assert_array_equal(part_classes, whole_classes)
    assert_same_summary(whole, part)
    # Source: pyproj.Transformer to EPSG:4326 for each cell centre, and NumPy's weighted
    # inverted-CDF quantile (see reference_edges) of poleward latitude.
    ny, nx = part_classes.shape
    x = origin[0] + 2000.0 * (np.arange(nx) + 0.5)
    y = origin[1] - 2000.0 * (np.arange(ny) + 0.5)
    xx, yy = np.meshgrid(x, y)
    _, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(xx, yy)
    area = np.full(lat.shape, 4.0)  # both CRS are equal-area: 2 km x 2 km cells
    sign = 1.0 if part["poleward"] == "north" else -1.0
    assert part["poleward"] == ("north" if origin[1] > 0 else "south")
    for side, q in (("leading_edge_lat", 0.95), ("trailing_edge_lat", 0.05)):
        for key, codes in (("now", (1, 2, 5)), ("future", (2, 3, 4, 5))):
            expected = sign * reference_edges(part_classes, sign * lat, area, codes, q)
            assert part[side][key] == pytest.approx(expected, abs=1e-9)


def test_batch_windowed_equals_whole_grid(tmp_path):
    paths = pair(tmp_path, mess=False)
    table = tmp_path / "scenarios.csv"
    table.write_text(f"name,pathway,climate_model,horizon,path\nhigh,p1,m1,2070,{paths['future']}\n")
    whole = range_change_batch(paths["now"], table, tmp_path / "w", tmp_path / "w.csv", threshold=0.5,
                               elevation=paths["elevation"], windowed=False)
    seen = []
    part = range_change_batch(paths["now"], table, tmp_path / "p", tmp_path / "p.csv", threshold=0.5,
                              elevation=paths["elevation"], windowed=True,
                              progress=lambda done, total, what: seen.append((done, total)))
    for column in ("area_km2.lost", "area_km2.gained", "n_cells.nodata", "leading_edge_lat.now",
                   "elevation_shift_m", "centroid_shift_km"):
        assert part[column].iloc[0] == pytest.approx(whole[column].iloc[0], rel=1e-12), column
    with rasterio.open(tmp_path / "w" / "high.tif") as a, rasterio.open(tmp_path / "p" / "high.tif") as b:
        np.testing.assert_array_equal(a.read(1), b.read(1))
        assert b.tags()["threshold"] == a.tags()["threshold"] and b.tags()["categories"] == a.tags()["categories"]
        assert b.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG" and b.overviews(1) == a.overviews(1)
        assert b.block_shapes == a.block_shapes and b.nodata == a.nodata == 255
    assert seen and seen[-1][0] == seen[-1][1] > 0


def test_windowed_is_chosen_above_the_cell_limit(tmp_path, monkeypatch):
    paths = pair(tmp_path, mess=False, elevation=False)
    calls = []
    original = change_pipeline._range_change_windowed

    def spy(*args, **kw):
        calls.append(args[2])
        return original(*args, **kw)

    monkeypatch.setattr(change_pipeline, "_range_change_windowed", spy)
    run(tmp_path, paths, "a", None)
    assert calls == []
    monkeypatch.setattr(change_pipeline, "WINDOWED_CELLS", 1000)
    run(tmp_path, paths, "b", None)
    assert calls == [paths["future"]]


def test_windowed_refuses_polygons_and_leaves_nothing(tmp_path):
    paths = pair(tmp_path, mess=False, elevation=False)
    with pytest.raises(InputError, match="--polygons .*window by window"):
        range_change(paths["now"], paths["future"], tmp_path / "c.tif", tmp_path / "c.json", threshold=0.5,
                     polygons=tmp_path / "c.gpkg", windowed=True)
    assert not list(tmp_path.glob("c.*"))


@pytest.mark.parametrize("windowed", [False, True])
def test_percent_suitability_is_refused_either_way_and_leaves_nothing(tmp_path, windowed):
    # Our own contract (thresholds are in 0..1): a percentage map would make nearly every
    # cell suitable; both the whole-grid and the window-by-window path refuse it
    rng = np.random.default_rng(3)
    paths = pair(tmp_path, mess=False, elevation=False)
    write_sparse(tmp_path / "pct.tif", 100 * sparse_values(rng, (80, 96), [(0, 0), (4, 4)]))
    with pytest.raises(InputError, match=r"pct\.tif: suitability values from .* to 9\d\.\d+; expected 0\.\.1 "
                                         r"\(a percentage\? divide by 100\)"):
        range_change(paths["now"], tmp_path / "pct.tif", tmp_path / "c.tif", tmp_path / "c.json", threshold=0.5,
                     windowed=windowed)
    assert not list(tmp_path.glob("c.*")) and not list(tmp_path.glob(".c.*"))


# ----------------------------------------------------------------------------- kernels


@pytest.mark.parametrize("reverse", [False, True])
@pytest.mark.parametrize("q", [0.05, 0.5, 0.95, 1.0])
def test_binned_quantile_equals_numpy_weighted_quantile(q, reverse):
    # Source: numpy.quantile(weights=, method="inverted_cdf"), Hyndman & Fan (1996) def. 1.
    rng = np.random.default_rng(7)
    lat = np.concatenate([rng.uniform(40, 41, 5000), np.full(50, 40.5)])  # ties in one bin too
    weights = rng.uniform(0.5, 2.0, lat.size)
    sign = -1.0 if reverse else 1.0
    hist = np.bincount(latitude_bin(lat), weights=weights, minlength=LATITUDE_BINS)
    b, below, total = quantile_bin(hist, q, reverse=reverse)
    inside = latitude_bin(lat) == b
    got = quantile_in_bin(sign * lat[inside], weights[inside], below, total, q)
    assert got == float(np.quantile(sign * lat, q, weights=weights, method="inverted_cdf"))


def test_binned_quantile_exact_share_and_empty():
    # Hand example (Hyndman & Fan 1996 def. 1): values 1..20 of equal weight, q = 0.95 is the
    # 19th value, since 19/20 reaches 0.95 exactly (the round-off slack keeps it).
    lat = np.arange(1.0, 21.0)
    hist = np.bincount(latitude_bin(lat), weights=np.ones(20), minlength=LATITUDE_BINS)
    b, below, total = quantile_bin(hist, 0.95)
    assert quantile_in_bin(lat[latitude_bin(lat) == b], np.ones(1), below, total, 0.95) == 19.0
    assert quantile_bin(np.zeros(LATITUDE_BINS), 0.5) is None
    assert latitude_bin([-90.0, 90.0, 0.0]).tolist() == [0, LATITUDE_BINS - 1, LATITUDE_BINS // 2]
