"""Range-change kernels: classes, n-vector mean position, weighted quantile, meridian arc."""

import numpy as np
import pyproj
import pytest

from envelope.errors import InputError
from envelope.kernels.change import (
    CHANGE_NODATA,
    check_threshold,
    class_sums,
    classify_change,
    meridian_arc_km,
    normal_vector_sums,
    position_from_vector,
    weighted_quantile,
)

GEOD = pyproj.Geod(ellps="WGS84")


def test_classes_truth_table_and_ge_at_threshold():
    # Common practice, no source: the 2x2 now/future table; ">=" state per REFERENCES.md advice.
    now = np.array([0.9, 0.9, 0.1, 0.1, 0.5, np.nan, 0.9])
    future = np.array([0.9, 0.1, 0.9, 0.1, 0.5, 0.9, np.nan])
    got = classify_change(now, future, 0.5)
    assert got.dtype == np.uint8
    assert got.tolist() == [2, 1, 3, 0, 2, CHANGE_NODATA, CHANGE_NODATA]


def test_gained_novel_only_with_mess_and_only_at_gains():
    # Source: Elith, Kearney & Phillips (2010): MESS < 0 marks novel climate.
    now = np.array([0.1, 0.1, 0.9, 0.1, 0.1])
    future = np.array([0.9, 0.9, 0.9, 0.1, 0.9])
    mess = np.array([-5.0, 3.0, -5.0, -5.0, np.nan])
    assert classify_change(now, future, 0.5, mess).tolist() == [4, 3, 5, 0, 3]
    assert not {4, 5} & set(classify_change(now, future, 0.5).tolist())


def test_stable_novel_only_at_stable_cells_with_negative_mess():
    # Source: Elith, Kearney & Phillips (2010): MESS < 0 marks novel climate; the issue's
    # contract: class 5 = stable with MESS < 0, codes 0-4 unchanged, unknown MESS stays plain.
    now = np.array([0.9, 0.9, 0.9, 0.9, 0.1, 0.1])
    future = np.array([0.9, 0.9, 0.9, 0.1, 0.1, 0.9])
    mess = np.array([-0.1, 0.0, np.nan, -3.0, -3.0, -3.0])
    assert classify_change(now, future, 0.5, mess).tolist() == [5, 2, 2, 1, 0, 4]


def test_threshold_checks():
    # Common practice, no source: suitability lies in [0, 1].
    assert check_threshold("0.25") == 0.25
    for bad in (1.5, -0.1, float("nan"), "high"):
        with pytest.raises(InputError, match="expected a number between 0 and 1"):
            check_threshold(bad, source="--threshold")


def test_class_sums_against_loop():
    # Common practice, no source: compared with an obvious Python loop.
    rng = np.random.default_rng(1)
    classes = rng.choice([0, 1, 2, 3, 4, 5, 255], size=200).astype(np.uint8)
    w = rng.uniform(1, 2, size=200)
    got = class_sums(classes, w)
    for k in range(6):
        assert got[0, k] == pytest.approx(sum(wi for ci, wi in zip(classes, w) if ci == k), rel=1e-12)
        assert got[1, k] == sum(1 for ci in classes if ci == k)


def test_mean_position_symmetric_cases():
    # Analytic: the n-vector mean of points symmetric about a point is that point (Gade 2010).
    lon, lat = position_from_vector(normal_vector_sums([10.0, 10.0], [20.0, 30.0], [1.0, 1.0]))
    assert lon == pytest.approx(10.0, abs=1e-12) and lat == pytest.approx(25.0, abs=1e-12)
    # across the antimeridian: a plain mean of longitudes would give 0
    lon, lat = position_from_vector(normal_vector_sums([179.5, -179.5], [-40.0, -40.0], [2.0, 2.0]))
    # analytic: the mean normal of two points 1 deg apart on a parallel lies on the great
    # circle's midpoint, slightly poleward: tan(lat) = tan(-40 deg) / cos(0.5 deg)
    assert abs(lon) == pytest.approx(180.0, abs=1e-9)
    assert lat == pytest.approx(np.degrees(np.arctan(np.tan(np.radians(-40.0)) / np.cos(np.radians(0.5)))), abs=1e-9)
    # partial sums of blocks add up to the whole
    a = normal_vector_sums([1.0, 2.0], [3.0, 4.0], [1.0, 2.0]) + normal_vector_sums([5.0], [6.0], [3.0])
    np.testing.assert_allclose(a, normal_vector_sums([1.0, 2.0, 5.0], [3.0, 4.0, 6.0], [1.0, 2.0, 3.0]))
    assert np.isnan(position_from_vector(normal_vector_sums([], [], []))).all()


def test_weighted_quantile_hand_case():
    # Source: Hyndman & Fan (1996) definition 1 (inverted ECDF), weights worked by hand.
    v = np.arange(20.0)
    assert weighted_quantile(v, np.ones(20), 0.95) == 18.0  # 19/20 of the weight reached at 18
    assert weighted_quantile(v, np.ones(20), 0.05) == 0.0   # 1/20 reached at 0
    assert weighted_quantile(v, np.ones(20), 0.951) == 19.0
    assert weighted_quantile([1.0, 2.0, 3.0], [1.0, 1.0, 2.0], 0.5) == 2.0
    assert weighted_quantile([3.0, 1.0, 2.0], [2.0, 1.0, 1.0], 0.51) == 3.0  # unsorted input
    assert np.isnan(weighted_quantile([1.0], [0.0], 0.5))
    with pytest.raises(InputError, match="quantile"):
        weighted_quantile([1.0], [1.0], 0.0)


@pytest.mark.parametrize("lat1,lat2", [(0.0, 90.0), (10.0, -35.0), (44.5, 45.5), (-60.0, -61.0)])
def test_meridian_arc_against_pyproj(lat1, lat2):
    # Source: pyproj.Geod.inv (Karney 2013) along a meridian, which is a geodesic;
    # quarter meridian of WGS84 = 10 001.965729 km (pyproj).
    expected = GEOD.inv(0.0, lat1, 0.0, lat2)[2] / 1000.0
    got = meridian_arc_km(lat1, lat2)
    assert abs(got) == pytest.approx(expected, rel=1e-11)
    assert np.sign(got) == np.sign(lat2 - lat1)
