"""Packed occupancy grids: bit-for-bit round trips, the plain-copy fallback, the snapshot mapping."""

import pickle

import numpy as np
import pytest

import envelope.kernels.compact as compact
from envelope.errors import InputError
from envelope.kernels.compact import PackedSnapshots, pack_grid


def _occupancy_like(shape, dtype, rng):
    """Mostly exact 0 and 1, a band of fractions, and the awkward values a grid can hold."""
    grid = (rng.random(shape) < 0.5).astype(dtype)
    grid[: shape[0] // 3] = 0.0
    band = slice(shape[0] // 3, shape[0] // 3 + 3)
    grid[band] = rng.random(grid[band].shape).astype(dtype)
    flat = grid.reshape(-1)
    flat[[1, 5, 17]] = np.nan
    flat[2] = -0.0
    flat[3] = np.inf
    flat[4] = np.array([0x7FC00001], dtype=np.uint32).view(np.float32)[0] if dtype == np.float32 else \
        np.array([0x7FF8000000000001], dtype=np.uint64).view(np.float64)[0]  # a NaN with a payload
    flat[6] = np.finfo(dtype).tiny / 2  # subnormal
    return grid


def _bits(a):
    return a.view(np.uint32 if a.dtype == np.float32 else np.uint64)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("chunk", [8, 64, 1 << 22])
def test_round_trip_is_bit_for_bit(dtype, chunk, monkeypatch):
    # Analytic: the packing is lossless, so every cell comes back with the same bits: +0.0,
    # -0.0, 1.0, the default NaN, a NaN with a payload, infinity, a subnormal and fractions.
    # Chunks of 8 and 64 cells on a 23 x 17 grid (391 cells, not a multiple of 8) make the
    # chunked bit masks join and end mid-byte.
    monkeypatch.setattr(compact, "_CHUNK_CELLS", chunk)
    grid = _occupancy_like((23, 17), dtype, np.random.default_rng(0))
    packed = pack_grid(grid)
    assert packed.dense is None
    out = packed.unpack()
    assert out.dtype == grid.dtype and out.shape == grid.shape and out.flags.c_contiguous
    np.testing.assert_array_equal(_bits(out), _bits(grid))
    assert packed.nbytes < grid.nbytes
    assert packed.unpack() is not out  # a new array per unpacking


def test_mostly_fractional_grid_is_kept_as_a_plain_copy():
    # Analytic: with every cell fractional the masks plus (index, value) pairs would exceed the
    # grid, so a copy is kept: never more memory than the former full copy, the same bits.
    grid = np.random.default_rng(1).random((40, 30)).astype(np.float32) * 0.5 + 0.25
    packed = pack_grid(grid)
    assert packed.dense is not None and packed.nbytes == grid.nbytes
    grid_before = grid.copy()
    out = packed.unpack()
    out[0, 0] = 7.0  # the unpacked array is the caller's own
    np.testing.assert_array_equal(packed.unpack(), grid_before)
    np.testing.assert_array_equal(grid, grid_before)  # packing does not change its input


def test_a_typical_occupancy_snapshot_takes_a_fraction_of_the_grid():
    # Common practice, no source: a 0/1 grid with fractions in 3 of 300 rows packs to its two
    # bit masks (2/32 of float32) plus 8 bytes per fractional cell.
    rng = np.random.default_rng(2)
    grid = (rng.random((300, 200)) < 0.8).astype(np.float32)
    grid[100:103] = rng.random((3, 200)).astype(np.float32)
    packed = pack_grid(grid)
    expected = 2 * ((grid.size + 7) // 8) + 600 * (4 + 4)
    assert packed.nbytes == expected
    assert packed.nbytes < 0.1 * grid.nbytes


def test_snapshots_mapping():
    # Common practice, no source: a read-only mapping in insertion order; each look-up
    # unpacks a new array; ``mapped`` views the same packed grids through a function.
    snaps = PackedSnapshots()
    a, b = np.zeros((3, 4)), np.eye(3, 4)
    b[0, 1] = 0.25
    snaps.add(2030.0, a)
    snaps.add(2040.0, b)
    a[0, 0] = 9.0  # the snapshot is of the values at the time
    assert list(snaps) == [2030.0, 2040.0] and len(snaps) == 2 and 2040.0 in snaps
    np.testing.assert_array_equal(snaps[2030.0], np.zeros((3, 4)))
    np.testing.assert_array_equal(snaps[2040.0], b)
    assert snaps[2040.0] is not snaps[2040.0]
    doubled = snaps.mapped(lambda v: 2 * v)
    np.testing.assert_array_equal(doubled[2040.0], 2 * b)
    assert dict(doubled.items()).keys() == {2030.0, 2040.0}
    assert snaps.nbytes == sum(pack_grid(v).nbytes for v in (np.zeros((3, 4)), b))
    with pytest.raises(KeyError):
        snaps[2050.0]
    # travels to a dask worker and back (pickle), with the values intact
    np.testing.assert_array_equal(pickle.loads(pickle.dumps(snaps))[2040.0], b)


@pytest.mark.parametrize("values", [np.zeros(5), np.zeros((2, 2), dtype=np.int32), np.zeros((2, 2, 2))])
def test_bad_input(values):
    with pytest.raises(InputError, match="values must be a 2-D float32 or float64 grid"):
        pack_grid(values)


@pytest.mark.parametrize("chunk", [7, 1 << 22])
def test_coded_grid_gives_back_the_values(chunk, monkeypatch):
    # Analytic: an arrival-year grid (a few step years and NaN) coded as uint8 codes into its
    # sorted distinct values comes back value for value; with ``nan`` the NaN cells read as it.
    monkeypatch.setattr(compact, "_CHUNK_CELLS", chunk)
    rng = np.random.default_rng(3)
    years = rng.choice(np.array([2020, 2025, 2030, 2042.5, np.nan], dtype=np.float32), size=(23, 17))
    coded = compact.code_grid(years)
    assert coded.codes.dtype == np.uint8 and coded.codes.shape == years.shape
    assert coded.table.tolist()[:4] == [2020, 2025, 2030, 2042.5] and np.isnan(coded.table[-1])
    np.testing.assert_array_equal(coded.values(), years)
    np.testing.assert_array_equal(coded.values(slice(2, 5), nan=np.inf), np.where(np.isnan(years), np.inf, years)[2:5])
    assert coded.nbytes < years.nbytes


def test_coded_grid_widens_then_gives_up():
    # Analytic: 300 distinct values need uint16 codes; more than max_levels gives None (the
    # caller keeps the grid as it is); a grid that is not 2-D float is refused.
    grid = np.arange(600, dtype=np.float64).reshape(20, 30) % 300
    coded = compact.code_grid(grid)
    assert coded.codes.dtype == np.uint16
    np.testing.assert_array_equal(coded.values(), grid)
    assert compact.code_grid(grid, max_levels=299) is None
    with pytest.raises(InputError, match="2-D float grid"):
        compact.code_grid(np.zeros((3, 3), dtype=np.int32))
