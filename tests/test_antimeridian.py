"""Grids across the 180° meridian end to end: reading, records, areas, background, CV blocks, change, reach, maps, front."""

import json

import numpy as np
import pandas as pd
import pyproj
import pytest
import rasterio
import rioxarray  # noqa: F401  (registers .rio)
import xarray as xr
from rasterio.transform import from_origin

from envelope.background import draw_background
from envelope.change import classify_range_change, summarise_change
from envelope.errors import InputError
from envelope.evaluation import project_km, spatial_blocks
from envelope.grids import cell_area_km2, crosses_antimeridian, spans_globe
from envelope.io.rasters import open_climate
from envelope.reach import DispersalSettings, build_operator, front_geojson, simulate_reach
from envelope.records import clean_occurrences

GEOD = pyproj.Geod(ellps="WGS84")
NY, NX = 6, 20            # 1-degree cells
LAT_TOP = 40.0            # 34..40 N: open North Pacific on both sides of 180


def _values(nv=2):
    rng = np.random.default_rng(5)
    return rng.normal(size=(nv, NY, NX)).astype("float32")


def _tif(path, west, data, res=1.0):
    with rasterio.open(path, "w", driver="GTiff", height=data.shape[1], width=data.shape[2], count=data.shape[0],
                       dtype="float32", crs="EPSG:4326", transform=from_origin(west, LAT_TOP, res, res),
                       nodata=np.nan) as dst:
        dst.write(data)
        dst.descriptions = tuple(f"v{i}" for i in range(data.shape[0]))
    return path


def _nc(path, lon, data):
    lat = LAT_TOP - (np.arange(data.shape[1]) + 0.5)
    ds = xr.Dataset({f"v{i}": (("lat", "lon"), data[i]) for i in range(data.shape[0])},
                    coords={"lat": ("lat", lat, {"units": "degrees_north"}),
                            "lon": ("lon", lon, {"units": "degrees_east"})})
    ds.to_netcdf(path)
    return path


def _layer(values, west, res=1.0):
    values = np.asarray(values, dtype="float32")
    ny, nx = values.shape
    x = west + res * (np.arange(nx) + 0.5)
    y = LAT_TOP - res * (np.arange(ny) + 0.5)
    return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs("EPSG:4326")


def _cell_polygon_km2(lon0, lon1, lat0, lat1, n=200):
    # Source: pyproj.Geod.polygon_area_perimeter (Karney 2013); parallels densified, as in tests/test_change.py;
    # vertices given in -180..180 (a cell over 180 has vertices on both sides)
    lons = np.concatenate([np.linspace(lon0, lon1, n), np.linspace(lon1, lon0, n)])
    lons = ((lons + 180.0) % 360.0) - 180.0
    lats = np.concatenate([np.full(n, lat0), np.full(n, lat1)])
    return abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6


# ------------------------------------------------------------------ reading


def test_three_spellings_of_a_grid_over_180_read_alike(tmp_path):
    data = _values()
    expected = 170.5 + np.arange(NX)
    east_0_360 = open_climate(_tif(tmp_path / "a.tif", 170.0, data))                  # 170 … 190
    west_negative = open_climate(_tif(tmp_path / "b.tif", -190.0, data))              # -190 … -170
    split = np.concatenate([170.5 + np.arange(10), -179.5 + np.arange(10)])           # 170 … 180, -180 … -170
    netcdf = open_climate(_nc(tmp_path / "c.nc", split, data))
    shuffled = np.random.default_rng(1).permutation(NX)                               # any column order
    netcdf_shuffled = open_climate(_nc(tmp_path / "d.nc", split[shuffled], data[:, :, shuffled]))
    # Analytic: the same 20 columns side by side, 170.5 … 189.5, holding the same values
    for stack in (east_0_360, west_negative, netcdf, netcdf_shuffled):
        np.testing.assert_allclose(stack["x"].values, expected)
        np.testing.assert_array_equal(stack.values, data)
        assert crosses_antimeridian(stack) and not spans_globe(stack)
        left, _, right, _ = stack.rio.bounds()
        assert (left, right) == pytest.approx((170.0, 190.0))


def test_global_0_360_grid_reads_minus_180_to_180_and_is_periodic(tmp_path):
    lon = 0.5 + np.arange(360)
    data = np.tile(lon.astype("float32"), (1, NY, 1))
    stack = open_climate(_nc(tmp_path / "g.nc", lon, data))
    # Analytic: the project's convention, -179.5 … 179.5, each column keeping its value (lon 180.5 -> -179.5)
    np.testing.assert_allclose(stack["x"].values, -179.5 + np.arange(360))
    assert float(stack.isel(variable=0, y=0, x=0)) == 180.5
    assert spans_globe(stack) and not crosses_antimeridian(stack)


# ------------------------------------------------------------------ records


def test_records_on_either_side_of_180_land_on_their_cells():
    grid = _layer(np.ones((NY, NX)), 170.0).expand_dims(variable=["t"])
    table = pd.DataFrame({"decimalLongitude": [179.5, -179.5, -170.5, -169.5, 169.5],
                          "decimalLatitude": [38.5, 38.5, 35.5, 38.5, 38.5]})
    table["x_record"], table["y_record"] = table["decimalLongitude"], table["decimalLatitude"]
    rec = clean_occurrences(table, grid, crs="EPSG:4326")
    # Analytic: columns 9 (179..180), 10 (180..181 = -180..-179), 19 (189..190 = -171..-170); the last two are
    # east of 190 (= -170) and west of 170: off the grid
    assert rec.table["col"].tolist() == [9, 10, 19]
    assert rec.table["x"].tolist() == [179.5, 180.5, 189.5]
    assert rec.table["x_record"].tolist() == [179.5, -179.5, -170.5]
    assert rec.dropped["outside_grid"] == 2


# ------------------------------------------------------------------ areas, background, CV blocks


def test_cell_areas_across_the_seam_against_geodesic_polygons():
    grid = _layer(np.ones((NY, NX)), 170.0)
    areas = cell_area_km2(grid).values
    for row in (0, NY - 1):
        lat1 = LAT_TOP - row
        for col in (9, 10, 12):
            lon0 = 170.0 + col
            # Source: pyproj.Geod polygon of the same cell
            ref = _cell_polygon_km2(lon0, lon0 + 1.0, lat1 - 1, lat1)
            assert areas[row, col] == pytest.approx(ref, rel=1e-7)
    # Source: pyproj.Geod, the whole 170 … 190 extent as one polygon crossing 180 in -180..180 longitudes
    lons = np.concatenate([np.linspace(170, 190, 400), np.linspace(190, 170, 400)])
    lons = ((lons + 180) % 360) - 180
    lats = np.concatenate([np.full(400, LAT_TOP - NY), np.full(400, LAT_TOP)])
    total = abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6
    assert areas.sum() == pytest.approx(total, rel=1e-6)


def test_background_across_the_seam_draws_as_anywhere_else():
    seam = _layer(np.ones((NY, NX)), 170.0)
    control = _layer(np.ones((NY, NX)), -160.0)
    a = draw_background(seam, 2000, seed=3).table
    b = draw_background(control, 2000, seed=3).table
    # Analytic: graticule cell areas depend on latitude only, so the same cells are drawn on both grids
    np.testing.assert_array_equal(a[["row", "col"]].to_numpy(), b[["row", "col"]].to_numpy())
    np.testing.assert_allclose(a["x"].to_numpy() - 330.0, b["x"].to_numpy())
    assert (a["x"] > 180).mean() == pytest.approx(0.5, abs=0.06)  # half the columns lie east of 180


def test_cv_blocks_are_not_cut_at_the_seam():
    lat = np.full(8, 35.0)
    offsets = np.array([-0.35, -0.25, -0.15, -0.05, 0.05, 0.15, 0.25, 0.35])
    seam_continuous, seam_wrapped = 180.0 + offsets, ((180.0 + offsets + 180.0) % 360.0) - 180.0
    control = -150.0 + offsets
    xk, yk = project_km(seam_wrapped, lat, crs="EPSG:4326")
    for i in range(len(offsets) - 1):
        # Source: pyproj.Geod.inv between neighbours; the projection keeps them side by side across 180
        _, _, d = GEOD.inv(seam_wrapped[i], 35.0, seam_wrapped[i + 1], 35.0)
        assert np.hypot(xk[i + 1] - xk[i], yk[i + 1] - yk[i]) == pytest.approx(d / 1000.0, rel=2e-3)
    blocks = [spatial_blocks(x, lat, crs="EPSG:4326", block_km=40.0) for x in (seam_continuous, seam_wrapped, control)]
    # Analytic: the points span 0.7 deg x 111.3 km x cos 35 deg = 64 km: 2 blocks of 40 km at lon -150, and the
    # same 2 at 180
    assert blocks[0].tolist() == blocks[1].tolist() == blocks[2].tolist()
    assert len(set(blocks[2].tolist())) == 2


# ------------------------------------------------------------------ change


def test_centroid_and_bearing_across_the_seam_against_geod():
    now = np.zeros((NY, NX))
    future = np.zeros((NY, NX))
    now[2:4, 7:11] = 1.0       # 177 … 181, symmetric about 179
    future[2:4, 10:14] = 1.0   # 180 … 184, symmetric about 182 (= -178)
    s = summarise_change(classify_range_change(_layer(now, 170.0), _layer(future, 170.0), 0.5), mess_given=False)
    c_now, c_fut = s["centroid_now"], s["centroid_future"]
    # Analytic (symmetry): centroid longitudes 179 and -178 (labelled in -180..180), latitudes equal
    assert c_now["lon"] == pytest.approx(179.0, abs=1e-9)
    assert c_fut["lon"] == pytest.approx(-178.0, abs=1e-9)
    assert c_now["lat"] == pytest.approx(c_fut["lat"], abs=1e-9)
    assert 36.0 < c_now["lat"] < 38.0
    # Source: pyproj.Geod.inv between the two centroids (Karney 2013); a naive mean of longitudes would put
    # the future centroid near 0 deg and the shift at thousands of km
    az, _, dist = GEOD.inv(c_now["lon"], c_now["lat"], c_fut["lon"], c_fut["lat"])
    assert s["centroid_shift_km"] == pytest.approx(dist / 1000.0, rel=1e-9)
    assert s["centroid_shift_km"] < 300.0   # 3 deg of longitude at 37 N; a naive mean would give ~16,000 km
    assert s["centroid_bearing_deg"] == pytest.approx(az % 360.0, abs=1e-9)
    assert 85.0 < s["centroid_bearing_deg"] < 95.0

    straddle = np.zeros((NY, NX))
    straddle[2:4, 8:12] = 1.0  # 178 … 182: symmetric about 180
    t = summarise_change(classify_range_change(_layer(straddle, 170.0), _layer(straddle, 170.0), 0.5),
                         mess_given=False)
    # Analytic: circular mean of 178.5 … 181.5 is 180 (a range straddling the seam is not centred at 0)
    assert abs(t["centroid_now"]["lon"]) == pytest.approx(180.0, abs=1e-9)


# ------------------------------------------------------------------ reach and front


def _reach(west, nx=NX, res=1.0, start_cols=(7, 8), mean_km=40.0, years=20):
    ny = NY
    now = np.zeros((ny, nx))
    now[:, : nx // 2] = 1.0
    future = np.ones((ny, nx))
    start = np.zeros((ny, nx))
    start[:, list(start_cols)] = 1.0
    now_da, fut_da = _layer(now, west, res), _layer(future, west, res)
    hab = _layer(np.ones((ny, nx)), west, res)
    return simulate_reach(now_da, [(2020 + years, fut_da)], hab, start, threshold=0.5,
                          settings=DispersalSettings("exponential", mean_km), now_year=2020, rate=3.0,
                          snapshot_every_years=10.0, fragmentation_band_deg=None)


def test_reach_spreads_across_the_seam_as_anywhere_else():
    seam, control = _reach(170.0), _reach(-160.0)
    # Analytic: the same landscape shifted by 330 deg of longitude spreads alike (areas depend on latitude only)
    for year in seam.occupancy:
        np.testing.assert_allclose(seam.occupancy[year].values, control.occupancy[year].values, atol=1e-12)
    final = seam.occupancy[max(seam.occupancy)].values
    assert final[:, 10:].max() > 0.5          # columns east of 180 are reached
    assert seam.summary["front_advance_km"] == control.summary["front_advance_km"]
    assert seam.summary["area_km2"]["gained_reached"] > 0
    assert seam.summary["area_km2"] == pytest.approx(control.summary["area_km2"], rel=1e-9)


def test_front_geojson_cut_at_the_antimeridian():
    result = _reach(170.0)
    front = result.front
    json.dumps(front)
    coords = [pt for f in front["features"] for line in f["geometry"]["coordinates"] for pt in line]
    assert coords
    # Source: RFC 7946 §3.1.9 -- longitudes within -180..180, no part crossing the antimeridian
    assert all(-180.0 <= lon <= 180.0 for lon, _ in coords)
    for f in front["features"]:
        for line in f["geometry"]["coordinates"]:
            lons = np.array([p[0] for p in line])
            assert np.all(np.abs(np.diff(lons)) < 180.0)


def test_front_geojson_in_continuous_coordinates_matches_wrapped_ones():
    occupancy = np.zeros((NY, NX))
    occupancy[1:5, 6:14] = 1.0
    seam = front_geojson(_layer(occupancy, 170.0), {2030: _layer(occupancy, 170.0)})
    lines = seam["features"][0]["geometry"]["coordinates"]
    pts = np.array([p for line in lines for p in line])
    # Analytic: the 0.5 contour of cells 176..184 x 35..39 (centres 176.5 … 183.5) runs half a cell outside
    # the centres, round the box; in -180..180 longitudes
    lons = np.where(pts[:, 0] < 0, pts[:, 0] + 360.0, pts[:, 0])
    assert lons.min() == pytest.approx(176.0) and lons.max() == pytest.approx(184.0)
    assert pts[:, 1].min() == pytest.approx(35.0) and pts[:, 1].max() == pytest.approx(39.0)
    # Source: RFC 7946 §3.1.9 -- the ring is cut where it crosses 180 (twice: top and bottom edge); the cut
    # points lie on the meridian at the latitude of the edge
    ends = sorted((round(line[i][0], 9), round(line[i][1], 9)) for line in lines for i in (0, -1))
    assert [e for e in ends if abs(e[0]) == 180.0] == [(-180.0, 35.0), (-180.0, 39.0), (180.0, 35.0), (180.0, 39.0)]
    assert all(np.all(np.abs(np.diff([p[0] for p in line])) < 180.0) for line in lines)


def test_spread_wraps_round_a_globe_circling_grid():
    nx, res = 36, 10.0
    grid = _layer(np.ones((NY, nx)), -180.0, res)
    assert spans_globe(grid)
    op = build_operator(grid, DispersalSettings("exponential", 400.0))
    assert op.periodic_x
    occ = np.zeros((NY, nx))
    occ[3, 0] = 1.0   # the column just east of -180
    p = op.pressure(occ)
    # Analytic (mirror symmetry about the source column on a periodic axis): the column west of it is the
    # grid's last column, at the same distance as column 1
    assert p[3, nx - 1] > 0
    assert p[3, nx - 1] == pytest.approx(p[3, 1], rel=1e-9)
    regional = build_operator(_layer(np.ones((NY, nx - 1)), -180.0, res), DispersalSettings("exponential", 400.0))
    assert not regional.periodic_x


# ------------------------------------------------------------------ maps


def test_map_over_180_is_continuous_and_labelled_minus_180_to_180():
    from envelope import figures

    values = np.tile(np.arange(NX, dtype=float), (NY, 1))
    fig = figures.map_continuous(_layer(values, 170.0), title="seam")
    ax = fig.axes[0]
    fig.canvas.draw()
    # one image spanning the grid's continuous longitudes, not cut at 180
    left, right = ax.get_xlim()
    assert (left, right) == pytest.approx((170.0, 190.0))
    labels = {round(t, 6): lab.get_text() for t, lab in zip(ax.get_xticks(), ax.get_xticklabels())
              if left <= t <= right}
    # Common practice, no source: map longitudes read -180..180 with E/W; 180 itself has no hemisphere
    assert labels[175.0] == "175°E" and labels[180.0] == "180°" and labels[185.0] == "175°W"
    with pytest.raises(InputError, match="180° meridian"):
        figures.map_continuous(_layer(values, 170.0), use_cartopy=True)


# ------------------------------------------------------------------ a virtual species on two islands


def _island(tmp_path, name, west, lon_c):
    """An invented island landscape (sea = NaN) of 60 x 40 quarter-degree cells and its virtual species.

    The same island, climate and records are laid out relative to the island's centre ``lon_c``; the
    climate is written in 0-360 longitudes (west edge ``west``) and the records in -180..180.
    """
    res, nx, ny, top = 0.25, 60, 40, 40.0
    dx = (np.arange(nx) + 0.5) * res - nx * res / 2          # degrees east of the centre
    dy = top - (np.arange(ny) + 0.5) * res - 35.0            # degrees north of 35 N (open ocean, no real land)
    gx, gy = np.meshgrid(dx, dy)
    land = (gx / 6.5) ** 2 + (gy / 4.0) ** 2 < 1.0
    temp = 8.0 - 1.2 * gy + 0.3 * gx                          # warmer south and east
    prec = 900.0 + 60.0 * gx - 20.0 * gy                      # wetter east
    # the virtual species: a Gaussian niche in (temp, prec); present where suitability > 0.5
    truth = np.exp(-((temp - 9.0) / 1.5) ** 2 / 2 - ((prec - 1000.0) / 120.0) ** 2 / 2)
    present = land & (truth > 0.5)
    climate = np.stack([np.where(land, temp, np.nan), np.where(land, prec, np.nan)]).astype("float32")
    with rasterio.open(tmp_path / f"{name}.tif", "w", driver="GTiff", height=ny, width=nx, count=2, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(west, top, res, res), nodata=np.nan) as dst:
        dst.write(climate)
        dst.descriptions = ("temp", "prec")
    rows, cols = np.nonzero(present)
    pick = np.random.default_rng(11).choice(rows.size, size=60, replace=False)
    lon = lon_c + dx[cols[pick]]
    pd.DataFrame({"decimalLongitude": ((lon + 180.0) % 360.0) - 180.0,
                  "decimalLatitude": 35.0 + dy[rows[pick]]}).to_csv(tmp_path / f"{name}.csv", index=False)
    return land, present


def test_virtual_species_on_an_island_over_180_is_recovered_as_on_another_island(tmp_path):
    from click.testing import CliRunner
    from sklearn.metrics import roc_auc_score

    from envelope.cli.main import cli
    from envelope.io.rasters import open_layer

    scores = {}
    for name, west, lon_c in (("seam", 172.5, 180.0), ("control", -157.5, -150.0)):
        land, present = _island(tmp_path, name, west, lon_c)
        model, suit = tmp_path / f"{name}.envm", tmp_path / f"{name}_suit.tif"
        fit = CliRunner().invoke(cli, ["fit", "--presences", str(tmp_path / f"{name}.csv"), "--climate",
                                       str(tmp_path / f"{name}.tif"), "--out", str(model), "--background", "2000",
                                       "--folds", "3", "--blocks-km", "60", "--seed", "2"])
        assert fit.exit_code == 0, fit.output
        proj = CliRunner().invoke(cli, ["project", str(model), "--climate", str(tmp_path / f"{name}.tif"),
                                        "--out", str(suit)])
        assert proj.exit_code == 0, proj.output
        predicted = open_layer(suit).values
        summary = json.loads(model.with_suffix(".fit.json").read_text())
        # Source: scikit-learn roc_auc_score of the projected map against the species' true presence cells
        scores[name] = (roc_auc_score(present[land], predicted[land]), summary["n_presences"])
    auc_seam, n_seam = scores["seam"]
    auc_control, n_control = scores["control"]
    assert n_seam == n_control == 60          # no record east of 180 dropped as off the grid
    assert auc_control > 0.9
    # Common practice, no source: the same island and records shifted by 330 deg score alike (within 0.01 AUC)
    assert auc_seam == pytest.approx(auc_control, abs=0.01)


# ------------------------------------------------------------------ delta method and aligned layers


@pytest.mark.parametrize("model_lon", [
    np.arange(160.0, 201.0, 2.0),                                          # regional, 0-360, over 180
    np.concatenate([np.arange(160.0, 180.0, 2.0), np.arange(-180.0, -159.0, 2.0)]),   # split at 180
])
def test_delta_change_interpolated_across_the_seam(model_lon):
    from envelope.delta import delta

    def monthly(values, x, y):
        return xr.DataArray(np.broadcast_to(values, (12,) + values.shape).astype("float32"), dims=("month", "y", "x"),
                            coords={"month": np.arange(1, 13), "y": y, "x": x}).rio.write_crs("EPSG:4326")

    lat = np.arange(42.0, 31.0, -2.0)
    cont = np.where(model_lon < 0, model_lon + 360.0, model_lon)          # continuous 160 … 200
    hist = monthly(np.zeros((lat.size, model_lon.size)), model_lon, lat)
    fut = monthly(np.tile(cont - 160.0, (lat.size, 1)), model_lon, lat)  # a change linear in longitude
    base = _layer(np.zeros((NY, NX)), 170.0)
    baseline = monthly(base.values, base["x"].values, base["y"].values)
    out = delta(baseline, hist, fut, method="additive").values
    # Analytic: bilinear interpolation reproduces a field linear in longitude exactly -> change = x - 160
    np.testing.assert_allclose(out[0], np.tile(base["x"].values - 160.0, (NY, 1)), atol=1e-4)


def test_align_to_a_grid_over_180_from_a_global_layer():
    from envelope.grids import align_to

    lon = -180.0 + 0.1 * (np.arange(3600) + 0.5)
    lat = LAT_TOP - 0.1 * (np.arange(60) + 0.5)
    src = xr.DataArray(np.tile(np.where(lon < 0, lon + 360.0, lon), (60, 1)).astype("float32"), dims=("y", "x"),
                       coords={"y": lat, "x": lon}).rio.write_crs("EPSG:4326")
    out = align_to(src, _layer(np.zeros((NY, NX)), 170.0), resampling="average")
    # Source: GDAL warp (rioxarray reproject_match) -- the mean of 0-360 longitudes over each 1-degree cell
    np.testing.assert_allclose(out.values[0], 170.5 + np.arange(NX), atol=1e-3)
