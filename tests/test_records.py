"""Cleaning occurrence records against a grid: drop reasons, reprojection, cell lookup, thinning."""

import numpy as np
import pandas as pd
import pyproj
import pytest
import rasterio.transform
import dask.array as dsa
from sklearn.metrics.pairwise import haversine_distances

from tests.conftest import make_stack
from envelope.errors import InputError
from envelope.records import DROP_REASONS, EARTH_RADIUS_M, clean_occurrences, thin_greedy, values_at

# make_stack(): 20 x 15 cells of 0.1 deg, west edge -150, north edge 45 (open ocean).
LON0, LAT0, RES = -150.0, 45.0, 0.1


def centre(row, col):
    return LON0 + RES * (col + 0.5), LAT0 - RES * (row + 0.5)


def dwc(rows):
    return pd.DataFrame(rows, columns=["decimalLongitude", "decimalLatitude", "coordinateUncertaintyInMeters",
                                       "year", "occurrenceStatus"])


def test_every_reason_counted_exactly():
    # Source: constructed table; each count follows from the construction (common practice, no source).
    grid = make_stack()
    grid[:, 10, 10] = np.nan  # one cell without climate
    lon, lat = centre(2, 2)
    rows = [
        [lon, lat, 10, 2000, "present"],            # kept
        [lon, lat, 10, 2000, "absent"],             # absent
        [lon, lat, 10, 2000, "0"],                  # absent
        ["east", lat, 10, 2000, "present"],         # malformed: not a number
        [None, lat, 10, 2000, "present"],           # malformed: missing
        [lon, 95.0, 10, 2000, "present"],           # malformed: latitude out of range
        [lon, lat, 5000, 2000, "present"],          # imprecise
        [lon, lat, 10, 1950, "present"],            # outside_years
        [lon, lat, 10, None, "present"],            # outside_years: no year while a range is asked for
        [-20.0, 10.0, 10, 2000, "present"],         # outside_grid
        [*centre(10, 10), 10, 2000, "present"],     # no_climate
        [lon + 0.01, lat, 10, 2000, "present"],     # duplicate_cell (same cell as the first)
        [*centre(2, 3), 10, 2000, "present"],       # thinned: 0.1 deg (~7.9 km) from the first
        [*centre(12, 15), None, 2005, None],        # kept: unknown uncertainty and status are kept
    ]
    records = clean_occurrences(dwc(rows), grid, max_uncertainty_m=1000, record_years=(1990, 2020), thin_km=10)
    expected = {"other_taxon": 0, "absent": 2, "malformed": 3, "imprecise": 1, "outside_years": 2, "outside_grid": 1,
                "no_climate": 1, "duplicate_cell": 1, "thinned": 1}
    assert dict(records.dropped) == expected
    assert list(records.dropped) == list(DROP_REASONS)
    assert records.n_read == 14 and records.n_kept == 2
    assert records.summary()["kept"] + sum(records.summary()["dropped"].values()) == records.summary()["read"]
    assert records.table[["row", "col"]].values.tolist() == [[2, 2], [12, 15]]


def test_reasons_all_present_with_zeros_and_columns():
    # Common practice, no source: a clean table drops nothing, and every reason is still listed.
    grid = make_stack()
    table = pd.DataFrame({"decimalLongitude": [centre(0, 0)[0], centre(5, 7)[0]],
                          "decimalLatitude": [centre(0, 0)[1], centre(5, 7)[1]],
                          "occurrenceID": ["r1", "r2"]})
    records = clean_occurrences(table, grid)
    assert list(records.dropped.items()) == [(reason, 0) for reason in DROP_REASONS]
    assert list(records.table.columns[:6]) == ["x", "y", "row", "col", "x_record", "y_record"]
    assert records.table["occurrenceID"].tolist() == ["r1", "r2"]
    assert records.crs == "EPSG:4326"


def test_eventdate_gives_the_year():
    # Source: ISO 8601 dates and intervals, as Darwin Core eventDate uses them; the start year counts.
    grid = make_stack()
    lon, lat = centre(3, 3)
    table = pd.DataFrame({"decimalLongitude": [lon, centre(4, 4)[0], centre(5, 5)[0], centre(6, 6)[0]],
                          "decimalLatitude": [lat, centre(4, 4)[1], centre(5, 5)[1], centre(6, 6)[1]],
                          "eventDate": ["1995-06-01", "1989-12-31/1990-01-02", "2020", "garbage"]})
    records = clean_occurrences(table, grid, record_years=(1990, 2020))
    assert records.dropped["outside_years"] == 2
    assert records.table["eventDate"].tolist() == ["1995-06-01", "2020"]


def test_records_in_projected_crs_onto_geographic_grid():
    # Source: pyproj Transformer (always_xy) as the reference for the reprojection;
    # rasterio.transform.rowcol as the reference for the cell lookup. UTM zone 5N covers -156..-150.
    grid = make_stack()
    rng = np.random.default_rng(3)
    lon = rng.uniform(LON0 + 0.01, LON0 + 1.99, 40)
    lat = rng.uniform(LAT0 - 1.49, LAT0 - 0.01, 40)
    east, north = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32605", always_xy=True).transform(lon, lat)
    table = pd.DataFrame({"x_record": east, "y_record": north})
    records = clean_occurrences(table, grid, crs="EPSG:32605", one_per_cell=False)
    want_rows, want_cols = rasterio.transform.rowcol(grid.rio.transform(), lon, lat)
    assert records.table["row"].tolist() == list(want_rows)
    assert records.table["col"].tolist() == list(want_cols)
    np.testing.assert_allclose(records.table["x_record"], east)  # original coordinates kept
    assert records.record_crs == "EPSG:32605"


def test_geographic_records_onto_projected_grid():
    # Source: pyproj Transformer (always_xy) and rasterio.transform.rowcol as references.
    grid = make_stack(nx=30, ny=20, lon0=200_000.0, lat0=5_000_000.0, res=1000.0, crs="EPSG:32605")
    to_geo = pyproj.Transformer.from_crs("EPSG:32605", "EPSG:4326", always_xy=True)
    rng = np.random.default_rng(4)
    east = rng.uniform(200_010, 229_990, 50)
    north = rng.uniform(4_980_010, 4_999_990, 50)
    lon, lat = to_geo.transform(east, north)
    records = clean_occurrences(pd.DataFrame({"decimalLongitude": lon, "decimalLatitude": lat}), grid,
                                one_per_cell=False)
    back_e, back_n = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32605", always_xy=True).transform(lon, lat)
    want_rows, want_cols = rasterio.transform.rowcol(grid.rio.transform(), back_e, back_n)
    assert records.table["row"].tolist() == list(want_rows)
    assert records.table["col"].tolist() == list(want_cols)
    # x, y are cell centres in the grid CRS
    np.testing.assert_allclose(records.table["x"], 200_000 + 1000 * (np.asarray(want_cols) + 0.5))
    assert records.crs == "EPSG:32605"


def test_cell_edges_are_half_open():
    # Source: GDAL/rasterio pixel convention, a pixel covers [left, right) x (bottom, top]; points on
    # an inner edge go east/south, the east and south outer edges are outside (rasterio rowcol, op=floor).
    grid = make_stack()
    table = pd.DataFrame({
        "decimalLongitude": [LON0, LON0 + 3 * RES, LON0 + 20 * RES, LON0 + 0.05, LON0 + 0.05],
        "decimalLatitude": [LAT0, LAT0 - 0.05, LAT0 - 0.05, LAT0 - 4 * RES, LAT0 - 15 * RES],
    })
    records = clean_occurrences(table, grid, one_per_cell=False)
    assert records.table[["row", "col"]].values.tolist() == [[0, 0], [0, 3], [4, 0]]
    assert records.dropped["outside_grid"] == 2


def haversine_km(lon, lat):
    points = np.radians(np.column_stack([lat, lon]))
    return haversine_distances(points) * EARTH_RADIUS_M / 1000.0


def naive_greedy(distance, min_km):
    kept = []
    for i in range(distance.shape[0]):
        if all(distance[i, j] > min_km for j in kept):
            kept.append(i)
    return kept


def test_thinning_geographic_against_haversine_and_geod():
    # Source: sklearn.metrics.pairwise.haversine_distances (same sphere radius) and pyproj.Geod
    # (WGS84 geodesics; sphere and ellipsoid differ by < 0.6 %, from memory: ~0.5 % at most).
    grid = make_stack(nx=60, ny=60, res=0.05)
    rng = np.random.default_rng(7)
    rows, cols = rng.integers(0, 60, 150), rng.integers(0, 60, 150)
    lon, lat = LON0 + 0.05 * (cols + 0.5), LAT0 - 0.05 * (rows + 0.5)
    table = pd.DataFrame({"decimalLongitude": lon, "decimalLatitude": lat})
    records = clean_occurrences(table, grid, thin_km=25, one_per_cell=False)
    kept_lon, kept_lat = records.table["x"].to_numpy(), records.table["y"].to_numpy()
    d = haversine_km(kept_lon, kept_lat)
    assert d[np.triu_indices(len(d), 1)].min() > 25
    geod = pyproj.Geod(ellps="WGS84")
    i, j = np.triu_indices(len(kept_lon), 1)
    _, _, metres = geod.inv(kept_lon[i], kept_lat[i], kept_lon[j], kept_lat[j])
    assert metres.min() > 25_000 * (1 - 0.006)
    # greedy in table order, same as an obvious O(n^2) loop, and the same twice
    assert records.table.index.size == len(naive_greedy(haversine_km(lon, lat), 25))
    keep = thin_greedy(lon, lat, pyproj.CRS("EPSG:4326"), 25)
    assert np.flatnonzero(keep).tolist() == naive_greedy(haversine_km(lon, lat), 25)
    assert np.array_equal(keep, thin_greedy(lon, lat, pyproj.CRS("EPSG:4326"), 25))
    assert records.dropped["thinned"] == 150 - keep.sum()


def test_thinning_projected_is_euclidean():
    # Source: scipy.spatial.distance.pdist (Euclidean) as the reference.
    from scipy.spatial.distance import pdist, squareform

    rng = np.random.default_rng(8)
    x, y = rng.uniform(0, 100_000, 120), rng.uniform(0, 100_000, 120)
    keep = thin_greedy(x, y, pyproj.CRS("EPSG:32605"), 10)
    assert np.flatnonzero(keep).tolist() == naive_greedy(squareform(pdist(np.column_stack([x, y]))) / 1000, 10)
    assert pdist(np.column_stack([x[keep], y[keep]])).min() > 10_000


def test_values_at_matches_numpy_and_reads_only_needed_chunks():
    # Source: NumPy fancy indexing as the reference; dask block calls counted (xarray docs:
    # vectorised indexing of dask arrays goes through vindex).
    raw = np.random.default_rng(0).normal(size=(2, 40, 40)).astype("float32")
    calls = []

    def count(block, block_info=None):
        calls.append(block_info[0]["chunk-location"])
        return block

    lazy = dsa.from_array(raw, chunks=(2, 10, 10)).map_blocks(count, dtype="float32")
    grid = make_stack(nx=40, ny=40).copy(data=lazy)
    rows, cols = np.array([1, 2, 5, 9]), np.array([3, 4, 9, 0])
    values = values_at(grid, rows, cols)
    assert values.dtype == np.float64 and values.shape == (4, 2)
    np.testing.assert_array_equal(values, raw[:, rows, cols].T.astype(np.float64))
    assert calls == [(0, 0, 0)]  # one of 16 chunks


def test_single_layer_grid():
    # Common practice, no source: a (y, x) layer counts as a stack of one variable.
    layer = make_stack().isel(variable=0, drop=True)
    layer[3, 3] = np.nan
    table = pd.DataFrame({"decimalLongitude": [centre(3, 3)[0], centre(4, 4)[0]],
                          "decimalLatitude": [centre(3, 3)[1], centre(4, 4)[1]]})
    records = clean_occurrences(table, layer)
    assert records.dropped["no_climate"] == 1 and records.n_kept == 1


def test_all_outside_hints_at_the_crs():
    # Common practice, no source: a sign slip puts every record off the grid.
    grid = make_stack()
    table = pd.DataFrame({"decimalLongitude": np.full(120, 149.5), "decimalLatitude": np.full(120, 44.5)})
    with pytest.raises(InputError, match=r"0 of 120 records fall inside the grid; are the coordinates in EPSG:4326\?") as info:
        clean_occurrences(table, grid)
    assert "outside_grid 120" in str(info.value) and "\n" not in str(info.value)


def test_swapped_columns_are_suggested():
    # Common practice, no source: longitude and latitude columns swapped.
    grid = make_stack(lon0=-40.0, lat0=-30.0)
    table = pd.DataFrame({"decimalLongitude": [-30.55, -30.75], "decimalLatitude": [-39.55, -39.35]})
    with pytest.raises(InputError, match="with x and y swapped 2 would"):
        clean_occurrences(table, grid)


def test_bad_arguments():
    # Common practice, no source: each bad argument gives a one-line InputError naming it.
    grid = make_stack()
    table = pd.DataFrame({"decimalLongitude": [centre(1, 1)[0]], "decimalLatitude": [centre(1, 1)[1]]})
    with pytest.raises(InputError, match="no 'year' or 'eventDate' column"):
        clean_occurrences(table, grid, record_years=(1990, 2000))
    with pytest.raises(InputError, match="first year 2000 is after last year 1990"):
        clean_occurrences(table.assign(year=1995), grid, record_years=(2000, 1990))
    with pytest.raises(InputError, match="thin_km"):
        clean_occurrences(table, grid, thin_km=-1)
    with pytest.raises(InputError, match="not understood by pyproj"):
        clean_occurrences(table, grid, crs="EPSG:not-a-code")
    with pytest.raises(InputError, match="found: lon, lat"):
        clean_occurrences(pd.DataFrame({"lon": [1.0], "lat": [2.0]}), grid)
    with pytest.raises(InputError, match="no CRS attached"):
        clean_occurrences(table, make_stack().drop_vars("spatial_ref"))
