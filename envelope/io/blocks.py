"""Window-by-window raster access for dask: a reader that fetches all wanted bands of a window in one call, and a writer target."""

from __future__ import annotations

import threading

import numpy as np

__all__ = ["WindowReader", "WindowWriter", "stored_windows", "window_array"]


class WindowReader:
    """Array-like view of some bands of a GDAL raster, read one window at a time.

    ``reader[b0:b1, y0:y1, x0:x1]`` reads bands ``bands[b0:b1]`` of that window with one
    ``rasterio`` call, as float32 with the nodata value turned into NaN and scale/offset
    applied (or in the file's own dtype when ``categorical``). Each thread keeps its own
    open dataset (GDAL handles must not be shared between threads); the handles are not
    pickled, so the reader travels to dask.distributed workers and reopens there.

    Reading every wanted band of a window in one task, rather than one task per band,
    is what keeps a streamed 19-band projection close to rasterio's own read speed.
    """

    def __init__(self, path, bands, *, shape, dtype, nodata=None, scales=None, offsets=None,
                 categorical=False):
        self.path = str(path)
        self.bands = [int(b) for b in bands]           # 1-based band numbers in the file
        self.shape = (len(self.bands),) + tuple(int(s) for s in shape)
        self.dtype = np.dtype(dtype)
        self.ndim = 3
        self.nodata = nodata
        self.scales = None if scales is None else np.asarray(scales, dtype=np.float32)
        self.offsets = None if offsets is None else np.asarray(offsets, dtype=np.float32)
        self.categorical = bool(categorical)
        self._local = threading.local()

    def __getstate__(self):
        state = self.__dict__.copy()
        state.pop("_local")
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._local = threading.local()

    def _dataset(self):
        src = getattr(self._local, "src", None)
        if src is None or src.closed:
            import rasterio

            src = self._local.src = rasterio.open(self.path)
        return src

    def __getitem__(self, key):
        (b0, b1), window = _band_range_and_window(key, self.shape)
        bands = self.bands[b0:b1]
        if not bands or window.height <= 0 or window.width <= 0:
            return np.empty((len(bands), max(window.height, 0), max(window.width, 0)), dtype=self.dtype)
        block = self._dataset().read(bands, window=window, out_dtype=self.dtype)
        if self.categorical:
            return block
        if self.nodata is not None and not np.isnan(self.nodata):
            block[block == np.float32(self.nodata)] = np.nan
        if self.scales is not None:
            scale, offset = self.scales[b0:b1, None, None], self.offsets[b0:b1, None, None]
            block *= scale
            block += offset
        return block


def window_array(reader: WindowReader, chunks):
    """A dask array over ``reader`` with the given (band, y, x) chunks."""
    import os

    import dask.array as da
    from dask.base import tokenize

    # the name identifies the file's content (path, size, time stamp) and what is read, so
    # two openings of an unchanged file share dask keys and a changed file never does
    stat = os.stat(reader.path)
    name = "read-window-" + tokenize(reader.path, stat.st_size, stat.st_mtime_ns, reader.bands, str(reader.dtype),
                                     reader.nodata, reader.categorical, chunks)
    return da.from_array(reader, chunks=chunks, asarray=False, fancy=False, lock=False,
                         meta=np.empty((0, 0, 0), dtype=reader.dtype), name=name)


class WindowWriter:
    """Target for ``dask.array.store``: ``writer[b, y, x] = block`` writes that window.

    Wraps one open, writable rasterio dataset; ``store`` serialises the writes with its
    lock, so the computation of blocks stays parallel while GDAL sees one writer.
    """

    def __init__(self, dataset):
        self.dataset = dataset

    def __setitem__(self, key, value):
        (b0, b1), window = _band_range_and_window(key, (self.dataset.count, self.dataset.height,
                                                        self.dataset.width))
        self.dataset.write(np.asarray(value), indexes=list(range(b0 + 1, b1 + 1)), window=window)


def _band_range_and_window(key, shape):
    """``(band start, band stop)`` and the rasterio Window of a (band, y, x) slice key
    (missing trailing slices mean the whole axis)."""
    from rasterio.windows import Window

    key = key if isinstance(key, tuple) else (key,)
    key = key + (slice(None),) * (3 - len(key))
    (b0, b1, _), (y0, y1, _), (x0, x1, _) = (k.indices(n) for k, n in zip(key, shape))
    return (b0, b1), Window(x0, y0, x1 - x0, y1 - y0)


def stored_windows(path) -> tuple[list, int]:
    """The file blocks of a tiled or striped GDAL raster that hold data, and how many blocks it has.

    A sparse GeoTIFF (GDAL ``SPARSE_OK``) stores no bytes for a block that is nodata
    everywhere; such a block is known from the file's block index alone (size 0 in every
    band), without reading it. Without a nodata value an absent block reads as 0, which is
    data, so then every block is returned.

    Returns
    -------
    (list of rasterio Windows, total number of blocks)
    """
    import rasterio
    from rasterio.errors import RasterBlockError

    with rasterio.open(path) as src:
        windows = [w for _, w in src.block_windows(1)]
        if src.nodata is None:
            return windows, len(windows)
        bh, bw = src.block_shapes[0]

        def stored(band, row, col) -> bool:
            try:
                return src.block_size(band, row, col) > 0
            except RasterBlockError:  # GDAL: no offset recorded, i.e. a block never written
                return False

        kept = [w for w in windows if any(stored(b, int(w.row_off) // bh, int(w.col_off) // bw)
                                          for b in range(1, src.count + 1))]
    return kept, len(windows)
