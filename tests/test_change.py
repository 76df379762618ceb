"""Range-change grid wrapper and file runner: true areas, centroid, edges, elevation, tags, errors."""

import json

import numpy as np
import pandas as pd
import pyproj
import pytest
import rioxarray  # noqa: F401  (registers .rio)
import xarray as xr

from envelope.change import CHANGE_CLASSES, change_table, classify_range_change, summarise_change
from envelope.pipelines.change import range_change, range_change_batch, write_change_table
from envelope.errors import GridMismatchError, InputError, OutputExistsError
from envelope.kernels.change import meridian_arc_km

GEOD = pyproj.Geod(ellps="WGS84")


def layer(values, lon0, lat0, res=1.0, crs="EPSG:4326"):
    """North-up (y, x) layer whose top-left corner is (lon0, lat0)."""
    values = np.asarray(values, dtype="float32")
    ny, nx = values.shape
    x = lon0 + res * (np.arange(nx) + 0.5)
    y = lat0 - res * (np.arange(ny) + 0.5)
    return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)


def geodesic_cell_area_km2(lon0, lon1, lat0, lat1, n=200):
    """Graticule cell area from pyproj's geodesic polygon with densified parallel edges."""
    # Source: pyproj.Geod.polygon_area_perimeter (Karney 2013); REFERENCES.md section 6:
    # densify the parallels (100+ points per edge agrees with the graticule area to ~3e-9).
    lons = np.concatenate([np.linspace(lon0, lon1, n), np.linspace(lon1, lon0, n)])
    lats = np.concatenate([np.full(n, lat0), np.full(n, lat1)])
    return abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6


def test_areas_against_geodesic_cells():
    # grid 60..57 N x 0..3 E, 1-degree cells; rows north to south
    now = layer([[1, 1, 0], [1, 0, 0], [0, 0, 0]], 0.0, 60.0)
    future = layer([[1, 0, 1], [1, 1, 0], [np.nan, 0, 0]], 0.0, 60.0)
    s = summarise_change(classify_range_change(now, future, 0.5), mess_given=False)
    row = [geodesic_cell_area_km2(0, 1, 60 - i - 1, 60 - i) for i in range(3)]
    # Source: REFERENCES.md section 6 check value, 59-60 N x 1 deg = 6309.805669 km2 (ellipsoid)
    assert row[0] == pytest.approx(6309.805669, rel=1e-7)
    assert s["area_km2"]["stable"] == pytest.approx(row[0] + row[1], rel=1e-7)
    assert s["area_km2"]["lost"] == pytest.approx(row[0], rel=1e-7)
    assert s["area_km2"]["gained"] == pytest.approx(row[0] + row[1], rel=1e-7)
    assert s["area_km2"]["absent"] == pytest.approx(row[1] + 2 * row[2], rel=1e-7)
    assert s["area_km2"]["gained_novel"] is None  # not assessed without MESS
    assert s["range_km2"]["now"] == pytest.approx(2 * row[0] + row[1], rel=1e-7)
    assert s["range_km2"]["future"] == pytest.approx(2 * row[0] + 2 * row[1], rel=1e-7)
    assert s["range_change_pct"] == pytest.approx(100 * row[1] / (2 * row[0] + row[1]), rel=1e-6)
    assert s["n_cells"]["nodata"] == 1 and s["n_cells"]["total"] == 9


def test_lazy_chunks_match_in_memory_and_hand_areas():
    # Common practice, no source: chunk-wise reduction equals the one-block result.
    rng = np.random.default_rng(3)
    now, future = (layer(rng.uniform(size=(6, 8)), -150.0, 45.0, res=0.5) for _ in range(2))
    area = np.ones((6, 8))  # hand-made areas: sums become cell counts
    eager = summarise_change(classify_range_change(now, future, 0.5), cell_area_km2=area, mess_given=False)
    lazy_classes = classify_range_change(now.chunk({"y": 2, "x": 3}), future.chunk({"y": 2, "x": 3}), 0.5)
    assert lazy_classes.chunks is not None  # stays lazy until reduced
    lazy = summarise_change(lazy_classes, cell_area_km2=area, mess_given=False)
    assert lazy["area_km2"] == eager["area_km2"] and lazy["n_cells"] == eager["n_cells"]
    assert lazy["leading_edge_lat"] == eager["leading_edge_lat"]
    for key in ("centroid_shift_km", "centroid_bearing_deg"):
        assert lazy[key] == pytest.approx(eager[key], rel=1e-12)
    n_lost = int(((now.values >= 0.5) & (future.values < 0.5)).sum())
    assert eager["area_km2"]["lost"] == n_lost


def test_centroid_shift_and_bearing_against_geod_inv():
    # now: two equal-area cells centred (0.5, 10.5), (1.5, 10.5) -> centroid lon 1.0 and,
    # analytically, tan(lat) = tan(10.5 deg) / cos(0.5 deg) (mean of the two surface normals).
    zeros = np.zeros((4, 4))
    now = zeros.copy(); now[3, 0:2] = 1
    north = zeros.copy(); north[1, 0:2] = 1
    east = zeros.copy(); east[3, 2:4] = 1
    lat_c = np.degrees(np.arctan(np.tan(np.radians(10.5)) / np.cos(np.radians(0.5))))
    lat_n = np.degrees(np.arctan(np.tan(np.radians(12.5)) / np.cos(np.radians(0.5))))
    s = summarise_change(classify_range_change(layer(now, 0, 14), layer(north, 0, 14), 0.5))
    assert s["centroid_now"]["lon"] == pytest.approx(1.0, abs=1e-9)
    assert s["centroid_now"]["lat"] == pytest.approx(lat_c, abs=1e-9)
    # Source: pyproj.Geod.inv distance between the hand-computed centroids
    assert s["centroid_shift_km"] == pytest.approx(GEOD.inv(1.0, lat_c, 1.0, lat_n)[2] / 1000, rel=1e-9)
    assert s["centroid_bearing_deg"] == pytest.approx(0.0, abs=1e-9)  # due north
    s = summarise_change(classify_range_change(layer(now, 0, 14), layer(east, 0, 14), 0.5))
    az, _, dist = GEOD.inv(1.0, lat_c, 3.0, lat_c)
    assert s["centroid_shift_km"] == pytest.approx(dist / 1000, rel=1e-9)
    assert s["centroid_bearing_deg"] == pytest.approx(az, abs=1e-6)
    assert s["centroid_bearing_deg"] == pytest.approx(90.0, abs=0.5)  # due east, up to convergence


def _band_shift(lat0, now_rows, future_rows, nrows=20):
    now = np.zeros((nrows, 2)); now[now_rows] = 1
    fut = np.zeros((nrows, 2)); fut[future_rows] = 1
    return classify_range_change(layer(now, 0, lat0), layer(fut, 0, lat0), 0.5)


def test_northern_range_moving_north():
    # rows 0..19 span 60..40 N; the range (rows 10..19 = 50..40 N) moves two rows north
    s = summarise_change(_band_shift(60.0, slice(10, 20), slice(8, 18)))
    assert s["poleward"] == "north"
    # hand: the top row holds ~9% (> 5%) of the band's area, so the 95th percentile is the
    # top row's centre; the bottom row holds > 5%, so the 5th percentile is the bottom row's.
    assert s["leading_edge_lat"] == {"now": 49.5, "future": 51.5}
    assert s["trailing_edge_lat"] == {"now": 40.5, "future": 42.5}
    # Source: pyproj.Geod.inv along the meridian (a geodesic) for the edge shift
    assert s["leading_edge_shift_km"] == pytest.approx(GEOD.inv(0, 49.5, 0, 51.5)[2] / 1000, rel=1e-10)
    assert s["trailing_edge_shift_km"] == pytest.approx(GEOD.inv(0, 40.5, 0, 42.5)[2] / 1000, rel=1e-10)


def test_southern_range_moving_south_is_poleward_positive():
    # rows span -20..-40; the range (rows 0..9 = -20..-30) moves three rows south
    s = summarise_change(_band_shift(-20.0, slice(0, 10), slice(3, 13)))
    assert s["poleward"] == "south"
    assert s["leading_edge_lat"] == {"now": -29.5, "future": -32.5}
    assert s["trailing_edge_lat"] == {"now": -20.5, "future": -23.5}
    # Source: pyproj.Geod.inv along the meridian
    assert s["leading_edge_shift_km"] == pytest.approx(GEOD.inv(0, -29.5, 0, -32.5)[2] / 1000, rel=1e-10)
    assert s["leading_edge_shift_km"] > 0 and s["trailing_edge_shift_km"] > 0
    assert 135 < s["centroid_bearing_deg"] < 225  # southward


def test_edge_percentile_hand_case():
    # Source: Hyndman & Fan (1996) definition 1, counted by hand: 20 equal-area rows
    # (hand-made areas), one column; row k from the south has cumulative share k/20.
    classes = _band_shift(20.0, slice(0, 20), slice(0, 20), nrows=20).isel(x=[0])
    area = np.ones((20, 1))
    s95 = summarise_change(classes, cell_area_km2=area, edge_percentile=95)
    s80 = summarise_change(classes, cell_area_km2=area, edge_percentile=80)
    assert s95["leading_edge_lat"]["now"] == 18.5   # 19th row from the south (lat 0.5 is 1st)
    assert s95["trailing_edge_lat"]["now"] == 0.5   # 5%: first row
    assert s80["leading_edge_lat"]["now"] == 15.5   # 16th row
    assert s80["trailing_edge_lat"]["now"] == 3.5   # 20%: 4th row
    with pytest.raises(InputError, match="edge percentile"):
        summarise_change(classes, cell_area_km2=area, edge_percentile=40)


def test_elevation_shift_hand_case():
    # Analytic, hand sums: now range at 100 m; future range 300 m and 500 m cells whose
    # true areas a1, a2 differ (rows 59-60 and 58-59 N) -> (a1*300 + a2*500)/(a1 + a2) - 100.
    now = layer([[0, 1], [0, 0]], 0.0, 60.0)
    future = layer([[1, 0], [1, 0]], 0.0, 60.0)
    dem = layer([[300, 100], [500, 9999]], 0.0, 60.0)
    s = summarise_change(classify_range_change(now, future, 0.5), elevation=dem)
    a1, a2 = geodesic_cell_area_km2(0, 1, 59, 60), geodesic_cell_area_km2(0, 1, 58, 59)
    assert s["elevation_shift_m"] == pytest.approx((a1 * 300 + a2 * 500) / (a1 + a2) - 100, rel=1e-7)
    assert s["mean_elevation_m"]["now"] == pytest.approx(100.0)


def test_projected_grid_centroid_is_cell_centre():
    # Source: pyproj Transformer EPSG:6933 -> EPSG:4326 (single-cell ranges: centroid = centre)
    now = np.zeros((3, 3)); now[2, 0] = 1
    fut = np.zeros((3, 3)); fut[0, 2] = 1
    res = 25_000.0
    c = classify_range_change(layer(now, 1e6, 5e6, res, "EPSG:6933"), layer(fut, 1e6, 5e6, res, "EPSG:6933"), 0.5)
    s = summarise_change(c)
    t = pyproj.Transformer.from_crs("EPSG:6933", "EPSG:4326", always_xy=True)
    lon0, lat0 = t.transform(1e6 + 0.5 * res, 5e6 - 2.5 * res)
    lon1, lat1 = t.transform(1e6 + 2.5 * res, 5e6 - 0.5 * res)
    assert s["centroid_now"]["lon"] == pytest.approx(lon0, abs=1e-9)
    assert s["centroid_now"]["lat"] == pytest.approx(lat0, abs=1e-9)
    assert s["centroid_shift_km"] == pytest.approx(GEOD.inv(lon0, lat0, lon1, lat1)[2] / 1000, rel=1e-9)
    assert s["leading_edge_shift_km"] == pytest.approx(meridian_arc_km(lat0, lat1), rel=1e-12)
    # equal-area CRS: the pixel area is the true area
    assert s["area_km2"]["lost"] == pytest.approx(res * res / 1e6, rel=1e-9)


def test_change_table_flattens():
    summaries = [{"area_km2": {"gained": 1.0, "lost": 2.0}, "classes": {"0": "absent"}, "threshold": 0.3},
                 {"area_km2": {"gained": 3.0, "lost": None}, "classes": {"0": "absent"}, "threshold": 0.3}]
    labels = [{"name": "a", "pathway": "p1", "climate_model": "m1", "horizon": "2050"},
              {"name": "b", "pathway": "p2", "climate_model": "m1", "horizon": "2070"}]
    df = change_table(summaries, labels)
    assert list(df.columns) == ["name", "pathway", "climate_model", "horizon", "area_km2.gained",
                                "area_km2.lost", "threshold"]
    assert df["area_km2.gained"].tolist() == [1.0, 3.0] and np.isnan(df["area_km2.lost"][1])
    with pytest.raises(InputError, match="label row 0 has no 'horizon'"):
        change_table(summaries[:1], [{"name": "a", "pathway": "p", "climate_model": "m"}])


# ----------------------------------------------------------------------- files

def _write(da, path, **tags):
    from envelope.io.writing import write_raster

    write_raster(da, path, tags=tags or None)
    return path


@pytest.fixture
def maps(tmp_path):
    now = layer([[0.9, 0.9, 0.1], [0.1, 0.1, 0.1]], 0.0, 10.0)
    fut = layer([[0.9, 0.1, 0.9], [0.9, 0.1, np.nan]], 0.0, 10.0)
    mess = layer([[5.0, 5.0, -3.0], [2.0, 1.0, 1.0]], 0.0, 10.0)
    return {"now": _write(now, tmp_path / "now.tif", threshold=0.5, threshold_rule="max_tss"),
            "future": _write(fut, tmp_path / "future.tif", threshold=0.5, threshold_rule="max_tss"),
            "mess": _write(mess, tmp_path / "mess.tif"), "dir": tmp_path}


def test_classes_and_categories_round_trip(maps):
    # Common practice, no source: codes and meanings stored in the written file's tags.
    from envelope.io.rasters import open_layer, read_tags

    out, summ = maps["dir"] / "c.tif", maps["dir"] / "c.json"
    s = range_change(maps["now"], maps["future"], out, summ, mess=maps["mess"])
    tags = read_tags(out)
    assert tags["categories"] == CHANGE_CLASSES
    assert tags["threshold"] == 0.5
    got = open_layer(out, categorical=True).values
    assert got.tolist() == [[2, 1, 4], [3, 0, 255]]
    assert json.loads(summ.read_text()) == s and s["threshold_rule"] == "max_tss"
    assert s["area_km2"]["gained_novel"] > 0
    out2, summ2 = maps["dir"] / "d.tif", maps["dir"] / "d.json"
    s2 = range_change(maps["now"], maps["future"], out2, summ2)  # no MESS: no gained_novel
    assert open_layer(out2, categorical=True).values.tolist() == [[2, 1, 3], [3, 0, 255]]
    assert s2["area_km2"]["gained_novel"] is None and s2["inputs"]["mess"] is None


def test_file_errors_write_nothing(maps, tmp_path):
    out, summ = tmp_path / "c.tif", tmp_path / "c.json"
    other = _write(layer([[0.5, 0.5, 0.5], [0.5, 0.5, 0.5]], 1.0, 10.0), tmp_path / "shifted.tif", threshold=0.5)
    with pytest.raises(GridMismatchError, match=r"shifted\.tif.*now\.tif"):
        range_change(maps["now"], other, out, summ)
    bare = _write(layer([[0.5, 0.5, 0.5], [0.5, 0.5, 0.5]], 0.0, 10.0), tmp_path / "bare.tif")
    with pytest.raises(InputError, match="bare.tif has no 'threshold' tag; pass --threshold"):
        range_change(bare, bare, out, summ)
    assert not out.exists() and not summ.exists()
    summ.write_text("old")
    with pytest.raises(OutputExistsError, match="add --overwrite"):
        range_change(maps["now"], maps["future"], out, summ)
    assert not out.exists() and summ.read_text() == "old"


def test_batch_writes_all_and_table(maps, tmp_path):
    scen = tmp_path / "scenarios.csv"
    pd.DataFrame({"name": ["p1_m1_2050", "p2_m1_2070"], "pathway": ["p1", "p2"], "climate_model": ["m1", "m1"],
                  "horizon": ["2050", "2070"], "path": ["future.tif", "now.tif"],
                  "mess_path": ["mess.tif", ""]}).to_csv(scen, index=False)
    df = range_change_batch(maps["now"], scen, tmp_path / "out", tmp_path / "changes.csv")
    assert (tmp_path / "out" / "p1_m1_2050.tif").exists() and (tmp_path / "out" / "p2_m1_2070.json").exists()
    back = pd.read_csv(tmp_path / "changes.csv")
    assert back["name"].tolist() == ["p1_m1_2050", "p2_m1_2070"]
    assert back["range_change_pct"][1] == pytest.approx(0.0)  # now vs itself
    assert back["area_km2.lost"][1] == 0.0
    assert df["area_km2.gained_novel"].isna().tolist() == [False, True]
    write_change_table(df, tmp_path / "copy.csv")
    with pytest.raises(OutputExistsError):
        write_change_table(df, tmp_path / "copy.csv")
    # a missing future file is named with its row; nothing new is written
    pd.DataFrame({"name": ["x"], "pathway": ["p"], "climate_model": ["m"], "horizon": ["2050"],
                  "path": ["nope.tif"]}).to_csv(scen, index=False)
    with pytest.raises(InputError, match=r"row 1 \(x\) future suitability raster .*nope.tif not found"):
        range_change_batch(maps["now"], scen, tmp_path / "out2", tmp_path / "c2.csv")
    assert not (tmp_path / "out2").exists() and not (tmp_path / "c2.csv").exists()


def test_stable_novel_counts_in_both_ranges(maps):
    # Source: Elith, Kearney & Phillips (2010), MESS < 0 = novel climate. Analytic: a stable
    # cell stays in the range now and in the future whatever its MESS, so moving it from
    # class 2 to class 5 leaves both range sizes unchanged.
    from envelope.io.rasters import open_layer

    mess = _write(layer([[-1.0, 5.0, -3.0], [2.0, 1.0, 1.0]], 0.0, 10.0), maps["dir"] / "mess_stable.tif",
                  most_dissimilar_variables="[\"t\"]")
    out, summ = maps["dir"] / "e.tif", maps["dir"] / "e.json"
    s = range_change(maps["now"], maps["future"], out, summ, mess=mess)
    assert open_layer(out, categorical=True).values.tolist() == [[5, 1, 4], [3, 0, 255]]
    plain = range_change(maps["now"], maps["future"], maps["dir"] / "f.tif", maps["dir"] / "f.json",
                         mess=maps["mess"])
    assert s["area_km2"]["stable"] == 0 and s["area_km2"]["stable_novel"] == plain["area_km2"]["stable"]
    assert s["area_km2"]["stable_total"] == pytest.approx(plain["area_km2"]["stable_total"])
    assert s["range_km2"] == pytest.approx(plain["range_km2"])
    assert s["classes"]["5"] == "stable_novel"


@pytest.mark.parametrize("values, message", [
    ([0.0, 0.5, 98.0], r"m: suitability values from 0 to 98; expected 0\.\.1 \(a percentage\? divide by 100\)"),
    ([0.0, 255.0], r"m: suitability values from 0 to 255; expected 0\.\.1 \(scaled integers\?"),
    ([-0.5, 0.5], r"m: suitability values from -0\.5 to 0\.5; expected 0\.\.1$"),
    ([np.nan, np.nan], r"m: the suitability map holds no valid cell"),
])
def test_suitability_outside_0_1_is_refused(values, message):
    # Our own contract: suitability and its threshold are in 0..1 (docs/change.md)
    from envelope.change import check_suitability_values

    for array in (np.array(values), xr.DataArray(np.array(values)).chunk(1)):
        with pytest.raises(InputError, match=message):
            check_suitability_values(array, "m")
    check_suitability_values(np.array([0.0, np.nan, 1.0]), "m")
    check_suitability_values(np.array([np.nan]), "m", require_valid=False)
