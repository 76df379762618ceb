"""Tests of envelope.habitat: class tables, habitat on the climate grid, fragmentation by latitude."""

import math

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401  (registers .rio)
from affine import Affine
from pyproj import Geod

from envelope.errors import GridMismatchError, InputError
from envelope.habitat import fragmentation_by_latitude, fragmentation_summary
from envelope.pipelines.inputs import load_habitat
from envelope.io.tables import read_class_table


def layer(values, *, x0=-150.0, y_top=45.0, res=0.04, crs="EPSG:4326", nodata=None, dtype=None):
    """A north-up (y, x) layer with cell edges at x0 + k*res and y_top - k*res."""
    values = np.asarray(values, dtype=dtype)
    ny, nx = values.shape
    da = xr.DataArray(values, dims=("y", "x"),
                      coords={"y": y_top - res * (np.arange(ny) + 0.5), "x": x0 + res * (np.arange(nx) + 0.5)})
    # explicit transform: a one-cell layer cannot tell its resolution from its coordinates
    da = da.rio.write_crs(crs).rio.write_transform(Affine(res, 0.0, x0, 0.0, -res, y_top))
    if nodata is not None:
        da = da.rio.write_nodata(nodata)
    return da


def write_table(tmp_path, text, name="classes.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


TABLE = "code,name,habitat_quality\n1,open,1.0\n2,heath,0.6\n3,wood,0.05\n"


def graticule_area_km2(lon0, lon1, lat0, lat1, n=200):
    """Area of a cell bounded by two meridians and two parallels, by pyproj's geodesic polygon
    with the parallel edges densified (REFERENCES.md §6: 100+ points per edge agree to ~3e-9)."""
    geod = Geod(ellps="WGS84")
    lons = np.concatenate([np.linspace(lon0, lon1, n), np.linspace(lon1, lon0, n)])
    lats = np.concatenate([np.full(n, lat0), np.full(n, lat1)])
    area, _ = geod.polygon_area_perimeter(lons, lats)
    return abs(area) / 1e6


# --------------------------------------------------------------------------- class table


def test_read_class_table_demo_file():
    # Source: sample_grids/README.md, the land-cover class table (codes 1..7 and their quality).
    from envelope.study.demo import demo_dir

    table = read_class_table(demo_dir() / "landcover_classes.csv")
    assert table == {1: 1.0, 2: 0.6, 3: 0.05, 4: 0.15, 5: 0.3, 6: 0.0, 7: 0.0}


@pytest.mark.parametrize("text, match", [
    ("code,name\n1,a\n", "column 'habitat_quality' missing"),
    ("name,habitat_quality\na,1\n", "column 'code' missing"),
    ("code,habitat_quality\n1,1.2\n", r"line 2, column 'habitat_quality': 1.2 for code 1 is outside 0–1"),
    ("code,habitat_quality\n1,-0.1\n", "outside 0–1"),
    ("code,habitat_quality\n1,high\n", "expected a number"),
    ("code,habitat_quality\n1,0.5\n1,0.2\n", "code 1 appears twice"),
    ("code,habitat_quality\n1.5,0.5\n", "expected an integer class code"),
    ("code,habitat_quality\n", "no rows"),
])
def test_read_class_table_errors(tmp_path, text, match):
    # Common practice, no source: each fault names the file and the column.
    path = write_table(tmp_path, text)
    with pytest.raises(InputError, match=match) as info:
        read_class_table(path)
    assert str(path) in str(info.value)


def test_read_class_table_missing_file(tmp_path):
    # Common practice, no source.
    with pytest.raises(InputError, match="not found"):
        read_class_table(tmp_path / "nope.csv")


# --------------------------------------------------------------------------- land cover, same grid


def test_land_cover_maps_codes_to_quality(tmp_path):
    # Source: the class table itself (hand lookup); 0 is the raster's nodata -> nodata_as.
    table = write_table(tmp_path, TABLE)
    grid = layer(np.zeros((2, 3), "float32"))
    codes = layer([[1, 2, 3], [0, 3, 1]], dtype="uint8", nodata=0)
    hab = load_habitat(codes, grid, classes=table)
    assert hab.dtype == np.float32 and hab.dims == ("y", "x")
    np.testing.assert_allclose(hab.values, [[1.0, 0.6, 0.05], [0.0, 0.05, 1.0]], rtol=1e-6)
    hab_nan = load_habitat(codes, grid, classes=table, nodata_as=np.nan)
    assert np.isnan(hab_nan.values[1, 0]) and np.isfinite(hab_nan.values).sum() == 5


def test_unknown_class_code_names_code_and_table(tmp_path):
    # Common practice, no source.
    table = write_table(tmp_path, TABLE)
    grid = layer(np.zeros((2, 2), "float32"))
    codes = layer([[1, 9], [12, 2]], dtype="uint8", nodata=0)
    with pytest.raises(InputError, match=r"class code\(s\) 9, 12 .*not in the class table") as info:
        load_habitat(codes, grid, classes=table)
    assert str(table) in str(info.value)


def test_bad_class_table_quality_through_load(tmp_path):
    # Common practice, no source.
    table = write_table(tmp_path, "code,habitat_quality\n1,1.5\n")
    grid = layer(np.zeros((1, 1), "float32"))
    with pytest.raises(InputError, match="outside 0–1"):
        load_habitat(layer([[1]], dtype="uint8"), grid, classes=table)


# --------------------------------------------------------------------------- fractions, same grid


def test_fraction_same_grid_pass_through_and_nodata():
    # Common practice, no source: same grid passes through; NaN becomes nodata_as (default 0).
    values = np.array([[0.2, np.nan], [1.0, 0.0]], "float32")
    grid = layer(np.zeros((2, 2), "float32"))
    hab = load_habitat(layer(values), grid)
    np.testing.assert_array_equal(hab.values, np.array([[0.2, 0.0], [1.0, 0.0]], "float32"))
    assert hab.attrs["method"] == "same grid"
    assert load_habitat(layer(values), grid, nodata_as=0.5).values[0, 1] == 0.5


def test_fraction_outside_range_reports_count_and_range():
    # Common practice, no source.
    grid = layer(np.zeros((2, 2), "float32"))
    with pytest.raises(InputError, match=r"2 habitat value\(s\) outside 0–1 \(found -0.5 to 3\)"):
        load_habitat(layer(np.array([[0.5, 3.0], [-0.5, 1.0]], "float32")), grid)


def test_bad_nodata_as():
    # Common practice, no source.
    grid = layer(np.zeros((1, 1), "float32"))
    with pytest.raises(InputError, match="nodata_as"):
        load_habitat(layer(np.zeros((1, 1), "float32")), grid, nodata_as=2.0)


def test_climate_stack_as_grid_and_lazy():
    # Common practice, no source: a (variable, y, x) stack defines the grid; dask input stays lazy.
    from tests.conftest import make_stack

    stack = make_stack(nx=6, ny=4, lon0=-150.0, lat0=45.0, res=0.1)
    frac = layer(np.full((4, 6), 0.25, "float32"), res=0.1).chunk({"y": 2, "x": 3})
    hab = load_habitat(frac, stack)
    assert hab.chunks is not None  # still a dask array
    np.testing.assert_allclose(hab.values, 0.25)


# --------------------------------------------------------------------------- finer grids


def test_geographic_4x_finer_area_weighted_mean():
    # Source: pyproj.Geod polygon areas of the fine cells (parallels densified, REFERENCES.md §6).
    # Coarse 1° cells at 60-62°N over 4x finer 0.25° cells: fine rows differ in area by ~3%,
    # so the area-weighted mean differs from the plain mean by far more than the tolerance.
    fine_res, factor = 0.25, 4
    ny, nx = 8, 8
    rng = np.random.default_rng(1)
    values = rng.random((ny, nx)).astype("float32")
    values[:4, :4] = np.array([1.0, 0.0, 0.0, 0.0], "float32")[:, None]  # north row only
    fine = layer(values, x0=10.0, y_top=62.0, res=fine_res)
    grid = layer(np.zeros((2, 2), "float32"), x0=10.0, y_top=62.0, res=1.0)
    hab = load_habitat(fine, grid)
    expected = np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            num = den = 0.0
            for r in range(i * factor, (i + 1) * factor):
                lat1 = 62.0 - r * fine_res
                area = graticule_area_km2(0.0, fine_res, lat1 - fine_res, lat1)
                for c in range(j * factor, (j + 1) * factor):
                    num += float(values[r, c]) * area
                    den += area
            expected[i, j] = num / den
    np.testing.assert_allclose(hab.values, expected, rtol=2e-6)
    # the northern single row holds 1/4 of the cells but less than 1/4 of the area
    assert hab.values[0, 0] < 0.25 - 1e-3
    assert hab.attrs["method"].startswith("area-weighted mean of 4x4")
    np.testing.assert_allclose(hab["y"].values, grid["y"].values)


def test_projected_equal_area_grid_plain_mean():
    # Source: REFERENCES.md §6: on an equal-area CRS (EPSG:6933) equal rectangles have equal
    # ground areas, so the area-weighted mean is the plain mean of the 16 fine cells.
    rng = np.random.default_rng(2)
    values = rng.random((8, 12)).astype("float32")
    fine = layer(values, x0=1.0e6, y_top=5.0e6, res=250.0, crs="EPSG:6933")
    grid = layer(np.zeros((2, 3), "float32"), x0=1.0e6, y_top=5.0e6, res=1000.0, crs="EPSG:6933")
    hab = load_habitat(fine, grid)
    expected = values.reshape(2, 4, 3, 4).mean(axis=(1, 3))
    np.testing.assert_allclose(hab.values, expected, rtol=1e-6)


def test_finer_land_cover_maps_then_averages(tmp_path):
    # Source: hand computation from the class table: mean of quality (not quality of the commonest class).
    table = write_table(tmp_path, TABLE)
    codes = np.array([[1, 1], [2, 3]], "uint8")  # qualities 1, 1, 0.6, 0.05
    fine = layer(codes, x0=0.0, y_top=2000.0, res=1000.0, crs="EPSG:6933", nodata=0)
    grid = layer(np.zeros((1, 1), "float32"), x0=0.0, y_top=2000.0, res=2000.0, crs="EPSG:6933")
    hab = load_habitat(fine, grid, classes=table)
    assert hab.values[0, 0] == pytest.approx((1 + 1 + 0.6 + 0.05) / 4, rel=1e-6)


def test_finer_grid_dask_stays_lazy_with_odd_chunks(tmp_path):
    # Source: hand computation (table lookup, then the plain mean on an equal-area grid,
    # REFERENCES.md §6); chunks that do not fit the 4x4 blocks must not change the answer.
    rng = np.random.default_rng(4)
    codes = rng.integers(0, 4, (40, 36)).astype("uint8")
    table = write_table(tmp_path, "code,habitat_quality\n1,1\n2,0.5\n3,0.25\n")
    fine = layer(codes, x0=0.0, y_top=40_000.0, res=1000.0, crs="EPSG:6933", nodata=0).chunk({"y": 7, "x": 5})
    grid = layer(np.zeros((10, 9), "float32"), x0=0.0, y_top=40_000.0, res=4000.0, crs="EPSG:6933")
    hab = load_habitat(fine, grid, classes=table)
    assert hab.chunks is not None
    quality = np.array([0.0, 1.0, 0.5, 0.25])[codes]
    np.testing.assert_allclose(hab.values, quality.reshape(10, 4, 9, 4).mean(axis=(1, 3)), rtol=1e-6)


def test_finer_grid_nodata_counts_as_no_habitat_or_no_weight():
    # Source: hand computation: half the fine cells NaN -> mean 0.5*0.8 with nodata_as=0, 0.8 with NaN.
    values = np.array([[0.8, 0.8], [np.nan, np.nan]], "float32")
    fine = layer(values, x0=0.0, y_top=2000.0, res=1000.0, crs="EPSG:6933")
    grid = layer(np.zeros((1, 1), "float32"), x0=0.0, y_top=2000.0, res=2000.0, crs="EPSG:6933")
    assert load_habitat(fine, grid).values[0, 0] == pytest.approx(0.4, rel=1e-6)
    assert load_habitat(fine, grid, nodata_as=np.nan).values[0, 0] == pytest.approx(0.8, rel=1e-6)


def test_finer_grid_cropped_to_climate_grid():
    # Common practice, no source: a larger aligned fine grid is cut to the climate grid's window.
    values = np.arange(36, dtype="float32").reshape(6, 6) / 36
    fine = layer(values, x0=0.0, y_top=6.0, res=1.0, crs="EPSG:6933")
    grid = layer(np.zeros((1, 2), "float32"), x0=2.0, y_top=4.0, res=2.0, crs="EPSG:6933")
    hab = load_habitat(fine, grid)
    expected = values[2:4, 2:6].reshape(1, 2, 2, 2).mean(axis=(1, 3))
    np.testing.assert_allclose(hab.values, expected, rtol=1e-6)


def test_misaligned_finer_grid_is_an_error():
    # Common practice, no source: fine edges off the coarse edges need align=True.
    fine = layer(np.full((8, 8), 0.5, "float32"), x0=0.5, y_top=8000.0, res=1000.0, crs="EPSG:6933")
    grid = layer(np.zeros((2, 2), "float32"), x0=0.0, y_top=8000.0, res=4000.0, crs="EPSG:6933")
    with pytest.raises(GridMismatchError, match="align=True"):
        load_habitat(fine, grid)


# --------------------------------------------------------------------------- coarser, other CRS


def test_coarser_grid_error_without_align_success_with_align():
    # Source (success case): average resampling onto a nested finer grid gives every fine cell
    # its parent's value (each fine cell lies inside one coarse cell). From memory: GDAL's
    # "average" resampling weights source pixels by their overlap with the target pixel.
    coarse_values = np.array([[0.2, 0.9], [0.4, 0.0]], "float32")
    coarse = layer(coarse_values, res=0.08)
    grid = layer(np.zeros((4, 4), "float32"), res=0.04)
    with pytest.raises(GridMismatchError, match="align=True"):
        load_habitat(coarse, grid)
    hab = load_habitat(coarse, grid, align=True)
    np.testing.assert_allclose(hab.values, np.kron(coarse_values, np.ones((2, 2))), atol=1e-6)
    assert hab.attrs["method"].startswith("aligned")
    np.testing.assert_allclose(hab["x"].values, grid["x"].values)


def test_crs_mismatch_is_an_error():
    # Common practice, no source.
    grid = layer(np.zeros((3, 3), "float32"))
    other = layer(np.full((3, 3), 0.5, "float32"), crs="EPSG:4269")
    with pytest.raises(GridMismatchError, match="align=True"):
        load_habitat(other, grid)


# --------------------------------------------------------------------------- fragmentation by latitude


def ellipsoid_band_area_km2(lat0, lat1, dlon):
    """Closed-form WGS84 area of a cell between two parallels (REFERENCES.md §6)."""
    a, f = 6378137.0, 1 / 298.257223563
    e2 = f * (2 - f)
    e = math.sqrt(e2)
    b = a * (1 - f)

    def q(phi):
        s = math.sin(math.radians(phi))
        return s / (1 - e2 * s * s) + math.log((1 + e * s) / (1 - e * s)) / (2 * e)

    return math.radians(dlon) * b * b / 2 * (q(lat1) - q(lat0)) / 1e6


def test_fragmentation_by_latitude_hand_computed_cutting_out():
    # Source: Jaeger 2000 (Landscape Ecology 15:115-130) m_eff = Σ A_i² / A_t per reporting
    # region, cutting-out procedure; areas from the closed-form ellipsoid (REFERENCES.md §6).
    # Grid 0-2°N, 0.5° cells, 4 rows x 4 columns; bands 0-1 and 1-2°N.
    hab = np.array([
        [0.9, 0.0, 0.0, 0.0],   # 1.5-2.0
        [0.9, 0.0, 0.7, 0.7],   # 1.0-1.5
        [0.9, 0.0, 0.0, 0.3],   # 0.5-1.0   (0.3 is below the threshold)
        [0.9, 0.0, 0.6, 0.0],   # 0.0-0.5
    ], "float32")
    # The column-0 patch crosses 1°N: cut into two parts, one in each band.
    da = layer(hab, x0=0.0, y_top=2.0, res=0.5)
    table = fragmentation_by_latitude(da, threshold=0.5)
    assert list(table["lat_min"]) == [0.0, 1.0]
    assert list(table["poleward"]) == [0, 1]
    area = {lat: ellipsoid_band_area_km2(lat, lat + 0.5, 0.5) for lat in (0.0, 0.5, 1.0, 1.5)}
    south, north = table.iloc[0], table.iloc[1]
    # south band: patches {col0 rows 0-0.5 and 0.5-1} and {col2 row 0-0.5}
    patches_s = [area[0.0] + area[0.5], area[0.0]]
    land_s = 4 * (area[0.0] + area[0.5])
    assert south["n_patches"] == 2
    assert south["land_area_km2"] == pytest.approx(land_s, rel=1e-9)
    assert south["effective_mesh_size_km2"] == pytest.approx(sum(p * p for p in patches_s) / land_s, rel=1e-9)
    assert south["splitting_index"] == pytest.approx(land_s**2 / sum(p * p for p in patches_s), rel=1e-9)
    # north band: {col0 rows 1-1.5, 1.5-2} and {cols 2-3 row 1-1.5}
    patches_n = [area[1.0] + area[1.5], 2 * area[1.0]]
    land_n = 4 * (area[1.0] + area[1.5])
    assert north["n_patches"] == 2
    assert north["habitat_area_km2"] == pytest.approx(sum(patches_n), rel=1e-9)
    assert north["effective_mesh_size_km2"] == pytest.approx(sum(p * p for p in patches_n) / land_n, rel=1e-9)
    expected_amount = (0.9 + 0.7 + 0.7) * area[1.0] + 0.9 * area[1.5]
    assert north["habitat_amount_km2"] == pytest.approx(expected_amount, rel=1e-6)


def test_fragmentation_by_latitude_land_mask_and_hemispheres():
    # Source: definition of the columns (hand computation): cells outside land_mask are not
    # part of the region; poleward ranks by distance from the equator in either hemisphere.
    hab = np.ones((4, 2), "float32")
    da = layer(hab, x0=0.0, y_top=2.0, res=1.0)          # rows 1-2, 0-1, -1-0, -2--1 °
    land = layer(np.array([[1, 1], [1, 0], [1, 1], [0, 0]], "float32"), x0=0.0, y_top=2.0, res=1.0)
    table = fragmentation_by_latitude(da, land_mask=land)
    assert set(table["lat_min"]) == {1.0, 0.0, -1.0}      # the -2..-1 band has no land
    rank = dict(zip(table["lat_min"], table["poleward"]))
    hemi = dict(zip(table["lat_min"], table["hemisphere"]))
    assert rank == {0.0: 0, -1.0: 0, 1.0: 1}
    assert hemi == {0.0: "N", -1.0: "S", 1.0: "N"}
    row0 = table[table["lat_min"] == 0.0].iloc[0]
    assert row0["n_patches"] == 1 and row0["habitat_share_of_land"] == pytest.approx(1.0)


def test_fragmentation_by_latitude_bad_arguments():
    # Common practice, no source.
    da = layer(np.ones((2, 2), "float32"))
    with pytest.raises(InputError, match="threshold"):
        fragmentation_by_latitude(da, threshold=0.0)
    with pytest.raises(InputError, match="band_deg"):
        fragmentation_by_latitude(da, band_deg=-1)


def test_fragmentation_projected_grid_uses_cell_latitudes():
    # Source: pyproj (reference library): EPSG:6933 has y = 0 on the equator and the cell
    # centres at y = ±2.5 km and ±7.5 km lie at about ±0.0226° and ±0.0678° latitude; its
    # equal-area cells (REFERENCES.md §6) are 25 km² each.
    from pyproj import Transformer

    lat = Transformer.from_crs("EPSG:6933", "EPSG:4326", always_xy=True).transform(
        [0.0, 0.0], [2500.0, 7500.0])[1]
    assert 0.0 < lat[0] < 0.05 < lat[1] < 0.1
    da = layer(np.ones((4, 4), "float32"), x0=0.0, y_top=10_000.0, res=5000.0, crs="EPSG:6933")
    table = fragmentation_by_latitude(da, band_deg=0.05)
    ranks = {round(a, 6): p for a, p in zip(table["lat_min"], table["poleward"])}
    assert ranks == {-0.05: 0, 0.0: 0, -0.1: 1, 0.05: 1}
    np.testing.assert_allclose(table["land_area_km2"], 4 * 25.0, rtol=1e-6)
    np.testing.assert_allclose(table["effective_mesh_size_km2"], 100.0, rtol=1e-6)


def test_fragmentation_summary_pools_halves_by_land_area():
    # Source: Jaeger 2000: m_eff = Σ A_i² / A_t; with cutting-out the union of bands has
    # Σ_bands Σ_i A_i² / Σ_bands A_t (hand computation on the same 0–2°N grid as above,
    # cut into 0.5° bands: 4 bands, halves {0–0.5, 0.5–1} and {1–1.5, 1.5–2}).
    hab = np.array([
        [0.9, 0.0, 0.0, 0.0],   # 1.5-2.0
        [0.9, 0.0, 0.7, 0.7],   # 1.0-1.5
        [0.9, 0.0, 0.0, 0.3],   # 0.5-1.0
        [0.9, 0.0, 0.6, 0.0],   # 0.0-0.5
    ], "float32")
    table = fragmentation_by_latitude(layer(hab, x0=0.0, y_top=2.0, res=0.5), band_deg=0.5)
    out = fragmentation_summary(table, band_deg=0.5)
    a = {lat: ellipsoid_band_area_km2(lat, lat + 0.5, 0.5) for lat in (0.0, 0.5, 1.0, 1.5)}
    # equatorward half: row 0.0-0.5 has patches {col 0} and {col 2}; row 0.5-1 has {col 0}
    low = (2 * a[0.0] ** 2 + a[0.5] ** 2) / (4 * a[0.0] + 4 * a[0.5])
    # poleward half: row 1.0-1.5 has {col 0} and {cols 2-3}; row 1.5-2 has {col 0}
    high = (a[1.0] ** 2 + (2 * a[1.0]) ** 2 + a[1.5] ** 2) / (4 * a[1.0] + 4 * a[1.5])
    assert out["equatorward_half"]["effective_mesh_size_km2"] == pytest.approx(low, rel=1e-9)
    assert out["poleward_half"]["effective_mesh_size_km2"] == pytest.approx(high, rel=1e-9)
    assert out["poleward_half_more_fragmented"] is (high < low) is False
    assert out["poleward_half"]["patches_per_1000_km2"] == pytest.approx(3000 / (4 * a[1.0] + 4 * a[1.5]), rel=1e-9)
    assert [b["lat_min"] for b in out["bands"]] == [0.0, 0.5, 1.0, 1.5]
    assert "not more fragmented" in out["statement"]


def test_fragmentation_summary_odd_and_single_band():
    # Common practice, no source: the middle band of an odd number belongs to neither half;
    # one band has nothing to compare with.
    da = layer(np.ones((3, 2), "float32"), x0=0.0, y_top=3.0, res=1.0)
    out = fragmentation_summary(fragmentation_by_latitude(da))
    assert out["equatorward_half"]["lat_max"] == 1.0 and out["poleward_half"]["lat_min"] == 2.0
    one = fragmentation_summary(fragmentation_by_latitude(layer(np.ones((1, 2), "float32"), x0=0.0, y_top=1.0,
                                                                res=1.0)))
    assert one["poleward_half_more_fragmented"] is None and one["poleward_half"] is None
    assert "fewer than two latitude bands" in one["statement"]


# --------------------------------------------------------------------------- demo study


def test_demo_habitat_on_baseline_grid():
    # Source: sample_grids/README.md: habitat.tif and landcover.tif share the baseline grid;
    # the class table covers every code, so mapped land cover holds table qualities only.
    from envelope.study.demo import demo_dir
    from envelope.io.rasters import open_climate

    demo = demo_dir()
    stack = open_climate([demo / "baseline.tif"])
    hab = load_habitat(demo / "habitat.tif", stack)
    assert hab.shape == (250, 250) and float(hab.min()) >= 0 and float(hab.max()) <= 1
    assert float(hab.isnull().sum()) == 0
    lc = load_habitat(demo / "landcover.tif", stack, classes=demo / "landcover_classes.csv")
    assert set(np.unique(lc.values.astype(np.float64)).round(6)) <= {1.0, 0.6, 0.05, 0.15, 0.3, 0.0}


def test_demo_fragments_poleward():
    # Source: sample_grids/README.md: open-ground patches grow 4x fewer and smaller (6 -> 2.5 km
    # median radius) poleward. This checks the diagnostic sees what the demo was built with.
    from envelope.study.demo import demo_dir
    from envelope.io.rasters import open_layer

    demo = demo_dir()
    table = fragmentation_by_latitude(open_layer(demo / "habitat.tif"), threshold=0.5)
    assert list(table["poleward"]) == sorted(table["poleward"])
    assert table["lat_min"].iloc[0] == 36.0 and table["hemisphere"].eq("N").all()
    south, north = table.iloc[:4], table.iloc[-4:]
    def patch_density(part):  # patches per 1000 km² of land
        return 1000 * part["n_patches"].sum() / part["land_area_km2"].sum()

    def mean_patch(part):
        return part["habitat_area_km2"].sum() / part["n_patches"].sum()

    assert north["n_patches"].sum() < south["n_patches"].sum()
    assert patch_density(north) < patch_density(south)
    assert mean_patch(north) < 0.6 * mean_patch(south)
    assert north["effective_mesh_size_km2"].max() < south["effective_mesh_size_km2"].min()
