"""Overview pyramids of float rasters built in the streaming pass, handed to GDAL's COG copy through a VRT."""

from __future__ import annotations

import math
from pathlib import Path
from xml.etree import ElementTree as ET

import numpy as np

__all__ = ["overview_factors", "overview_levels", "pyramid_vrt", "whole_groups"]


def overview_factors(height: int, width: int, block: int) -> list:
    """The decimation factors GDAL's COG driver makes with ``OVERVIEWS=AUTO``: 2, 4, 8, ...
    while the previous level is larger than one ``block`` on either side."""
    out, f = [], 1
    while math.ceil(height / f) > block or math.ceil(width / f) > block:
        f *= 2
        out.append(f)
    return out


def _aligned(chunks, factor: int) -> bool:
    """Every chunk but the last is a whole number of ``factor`` cells."""
    return all(c % factor == 0 for c in chunks[:-1])


def whole_groups(data, factor: int):
    """``data`` (bands, y, x) as a dask array whose chunk boundaries fall on whole ``factor`` x
    ``factor`` groups (as it is when they already do), for :func:`overview_levels`."""
    import dask.array as dsa

    side = factor * max(1, 1024 // factor)
    if not isinstance(data, dsa.Array):
        return dsa.from_array(np.asarray(data), chunks=(-1, side, side))
    if _aligned(data.chunks[1], factor) and _aligned(data.chunks[2], factor):
        return data
    return data.rechunk({1: side, 2: side})


def _first_sums(block):
    """(bands, h, w) float values -> (2, bands, ceil(h/2), ceil(w/2)) float64 [sums, counts] of the
    valid cells of each 2 x 2 group (NaN and ±inf are not valid)."""
    valid = np.isfinite(block)
    return _coarsen(np.where(valid, block, 0), valid)


def _next_sums(block):
    """[sums, counts] of one level -> those of the next (2 x 2 groups of the level's cells)."""
    return _coarsen(block[0], block[1])


def _coarsen(sums, counts):
    """Sums of each 2 x 2 group of ``sums`` and of ``counts`` (float64), a side of odd length
    padded with zeros; four strided additions, no reshaped copy of the block."""
    b, h, w = sums.shape
    if h % 2 or w % 2:
        pad = ((0, 0), (0, h % 2), (0, w % 2))
        sums, counts = np.pad(sums, pad), np.pad(counts, pad)
    out = np.empty((2,) + (b, (h + 1) // 2, (w + 1) // 2))
    for k, a in enumerate((sums, counts)):
        acc = out[k]
        np.add(a[:, 0::2, 0::2], a[:, 1::2, 0::2], out=acc, dtype=np.float64)
        acc += a[:, 0::2, 1::2]
        acc += a[:, 1::2, 1::2]
    return out


def _means(block, dtype):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(block[1] > 0, block[0] / block[1], np.nan).astype(dtype)


def overview_levels(data, factors, *, nearest=()):
    """Lazy overview levels of the dask array ``data`` (bands, y, x), one per factor, or None.

    Level ``f`` holds the mean of the valid cells of each ``f`` x ``f`` group of cells (the
    last groups of a side that is not a multiple of ``f`` are partial), as GDAL's AVERAGE
    resampling gives for the first level of a NaN-nodata band (deeper GDAL levels differ
    where a group holds NaN); its sums and counts are carried from level to
    level, so every level is exact, not a mean of means. The bands listed in ``nearest``
    (0-based; class codes, indices) take instead the first cell of each group (its top-left
    cell), so an overview shows codes that exist. None when a chunk boundary does not fall
    on a whole group of the largest factor (GDAL then builds the overviews).
    """
    import dask.array as dsa

    if not factors or not isinstance(data, dsa.Array):
        return None
    if not (_aligned(data.chunks[1], factors[-1]) and _aligned(data.chunks[2], factors[-1])):
        return None
    data = data.rechunk({0: -1})
    nearest = {int(b) for b in nearest}
    if not nearest:
        return _mean_levels(data, factors)
    # band by band (basic slices: views of the blocks, no copies), then joined per level
    per_band = []
    for b in range(data.shape[0]):
        band = data[b:b + 1]
        if b in nearest:
            # chunks hold whole groups, so each chunk's strided slice is its own groups' first cells
            per_band.append([band[:, ::f, ::f] for f in factors])
        else:
            per_band.append(_mean_levels(band, factors))
    return [dsa.concatenate([levels[k] for levels in per_band], axis=0) for k in range(len(factors))]


def _mean_levels(data, factors):
    levels, current = [], None
    for _ in factors:
        source = data if current is None else current
        chunks = ((2,), source.chunks[-3]) + tuple(tuple(-(-c // 2) for c in ch) for ch in source.chunks[-2:])
        meta = np.empty((0, 0, 0, 0))
        if current is None:
            current = source.map_blocks(_first_sums, new_axis=0, chunks=chunks, dtype=np.float64, meta=meta)
        else:
            current = source.map_blocks(_next_sums, chunks=chunks, dtype=np.float64, meta=meta)
        levels.append(current.map_blocks(_means, data.dtype, drop_axis=0, chunks=current.chunks[1:],
                                         dtype=data.dtype, meta=np.empty((0, 0, 0), data.dtype)))
    return levels


def pyramid_vrt(path, base, levels, *, width: int, height: int, count: int, dtype: str, crs, transform) -> Path:
    """Write a VRT of the raster ``base`` whose bands take their overviews from the files ``levels``
    (finest first), for a COG copy with ``OVERVIEWS=FORCE_USE_EXISTING``; metadata is set on it
    afterwards through rasterio (a VRT opens for update)."""
    root = ET.Element("VRTDataset", rasterXSize=str(width), rasterYSize=str(height))
    if crs is not None:
        ET.SubElement(root, "SRS").text = crs.to_wkt()
    ET.SubElement(root, "GeoTransform").text = ", ".join(repr(float(v)) for v in transform.to_gdal())
    gdal_type = {"float32": "Float32", "float64": "Float64"}[str(dtype)]
    for band in range(1, count + 1):
        b = ET.SubElement(root, "VRTRasterBand", dataType=gdal_type, band=str(band))
        ET.SubElement(b, "NoDataValue").text = "nan"
        src = ET.SubElement(b, "SimpleSource")
        ET.SubElement(src, "SourceFilename", relativeToVRT="0").text = str(base)
        ET.SubElement(src, "SourceBand").text = str(band)
        for level in levels:
            ov = ET.SubElement(b, "Overview")
            ET.SubElement(ov, "SourceFilename", relativeToVRT="0").text = str(level)
            ET.SubElement(ov, "SourceBand").text = str(band)
    Path(path).write_text(ET.tostring(root, encoding="unicode"))
    return Path(path)
