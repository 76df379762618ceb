"""The expansion front per grid column: interpolated level crossings and their median shift."""

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.front import column_front_positions, front_shift


def _positions(ny, nx, spacing=2.0):
    # north-up rows: row 0 is the most poleward, so the position falls with the row index
    return np.repeat((spacing * (ny - 1 - np.arange(ny, dtype=float)))[:, None], nx, axis=1)


def test_linear_interpolation_between_cell_centres():
    # Analytic: p falls from 0.8 to 0.2 between centres 2 km apart, so 0.5 lies midway;
    # from 0.6 to 0.1 it lies (0.6 - 0.5)/(0.6 - 0.1) = 1/5 of the way.
    pos = _positions(5, 2)                     # 8, 6, 4, 2, 0 km
    occ = np.zeros((5, 2))
    occ[3:, 0] = [0.8, 1.0]
    occ[2, 0] = 0.2
    occ[2:, 1] = [0.1, 0.6, 1.0]
    got = column_front_positions(occ, pos)
    assert got[0] == pytest.approx(2.0 + 0.5 * 2.0)
    assert got[1] == pytest.approx(2.0 + 0.2 * 2.0)


def test_binary_occupancy_front_is_the_cell_boundary_and_farthest_crossing_wins():
    # Analytic: a 0/1 column crosses 0.5 halfway between the last occupied and the first empty
    # centre; an occupied outlier beyond a gap is the farthest crossing.
    pos = _positions(8, 2, spacing=1.0)        # 7 .. 0 km
    occ = np.zeros((8, 2))
    occ[5:, 0] = 1.0                           # occupied at 0, 1, 2 km
    occ[5:, 1] = 1.0
    occ[1, 1] = 1.0                            # outlier at 6 km
    got = column_front_positions(occ, pos)
    np.testing.assert_allclose(got, [2.5, 6.5])


def test_logistic_profile_crossing_is_exact_at_the_symmetric_point():
    # Analytic: p(x) = 1 / (1 + exp((x - x0)/w)) is point-symmetric about (x0, 1/2); with x0
    # midway between two centres the two samples straddle 0.5 symmetrically and linear
    # interpolation returns x0 exactly, in either row order.
    x = np.arange(40, dtype=float) * 1.5
    x0 = 0.5 * (x[17] + x[18])
    p = 1.0 / (1.0 + np.exp((x - x0) / 3.0))
    occ, pos = np.repeat(p[:, None], 3, axis=1), np.repeat(x[:, None], 3, axis=1)
    np.testing.assert_allclose(column_front_positions(occ, pos), x0, rtol=1e-12)
    np.testing.assert_allclose(column_front_positions(occ[::-1], pos[::-1]), x0, rtol=1e-12)


def test_columns_without_a_front():
    # Definition (docs/dispersal.md): no cell at the level, occupied up to the grid edge, data
    # ending right beyond the crossing, or a non-monotone position -> no front in the column.
    pos = _positions(6, 5, spacing=1.0)
    occ = np.zeros((6, 5))
    occ[:, 1] = 1.0                            # occupied to the poleward edge
    occ[3:, 2] = 1.0                           # crossing into a no-data cell
    occ[3:, 3] = 1.0                           # a proper front
    occ[3:, 4] = 1.0
    valid = np.ones((6, 5), dtype=bool)
    valid[2, 2] = False
    pos[:, 4] = [5.0, 4.0, 4.5, 2.0, 1.0, 0.0]  # not monotone
    got = column_front_positions(occ, pos, valid=valid)
    assert np.isnan(got[[0, 1, 2, 4]]).all()
    assert got[3] == pytest.approx(2.5)
    occ_nan = occ.copy()
    occ_nan[2, 3] = np.nan                     # NaN occupancy counts as no data
    assert np.isnan(column_front_positions(occ_nan, pos)[3])


def test_front_shift_is_the_median_over_columns_with_fronts_at_both_times():
    # Analytic: per-column shifts 1, 2, 3 and 10 km (median 2.5); a column empty at the start and
    # one occupied to the edge at the end are skipped.
    ny, nx = 30, 6
    pos = _positions(ny, nx, spacing=1.0)      # row r at 29 - r km
    before = np.zeros((ny, nx))
    after = np.zeros((ny, nx))
    before[25:, :5] = 1.0                      # front at 4.5 km in columns 0-4
    after[:, 5] = 1.0
    for col, shift in enumerate([1, 2, 3, 10]):
        after[25 - shift:, col] = 1.0
    after[:, 4] = 1.0                          # column 4: front beyond the grid at the end
    res = front_shift(before, after, pos)
    assert res.shift_km == pytest.approx(2.5)
    assert res.n_columns == 4 and res.n_columns_total == nx
    np.testing.assert_allclose(res.shifts_km[:4], [1, 2, 3, 10])
    assert np.isnan(res.shifts_km[4:]).all()
    empty = front_shift(before, np.ones((ny, nx)), pos)
    assert empty.n_columns == 0 and np.isnan(empty.shift_km)


@pytest.mark.parametrize("call,match", [
    (lambda: column_front_positions(np.zeros((3, 2)), np.zeros((3, 3))), r"position_km has shape"),
    (lambda: column_front_positions(np.zeros(3), np.zeros(3)), r"occupancy must be a 2-D"),
    (lambda: column_front_positions(np.zeros((3, 2)), np.zeros((3, 2)), level=0.0), r"level must lie in"),
    (lambda: column_front_positions(np.zeros((3, 2)), np.zeros((3, 2)), valid=np.ones((2, 2))), r"valid has shape"),
])
def test_bad_input(call, match):
    # Common practice, no source.
    with pytest.raises(InputError, match=match):
        call()


@pytest.mark.parametrize("flip", ["none", "all", "some"])
def test_float32_occupancy_and_broadcast_positions_give_the_float64_result(flip):
    # Exact equality with the former code path, which converted occupancy and positions to
    # full float64 grids: float32 occupancy is compared with the level in float64 (0.7 is
    # not a float32 number: a cell of float32(0.7) lies below it), positions may be a
    # broadcast view with one value per row, and columns may run either way.
    rng = np.random.default_rng(3)
    ny, nx = 30, 12
    occ = np.sort(rng.random((ny, nx)), axis=0)[::-1].astype(np.float32)
    occ[10, 2] = np.float32(0.7)
    occ[11:, 2] = 0.0
    rows = np.arange(ny, dtype=float)[::-1].copy()[:, None]
    pos = np.broadcast_to(rows, (ny, nx))
    if flip == "all":
        occ, pos = occ[::-1], pos[::-1]
    elif flip == "some":
        pos = np.where(np.arange(nx) % 2 == 0, pos, pos[::-1])
        occ = np.where(np.arange(nx) % 2 == 0, occ, occ[::-1])
    valid = rng.random((ny, nx)) > 0.05
    for level in (0.5, 0.7):
        got = column_front_positions(occ, pos, level=level, valid=valid)
        want = column_front_positions(occ.astype(np.float64), np.array(pos), level=level, valid=valid)
        np.testing.assert_array_equal(got, want)
