"""Window reader and writer target against rasterio's own reads of the same files."""

import pickle
import threading

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from envelope.io.blocks import WindowReader, WindowWriter, window_array

RNG = np.random.default_rng(3)


def _tif(path, data, *, nodata=None, dtype="float32", scales=None, offsets=None):
    data = np.asarray(data, dtype=dtype)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0],
                       dtype=dtype, crs="EPSG:4326", transform=from_origin(-150.0, 45.0, 0.1, 0.1),
                       nodata=nodata, tiled=True, blockxsize=16, blockysize=16) as dst:
        dst.write(data)
        if scales is not None:
            dst.scales, dst.offsets = scales, offsets
    return path


def test_reader_equals_rasterio_window_reads(tmp_path):
    data = RNG.normal(size=(4, 37, 45)).astype("float32")
    path = _tif(tmp_path / "a.tif", data)
    reader = WindowReader(path, [2, 4], shape=(37, 45), dtype=np.float32)
    # Source: rasterio's read of the same bands and window
    with rasterio.open(path) as src:
        expected = src.read([2, 4], window=Window(5, 3, 30, 20))
    np.testing.assert_array_equal(reader[:, 3:23, 5:35], expected)
    np.testing.assert_array_equal(reader[1:2, 30:, 40:], data[[3], 30:, 40:])  # edge window, one band
    assert reader[:, 5:5, :].shape == (2, 0, 45)


def test_reader_nodata_scale_offset_and_categorical(tmp_path):
    raw = RNG.integers(0, 1000, size=(2, 10, 12)).astype("int16")
    raw[0, 0, 0] = -9999
    path = _tif(tmp_path / "packed.tif", raw, nodata=-9999, dtype="int16", scales=[0.1, 0.5], offsets=[-5.0, 2.0])
    reader = WindowReader(path, [1, 2], shape=(10, 12), dtype=np.float32, nodata=-9999.0,
                          scales=[0.1, 0.5], offsets=[-5.0, 2.0])
    got = reader[:, :, :]
    # Analytic: physical value = stored * scale + offset (GDAL / CF packing); nodata -> NaN
    expected = raw.astype(np.float32) * np.float32([0.1, 0.5])[:, None, None] + np.float32([-5.0, 2.0])[:, None, None]
    expected[0, 0, 0] = np.nan
    np.testing.assert_allclose(got, expected, rtol=1e-6)
    codes = WindowReader(path, [1], shape=(10, 12), dtype=np.int16, categorical=True)[:, :, :]
    assert codes.dtype == np.int16 and codes[0, 0, 0] == -9999


def test_reader_pickles_and_reopens_per_thread(tmp_path):
    # Common practice, no source: a reader sent to a dask.distributed worker must reopen the file there
    data = RNG.normal(size=(1, 20, 20)).astype("float32")
    path = _tif(tmp_path / "p.tif", data)
    reader = WindowReader(path, [1], shape=(20, 20), dtype=np.float32)
    reader[:, :2, :2]  # opens a handle in this thread
    clone = pickle.loads(pickle.dumps(reader))
    np.testing.assert_array_equal(clone[:, :, :], data)
    seen = []
    thread = threading.Thread(target=lambda: seen.append(reader[:, 4:8, 4:8]))
    thread.start()
    thread.join()
    np.testing.assert_array_equal(seen[0], data[:, 4:8, 4:8])


def test_window_array_names_follow_the_file(tmp_path):
    # Common practice, no source: equal files share dask keys; a rewritten file never does
    path = _tif(tmp_path / "n.tif", RNG.normal(size=(2, 10, 10)))
    reader = WindowReader(path, [1, 2], shape=(10, 10), dtype=np.float32)
    a, b = window_array(reader, (2, 5, 5)), window_array(reader, (2, 5, 5))
    assert a.name == b.name and a.chunks == ((2,), (5, 5), (5, 5))
    np.testing.assert_array_equal(a.compute(), reader[:, :, :])
    _tif(path, RNG.normal(size=(2, 10, 10)) + 100)
    import os

    os.utime(path, ns=(1, 1))
    assert window_array(reader, (2, 5, 5)).name != a.name


def test_writer_target_with_dask_store(tmp_path):
    import dask.array as dsa

    data = RNG.normal(size=(2, 33, 21)).astype("float32")
    with rasterio.open(tmp_path / "w.tif", "w", driver="GTiff", width=21, height=33, count=2, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(-150.0, 45.0, 0.1, 0.1)) as dst:
        dsa.store(dsa.from_array(data, chunks=(1, 10, 8)), WindowWriter(dst), lock=threading.Lock())
    with rasterio.open(tmp_path / "w.tif") as src:  # Source: rasterio reading the file back
        np.testing.assert_array_equal(src.read(), data)


@pytest.mark.parametrize("key", [(slice(0, 1),), (slice(None), slice(0, 3))])
def test_reader_accepts_short_keys(tmp_path, key):
    data = RNG.normal(size=(2, 6, 7)).astype("float32")
    reader = WindowReader(_tif(tmp_path / "k.tif", data), [1, 2], shape=(6, 7), dtype=np.float32)
    # Source: NumPy's own slicing of the same array
    np.testing.assert_array_equal(reader[key], data[key])
