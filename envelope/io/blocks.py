"""Window-by-window raster access for dask: a reader that fetches all wanted bands of a window in one call, and a writer target."""

from __future__ import annotations

import threading

import numpy as np

__all__ = ["WindowReader", "WindowWriter", "band_reader", "stored_block_mask", "stored_windows", "window_array"]


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
    :meth:`close` must run before the dataset is closed: when one block fails, dask's
    local scheduler raises at once while other threads may still be storing theirs, and a
    write into a closed GDAL dataset crashes the process. After ``close`` (which waits for a
    write in progress) later writes are dropped; the output is being discarded anyway.
    """

    def __init__(self, dataset):
        self.dataset = dataset
        self._guard = threading.Lock()
        self._closed = False

    def __setitem__(self, key, value):
        (b0, b1), window = _band_range_and_window(key, (self.dataset.count, self.dataset.height,
                                                        self.dataset.width))
        with self._guard:
            if not self._closed:
                self.dataset.write(np.asarray(value), indexes=list(range(b0 + 1, b1 + 1)), window=window)

    def close(self) -> None:
        """Refuse further writes (waiting for one in progress); call before closing the dataset."""
        with self._guard:
            self._closed = True


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
    from rasterio.windows import Window

    mask, (bh, bw), (height, width) = stored_block_mask(path)
    rows, cols = np.nonzero(mask)
    windows = [Window(int(c) * bw, int(r) * bh, min(bw, width - int(c) * bw), min(bh, height - int(r) * bh))
               for r, c in zip(rows, cols)]
    return windows, int(mask.size)


def stored_block_mask(path):
    """Which blocks of a GDAL raster hold data: (bool array of block rows x block columns,
    (block height, block width), (raster height, raster width)).

    A block holds data when any band stores bytes for it (see :func:`stored_windows`);
    without a nodata value every block does.
    """
    import rasterio
    from rasterio.errors import RasterBlockError

    with rasterio.open(path) as src:
        bh, bw = (int(v) for v in src.block_shapes[0])
        n_rows, n_cols = -(-src.height // bh), -(-src.width // bw)
        if src.nodata is None:
            return np.ones((n_rows, n_cols), dtype=bool), (bh, bw), (src.height, src.width)
        mask = np.zeros((n_rows, n_cols), dtype=bool)
        for band in range(1, src.count + 1):
            for row in range(n_rows):
                for col in range(n_cols):
                    if mask[row, col]:
                        continue
                    try:
                        mask[row, col] = src.block_size(band, row, col) > 0
                    except RasterBlockError:  # GDAL: no offset recorded, i.e. a block never written
                        pass
    return mask, (bh, bw), (src.height, src.width)


def band_reader(path, band: int = 1) -> WindowReader:
    """A :class:`WindowReader` of one band of a GDAL raster: float32, the file's nodata as
    NaN, scale and offset applied (as :func:`envelope.io.rasters.open_layer` reads it)."""
    import rasterio

    with rasterio.open(path) as src:
        scale, offset = src.scales[band - 1], src.offsets[band - 1]
        packed = scale != 1.0 or offset != 0.0
        return WindowReader(path, [band], shape=(src.height, src.width), dtype=np.float32, nodata=src.nodata,
                            scales=[scale] if packed else None, offsets=[offset] if packed else None)
