"""Background sampling: distinct valid cells, seeds, bias weighting, mask, buffer, exclusions, laziness."""

import logging

import dask.array as dsa
import numpy as np
import pandas as pd
import pyproj
import pytest
from scipy.stats import binomtest
from sklearn.metrics.pairwise import haversine_distances

from tests.conftest import make_stack
from envelope.background import sample_background
from envelope.errors import GridMismatchError, InputError
from envelope.records import EARTH_RADIUS_M, values_at


def stack_with_holes():
    grid = make_stack(nx=30, ny=20)
    grid[0, :5, :] = np.nan      # a missing band in one variable
    grid[1, :, 25:] = np.nan     # and a missing strip in the other
    return grid


def test_distinct_valid_cells_with_centres_and_values():
    # Common practice, no source: background cells are distinct cells where every variable is known.
    grid = stack_with_holes()
    cells = sample_background(grid, 200, seed=3, with_values=True)
    assert len(cells) == 200
    assert not cells.duplicated(["row", "col"]).any()
    assert (cells["row"] >= 5).all() and (cells["col"] < 25).all()
    np.testing.assert_array_equal(cells["x"], grid["x"].values[cells["col"]])
    np.testing.assert_array_equal(cells["y"], grid["y"].values[cells["row"]])
    # Source: NumPy fancy indexing as the reference for the values
    raw = grid.values
    np.testing.assert_array_equal(cells[["t", "p"]].to_numpy(), raw[:, cells["row"], cells["col"]].T)


def test_seeded_reproducible():
    # Common practice, no source: numpy default_rng with the same seed gives the same draw.
    grid = stack_with_holes()
    a = sample_background(grid, 100, seed=11)
    pd.testing.assert_frame_equal(a, sample_background(grid, 100, seed=11))
    assert not a.equals(sample_background(grid, 100, seed=12))


def test_uniform_draw_is_uniform_over_valid_cells():
    # Source: binomial test (scipy.stats.binomtest); each of 375 valid cells has inclusion probability n/375.
    grid = stack_with_holes()
    hits = np.zeros((20, 30))
    for seed in range(300):
        cells = sample_background(grid, 25, seed=seed)
        hits[cells["row"], cells["col"]] += 1
    left = hits[5:, :12].sum()  # 15 x 12 = 180 of the 375 valid cells
    assert binomtest(int(left), 300 * 25, 180 / 375).pvalue > 1e-3


def test_fewer_valid_cells_than_asked_takes_all_and_warns(caplog):
    # Common practice, no source.
    grid = stack_with_holes()
    with caplog.at_level(logging.WARNING, logger="envelope.background"):
        cells = sample_background(grid, 10_000)
    assert len(cells) == 15 * 25
    assert "fewer than the 10000 asked" in caplog.text


def test_bias_weighting_three_to_one():
    # Source: binomial test (scipy.stats.binomtest). One draw per seed: P(heavy half) = 3*50 / (3*50 + 50) = 0.75.
    grid = make_stack(nx=10, ny=10)
    bias = np.ones((10, 10))
    bias[:, :5] = 3.0
    bias[0, 9] = 0.0      # never sampled
    bias[1, 9] = np.nan   # never sampled
    heavy = 0
    draws = 1500
    for seed in range(draws):
        cells = sample_background(grid, 1, seed=seed, bias=bias)
        assert (cells["row"].iloc[0], cells["col"].iloc[0]) not in {(0, 9), (1, 9)}
        heavy += int(cells["col"].iloc[0] < 5)
    assert binomtest(heavy, draws, 150 / 198).pvalue > 1e-3


def test_bias_zero_nan_and_negative():
    # Common practice, no source.
    grid = make_stack(nx=10, ny=10)
    bias = np.zeros((10, 10))
    bias[2, 3] = 1.0
    bias[4, 4] = np.nan
    cells = sample_background(grid, 5, bias=bias)
    assert cells[["row", "col"]].values.tolist() == [[2, 3]]
    bias[7, 7] = -0.5
    with pytest.raises(InputError, match=r"bias: 1 cells are negative \(lowest -0.5\)"):
        sample_background(grid, 5, bias=bias)
    with pytest.raises(GridMismatchError, match="bias: shape"):
        sample_background(grid, 5, bias=np.ones((9, 10)))


def test_mask_restricts():
    # Common practice, no source: only nonzero mask cells may be drawn.
    grid = make_stack(nx=30, ny=20)
    mask = grid.isel(variable=0, drop=True).copy(data=np.zeros((20, 30), dtype="float32"))
    mask[10:, 10:20] = 1
    cells = sample_background(grid, 50, seed=2, mask=mask)
    assert len(cells) == 50
    assert (cells["row"] >= 10).all() and cells["col"].between(10, 19).all()


def test_buffer_around_records():
    # Source: sklearn haversine_distances on the same sphere (exact set) and pyproj.Geod WGS84 geodesics
    # (within 0.6 %: sphere vs ellipsoid, from memory at most ~0.5 %).
    grid = make_stack(nx=40, ny=40, res=0.05)
    records = pd.DataFrame({"x": grid["x"].values[[5, 30]], "y": grid["y"].values[[8, 25]]})
    cells = sample_background(grid, 100_000, buffer_km=12, records=records)
    lon, lat = np.meshgrid(grid["x"].values, grid["y"].values)
    cell_points = np.radians(np.column_stack([lat.ravel(), lon.ravel()]))
    record_points = np.radians(records[["y", "x"]].to_numpy())
    nearest_km = haversine_distances(cell_points, record_points).min(axis=1) * EARTH_RADIUS_M / 1000
    want = set(np.flatnonzero(nearest_km <= 12).tolist())
    assert set((cells["row"] * 40 + cells["col"]).tolist()) == want
    geod = pyproj.Geod(ellps="WGS84")
    for k in range(len(records)):
        _, _, metres = geod.inv(cells["x"].to_numpy(), cells["y"].to_numpy(),
                                np.full(len(cells), records["x"][k]), np.full(len(cells), records["y"][k]))
        if k == 0:
            nearest = metres
        else:
            nearest = np.minimum(nearest, metres)
    assert nearest.max() <= 12_000 * 1.006
    with pytest.raises(InputError, match="buffer_km: given without records"):
        sample_background(grid, 10, buffer_km=12)


def test_buffer_projected_is_euclidean():
    # Source: scipy.spatial.distance.cdist (Euclidean) as the reference.
    from scipy.spatial.distance import cdist

    grid = make_stack(nx=30, ny=30, lon0=200_000.0, lat0=5_000_000.0, res=1000.0, crs="EPSG:32605")
    records = np.array([[grid["x"].values[10], grid["y"].values[10]]])
    cells = sample_background(grid, 10_000, buffer_km=5.5, records=records)
    lon, lat = np.meshgrid(grid["x"].values, grid["y"].values)
    want = np.flatnonzero(cdist(np.column_stack([lon.ravel(), lat.ravel()]), records).min(axis=1) <= 5500)
    assert sorted((cells["row"] * 30 + cells["col"]).tolist()) == want.tolist()


def test_exclude_cells():
    # Common practice, no source: presence cells can be kept out of the background.
    grid = make_stack(nx=5, ny=4)
    excluded = pd.DataFrame({"row": [0, 1, 3], "col": [0, 4, 2]})
    cells = sample_background(grid, 100, exclude_cells=excluded)
    assert len(cells) == 17
    assert not set(zip(cells["row"], cells["col"])) & {(0, 0), (1, 4), (3, 2)}


def test_nothing_to_draw_and_bad_n():
    # Common practice, no source.
    grid = make_stack(nx=5, ny=4)
    with pytest.raises(InputError, match=r"no cell can be drawn \(valid 20, inside mask 0"):
        sample_background(grid, 10, mask=np.zeros((4, 5)))
    with pytest.raises(InputError, match="n: 0"):
        sample_background(grid, 0)


def test_dask_stack_read_once_chunk_by_chunk():
    # Source: dask block calls counted; the 2-D valid mask needs each block once, values only the drawn blocks.
    raw = np.random.default_rng(0).normal(size=(2, 60, 60)).astype("float32")
    raw[0, :10, :] = np.nan
    calls = []

    def count(block, block_info=None):
        calls.append(block_info[0]["chunk-location"])
        return block

    lazy = dsa.from_array(raw, chunks=(1, 20, 20)).map_blocks(count, dtype="float32")
    grid = make_stack(nx=60, ny=60).copy(data=lazy)
    cells = sample_background(grid, 500, seed=5)
    assert len(calls) == 18 and len(set(calls)) == 18   # 2 x 3 x 3 blocks, each once
    assert (cells["row"] >= 10).all()
    calls.clear()
    values = values_at(grid, cells["row"][:3], cells["col"][:3])
    np.testing.assert_array_equal(values, raw[:, cells["row"][:3], cells["col"][:3]].T)
    assert len(calls) <= 2 * 3
