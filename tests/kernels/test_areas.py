"""Exact cell-area kernels against published values, the WGS84 closed form and pyproj."""

import numpy as np
import pytest
from pyproj import Geod, Transformer
from shapely.geometry import Polygon

from envelope.kernels.areas import ellipsoid_band_area, polygon_area_planar

A_WGS84 = 6378137.0
F_WGS84 = 1 / 298.257223563
R_AUTHALIC = 6371007.1809  # Source: REFERENCES.md item 6 (authalic radius R2)


@pytest.mark.parametrize("lat1, lat2, dlon, ellipsoid_km2, sphere_km2", [
    # Source: REFERENCES.md item 6, check-value table (COMPUTED three independent ways)
    (0.0, 1.0, 1.0, 12308.463894, 12363.711861),
    (59.0, 60.0, 1.0, 6309.805669, 6275.297022),
    (89.0, 90.0, 1.0, 108.866682, 107.896479),
    (45.0, 45.0 + 5 / 60, 5 / 60, 60.806244, 60.670467),
])
def test_reference_table(lat1, lat2, dlon, ellipsoid_km2, sphere_km2):
    area = ellipsoid_band_area(lat1, lat2, dlon, A_WGS84, F_WGS84) / 1e6
    assert area == pytest.approx(ellipsoid_km2, abs=2e-6)
    sphere = ellipsoid_band_area(lat1, lat2, dlon, R_AUTHALIC, 0.0) / 1e6
    assert sphere == pytest.approx(sphere_km2, abs=2e-6)


def test_hemisphere_and_order_independence():
    # Source: REFERENCES.md item 6: northern hemisphere 255 032 810.862 km²
    assert ellipsoid_band_area(0, 90, 360, A_WGS84, F_WGS84) / 1e6 == pytest.approx(255032810.862, abs=1e-3)
    # Common practice, no source: an area does not depend on the order of the bounding parallels
    assert ellipsoid_band_area(60, 59, 1, A_WGS84, F_WGS84) == ellipsoid_band_area(59, 60, 1, A_WGS84, F_WGS84)


def test_global_grid_sums_to_ellipsoid_surface():
    # Source: WGS84 constants, NIMA TR8350.2 (2000); closed form S = 2πa² + π(b²/e) ln((1+e)/(1−e))
    # = 510 065 621.724 km² (REFERENCES.md item 6)
    lat = np.arange(-90.0, 90.0, 1.0)
    total = ellipsoid_band_area(lat, lat + 1.0, 1.0, A_WGS84, F_WGS84).sum() * 360 / 1e6
    assert total == pytest.approx(510065621.724, abs=1e-3)
    e2 = F_WGS84 * (2 - F_WGS84)
    e = np.sqrt(e2)
    b = A_WGS84 * np.sqrt(1 - e2)
    closed = 2 * np.pi * A_WGS84**2 + np.pi * b**2 / e * np.log((1 + e) / (1 - e))
    assert total == pytest.approx(closed / 1e6, rel=1e-12)


def _geodesic_cell(lon0, lat0, dlon, dlat, n=200):
    """Graticule cell as a geodesic polygon with densified parallel edges (meridians are geodesics)."""
    south = np.linspace(lon0, lon0 + dlon, n)
    north = south[::-1]
    lons = np.concatenate([south, north])
    lats = np.concatenate([np.full(n, lat0), np.full(n, lat0 + dlat)])
    area, _ = Geod(ellps="WGS84").polygon_area_perimeter(lons, lats)
    return abs(area)


@pytest.mark.parametrize("lat0, dlat, dlon", [(-70.0, 2.0, 3.0), (-5.0, 1.0, 1.0), (33.3, 0.5, 0.25), (80.0, 1.0, 10.0)])
def test_against_pyproj_geodesic_polygons(lat0, dlat, dlon):
    # Source: pyproj.Geod(ellps="WGS84").polygon_area_perimeter with densified parallel edges
    # (REFERENCES.md item 6: 100+ points per edge agree to ~1e-9 relative)
    expected = _geodesic_cell(10.0, lat0, dlon, dlat)
    assert ellipsoid_band_area(lat0, lat0 + dlat, dlon, A_WGS84, F_WGS84) == pytest.approx(expected, rel=1e-6)


def test_vectorised_broadcasting():
    # Common practice, no source: broadcasting returns the element-wise results
    lat1 = np.array([[0.0], [59.0]])
    out = ellipsoid_band_area(lat1, lat1 + 1.0, np.array([1.0, 2.0]), A_WGS84, F_WGS84)
    assert out.shape == (2, 2)
    assert out[1, 1] == pytest.approx(2 * ellipsoid_band_area(59, 60, 1, A_WGS84, F_WGS84), rel=1e-14)


def test_shoelace_against_shapely():
    # Source: shapely Polygon.area (GEOS) as the reference library
    rng = np.random.default_rng(3)
    angles = np.sort(rng.uniform(0, 2 * np.pi, size=(5, 12)), axis=1)
    radii = rng.uniform(1, 3, size=(5, 12))
    xs = 4e6 + radii * np.cos(angles)
    ys = -2e6 + radii * np.sin(angles)
    got = polygon_area_planar(xs, ys)
    expected = [Polygon(np.column_stack([x, y])).area for x, y in zip(xs, ys)]
    np.testing.assert_allclose(got, expected, rtol=1e-9)
    # Common practice, no source: a clockwise ring has negative signed area
    assert polygon_area_planar(xs[0, ::-1], ys[0, ::-1], signed=True) == pytest.approx(-got[0])


def test_shoelace_laea_cell_matches_reference():
    # Source: REFERENCES.md item 6: LAEA Europe (EPSG:3035) 10–11°E × 52–53°N densified ring,
    # shoelace area 7 556.735896 km² (the WGS84 closed form gives the same value)
    n = 400
    t = np.linspace(0, 1, n, endpoint=False)
    lons = np.concatenate([10 + t, np.full(n, 11.0), 11 - t, np.full(n, 10.0)])
    lats = np.concatenate([np.full(n, 52.0), 52 + t, np.full(n, 53.0), 53 - t])
    x, y = Transformer.from_crs("EPSG:4326", "EPSG:3035", always_xy=True).transform(lons, lats)
    assert polygon_area_planar(x, y) / 1e6 == pytest.approx(7556.735896, abs=1e-5)
    assert ellipsoid_band_area(52, 53, 1, A_WGS84, F_WGS84) / 1e6 == pytest.approx(7556.735896, abs=1e-5)
