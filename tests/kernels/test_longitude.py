"""Longitude arithmetic: continuous axes across 180°, wrapping into a range, cutting lines at the antimeridian."""

import numpy as np
import pytest

from envelope.kernels.longitude import continuous_axis, label_longitude, split_at_antimeridian, wrap_longitude


@pytest.mark.parametrize("x, expected", [
    # Analytic: a grid over 180 in 0-360 keeps its columns side by side
    ([170.5, 179.5, 180.5, 189.5], [170.5, 179.5, 180.5, 189.5]),
    # the same grid split at 180 (-180..180 file order) and written west-negative
    ([170.5, 179.5, -179.5, -170.5], [170.5, 179.5, 180.5, 189.5]),
    ([-189.5, -180.5, -179.5, -170.5], [170.5, 179.5, 180.5, 189.5]),
    # a regional 0-360 grid west of Greenwich reads -10..0; one east of 180 reads -160..-158
    ([350.5, 355.5, 359.5], [-9.5, -4.5, -0.5]),
    ([200.5, 201.5], [-159.5, -158.5]),
    # a globe-circling axis runs -180..180 (the project's convention)
    ([45.0, 135.0, 225.0, 315.0], [-135.0, -45.0, 45.0, 135.0]),
])
def test_continuous_axis(x, expected):
    order, values = continuous_axis(np.array(x))
    np.testing.assert_allclose(values, expected)
    # Analytic: the values are the inputs moved by whole turns, in the returned order
    np.testing.assert_allclose(np.mod(values - np.asarray(x)[order], 360.0), 0.0, atol=1e-9)


def test_wrap_and_label():
    # Analytic: whole turns into [west, west + 360)
    np.testing.assert_allclose(wrap_longitude([-179.5, 179.5, 190.0], 169.5), [180.5, 179.5, 190.0])
    np.testing.assert_allclose(label_longitude([190.0, 180.0, -180.0, 540.0]), [-170.0, -180.0, -180.0, -180.0])


def test_split_at_antimeridian_interpolates_the_cut():
    # Analytic: from (179, 0) to (181, 2) the line meets 180 at latitude 1 (linear in longitude)
    parts = split_at_antimeridian([178.0, 179.0, 181.0, 182.0], [0.0, 0.0, 2.0, 2.0])
    assert len(parts) == 2
    np.testing.assert_allclose(parts[0][0], [178.0, 179.0, 180.0])
    np.testing.assert_allclose(parts[0][1], [0.0, 0.0, 1.0])
    np.testing.assert_allclose(parts[1][0], [-180.0, -179.0, -178.0])
    np.testing.assert_allclose(parts[1][1], [1.0, 2.0, 2.0])
    # westward across -180 (continuous longitudes below -180), and back
    back = split_at_antimeridian([-179.0, -181.0, -179.0], [0.0, 2.0, 4.0])
    assert [p[0].tolist() for p in back] == [[-179.0, -180.0], [180.0, 179.0, 180.0], [-180.0, -179.0]]
    np.testing.assert_allclose([p[1][-1] for p in back], [1.0, 3.0, 4.0])
    # a line that stays on one side is one part, unchanged
    (only,) = split_at_antimeridian([10.0, 20.0], [0.0, 1.0])
    np.testing.assert_allclose(only[0], [10.0, 20.0])
