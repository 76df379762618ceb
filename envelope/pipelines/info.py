"""Describe a file: a grid (CRS, shape, variables, nodata share, true valid area) or a model file (its manifest)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr


def describe_grid(path, *, quick: bool = False, progress=None) -> dict:
    """Summarise a climate or layer file in one pass over its data (bounded memory).

    A GeoTIFF of more than :data:`STREAM_CELLS` cells is read block by block, and only the
    blocks the file stores: a sparse grid of 200,000 x 200,000 cells is described from its
    block index and its few stored blocks.

    With ``quick`` a GeoTIFF is described from what the file already says about itself,
    without reading its full-resolution cells: value ranges and nodata shares from GDAL's
    statistics tags (``STATISTICS_MINIMUM``, ``STATISTICS_MAXIMUM``,
    ``STATISTICS_VALID_PERCENT``, written by ``gdalinfo -stats`` and many tools), and the
    nodata share and valid area from the finest overview of at most :data:`QUICK_CELLS`
    cells (an estimate: an overview cell stands for a block of cells). What is not in the
    file is computed from the data as usual. The ``source`` key says where each number came
    from.

    Parameters
    ----------
    path : path
        Multi-band or single-band GeoTIFF, or CF-NetCDF (anything
        :func:`envelope.io.rasters.open_climate` reads).
    quick : bool, default=False
        Answer from statistics tags and overviews where the file has them.
    progress : callable(done, total, what), optional
        Called as stored blocks are read (large GeoTIFFs).

    Returns
    -------
    dict
        ``path``, ``format``, ``crs``, ``shape`` ([rows, columns]), ``resolution`` ([dx, dy]),
        ``bounds`` ([left, bottom, right, top]), ``variables`` (list of ``{name, units, min,
        max, nodata_share}``), ``nodata_share`` (share of cells where any variable is nodata)
        and ``valid_area_km2`` (true area of the cells where every variable is valid:
        ellipsoidal on geographic grids, see :func:`envelope.grids.cell_area_km2`), and
        ``source``: ``{"ranges": ..., "area": ...}``, each ``"data"`` (every cell read),
        ``"statistics tags"`` (``"statistics tags (approximate)"`` when GDAL marked them so)
        or ``"overview W x H"`` (estimated from that overview).

    Examples
    --------
    >>> describe_grid("sample_grids/demo/baseline.tif")["crs"]   # doctest: +SKIP
    'EPSG:4326'
    """
    import dask

    from envelope.grids import cell_area_km2, grid_signature, valid_mask
    from envelope.io.rasters import open_climate, raster_format

    stack = open_climate([path])
    sig = grid_signature(stack)
    n_cells = stack.sizes["y"] * stack.sizes["x"]
    geotiff = raster_format(Path(path)) != "NetCDF"
    source = {"ranges": "data", "area": "data"}
    answered = _from_file_metadata(path, stack, progress) if quick and geotiff else None
    if answered is not None:
        mins, maxs, missing, share_any, valid_area, source = answered
    elif geotiff and n_cells > STREAM_CELLS:
        mins, maxs, missing, share_any, valid_area = _stored_block_summary(path, stack, progress)
    else:
        area = cell_area_km2(stack)
        finite = np.isfinite(stack)
        valid = valid_mask(stack)
        lazy = (stack.min(dim=("y", "x"), skipna=True), stack.max(dim=("y", "x"), skipna=True),
                1.0 - finite.mean(dim=("y", "x")), 1.0 - valid.mean(), area.where(valid).sum())
        mins, maxs, missing, share_any, valid_area = (np.asarray(v.values, dtype=np.float64)
                                                      for v in dask.compute(*lazy))
    units = stack["units"].values if "units" in stack.coords else [""] * stack.sizes["variable"]
    variables = []
    for i, name in enumerate(stack["variable"].values):
        lo, hi = float(mins[i]), float(maxs[i])
        variables.append({
            "name": str(name), "units": str(units[i]),
            "min": None if np.isnan(lo) else lo, "max": None if np.isnan(hi) else hi,
            "nodata_share": float(missing[i]),
        })
    return {
        "path": str(path),
        "format": raster_format(Path(path)),
        "crs": sig["crs_label"],
        "shape": list(sig["shape"]),
        "resolution": [abs(sig["resolution"][0]), abs(sig["resolution"][1])],
        "bounds": list(sig["bounds"]),
        "variables": variables,
        "nodata_share": float(share_any),
        "valid_area_km2": float(valid_area),
        "source": source,
    }


#: Above this many cells a GeoTIFF is summarised from the blocks the file stores (see
#: :func:`envelope.io.blocks.stored_windows`), one block at a time: a sparse continental
#: grid is then described from its block index and its few stored blocks.
STREAM_CELLS = 2**26

#: With ``quick``, the finest overview of at most this many cells stands in for the grid.
QUICK_CELLS = 2**22


def _from_file_metadata(path, stack, progress=None):
    """(mins, maxs, nodata shares, share of any, valid area, source) from statistics tags
    and an overview, or None when the file has neither (then the data are read)."""
    import rasterio

    from envelope.grids import cell_area_km2

    with rasterio.open(path) as src:
        band_tags = [src.tags(b) for b in range(1, src.count + 1)]
        factors = src.overviews(1)
        nodata = src.nodata
        width, height = src.width, src.height
    keys = ("STATISTICS_MINIMUM", "STATISTICS_MAXIMUM", "STATISTICS_VALID_PERCENT")
    tagged = all(all(k in t for k in keys) for t in band_tags)
    level = next((i for i, f in enumerate(factors) if (width // f) * (height // f) <= QUICK_CELLS), None)
    if not tagged and level is None:
        return None
    source = {}
    if level is not None:
        with rasterio.open(path, overview_level=level) as ov:
            data = ov.read(out_dtype="float32")
            transform, (ov_h, ov_w) = ov.transform, (ov.height, ov.width)
        if nodata is not None:
            data[data == np.float32(nodata)] = np.nan
        finite = np.isfinite(data)
        valid = finite.all(axis=0)
        ref = xr.DataArray(np.broadcast_to(np.float32(0), (ov_h, ov_w)), dims=("y", "x"), coords={
            "y": (transform * (np.full(ov_h, 0.5), np.arange(ov_h) + 0.5))[1],
            "x": (transform * (np.arange(ov_w) + 0.5, np.full(ov_w, 0.5)))[0]})
        ref = ref.rio.write_crs(stack.rio.crs).rio.write_transform(transform)
        valid_area = float(np.asarray(cell_area_km2(ref).values)[valid].sum())
        share_any = 1.0 - float(valid.mean())
        missing = 1.0 - finite.mean(axis=(1, 2))
        present = finite.any(axis=(1, 2))
        mins = np.where(present, np.where(finite, data, np.inf).min(axis=(1, 2)), np.nan)
        maxs = np.where(present, np.where(finite, data, -np.inf).max(axis=(1, 2)), np.nan)
        source = {"ranges": f"overview {ov_w} x {ov_h}", "area": f"overview {ov_w} x {ov_h}"}
    if tagged:
        mins = np.array([float(t["STATISTICS_MINIMUM"]) for t in band_tags])
        maxs = np.array([float(t["STATISTICS_MAXIMUM"]) for t in band_tags])
        missing = np.array([1.0 - float(t["STATISTICS_VALID_PERCENT"]) / 100.0 for t in band_tags])
        approximate = any(t.get("STATISTICS_APPROXIMATE", "").upper() == "YES" for t in band_tags)
        source["ranges"] = "statistics tags" + (" (approximate)" if approximate else "")
    if level is None:
        return _with_area(path, stack, mins, maxs, missing, source, progress)
    return mins, maxs, missing, share_any, valid_area, source


def _with_area(path, stack, mins, maxs, missing, source, progress=None):
    """Ranges from the tags, the valid area from the data (no overview to estimate it)."""
    n_cells = stack.sizes["y"] * stack.sizes["x"]
    if n_cells > STREAM_CELLS:
        *_, share_any, valid_area = _stored_block_summary(path, stack, progress)
    else:
        from envelope.grids import cell_area_km2, valid_mask

        valid = valid_mask(stack)
        share_any = 1.0 - float(valid.mean().values)
        valid_area = float(cell_area_km2(stack).where(valid).sum().values)
    return mins, maxs, missing, share_any, valid_area, {**source, "area": "data"}


def _stored_block_summary(path, stack, progress=None):
    """(mins, maxs, nodata share per variable, nodata share of any, valid area) from the
    stored blocks only, one block in memory at a time; blocks the file does not store are
    nodata (the file's nodata value) and add nothing but their cell count."""
    import logging

    from envelope.io.blocks import stored_windows

    from envelope.io.rasters import open_climate

    windows, n_blocks = stored_windows(path)
    transform = stack.rio.transform(recalc=True)
    if windows:
        # chunks of exactly one file block, so a window read is one block, not a whole chunk
        height, width = int(windows[0].height), int(windows[0].width)
        stack = open_climate([path], chunks={"y": height, "x": width})
    logging.getLogger(__name__).info("%s: %d of %d blocks hold data", path, len(windows), n_blocks)
    n_var = stack.sizes["variable"]
    mins, maxs = np.full(n_var, np.inf), np.full(n_var, -np.inf)
    finite_count, valid_count, valid_area = np.zeros(n_var), 0, 0.0
    report = progress or (lambda done, total, what: None)
    for done, w in enumerate(windows):
        if done % 16 == 0:
            report(done, len(windows), f"reading {len(windows)} stored blocks")
        ys = slice(int(w.row_off), int(w.row_off + w.height))
        xs = slice(int(w.col_off), int(w.col_off + w.width))
        block = np.asarray(stack.data[:, ys, xs])
        present = ~np.isnan(block)
        mins = np.minimum(mins, np.where(present, block, np.inf).min(axis=(1, 2)))
        maxs = np.maximum(maxs, np.where(present, block, -np.inf).max(axis=(1, 2)))
        finite = np.isfinite(block)
        finite_count += finite.sum(axis=(1, 2))
        valid = finite.all(axis=0)
        valid_count += int(valid.sum())
        if valid.any():
            valid_area += float(np.asarray(_window_areas(stack, ys, xs, transform))[valid].sum())
    total = stack.sizes["y"] * stack.sizes["x"]
    # a variable with no value at all has no range (None in the summary)
    mins[np.isposinf(mins) & np.isneginf(maxs)] = np.nan
    maxs[np.isnan(mins)] = np.nan
    return mins, maxs, 1.0 - finite_count / total, 1.0 - valid_count / total, valid_area


def _window_areas(stack, ys: slice, xs: slice, transform):
    """True cell areas (km²) of one window, from its own coordinates (nothing else is computed)."""
    import xarray as xr
    from affine import Affine

    from envelope.grids import cell_area_km2

    ref = xr.DataArray(np.empty((ys.stop - ys.start, xs.stop - xs.start), np.float32), dims=("y", "x"),
                       coords={"y": stack["y"].values[ys], "x": stack["x"].values[xs]})
    ref = ref.rio.write_crs(stack.rio.crs).rio.write_transform(transform * Affine.translation(xs.start, ys.start))
    return cell_area_km2(ref).values


def describe_model(path) -> dict:
    """What a model file holds (:func:`envelope.io.modelfile.model_summary`), after the same
    checks as loading it for a projection (checksums, members, sizes, the skops allow-list),
    so a file that ``project`` would refuse is refused here too."""
    from envelope.io.modelfile import model_summary, open_model

    return model_summary(open_model(path)[1])
