"""Describe a file: a grid (CRS, shape, variables, nodata share, true valid area) or a model file (its manifest)."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def describe_grid(path) -> dict:
    """Summarise a climate or layer file in one pass over its data.

    Parameters
    ----------
    path : path
        Multi-band or single-band GeoTIFF, or CF-NetCDF (anything
        :func:`envelope.io.rasters.open_climate` reads).

    Returns
    -------
    dict
        ``path``, ``format``, ``crs``, ``shape`` ([rows, columns]), ``resolution`` ([dx, dy]),
        ``bounds`` ([left, bottom, right, top]), ``variables`` (list of ``{name, units, min,
        max, nodata_share}``), ``nodata_share`` (share of cells where any variable is nodata)
        and ``valid_area_km2`` (true area of the cells where every variable is valid:
        ellipsoidal on geographic grids, see :func:`envelope.grids.cell_area_km2`).

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
    finite = np.isfinite(stack)
    valid = valid_mask(stack)
    area = cell_area_km2(stack)
    mins = stack.min(dim=("y", "x"), skipna=True)
    maxs = stack.max(dim=("y", "x"), skipna=True)
    missing = 1.0 - finite.mean(dim=("y", "x"))
    valid_area = area.where(valid).sum()
    mins, maxs, missing, share_any, valid_area = dask.compute(
        mins, maxs, missing, 1.0 - valid.mean(), valid_area)
    units = stack["units"].values if "units" in stack.coords else [""] * stack.sizes["variable"]
    variables = []
    for i, name in enumerate(stack["variable"].values):
        lo, hi = float(mins.values[i]), float(maxs.values[i])
        variables.append({
            "name": str(name), "units": str(units[i]),
            "min": None if np.isnan(lo) else lo, "max": None if np.isnan(hi) else hi,
            "nodata_share": float(missing.values[i]),
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
    }


def describe_model(path) -> dict:
    """What a model file holds (:func:`envelope.io.modelfile.model_summary`), after the same
    checks as loading it for a projection (checksums, members, sizes, the skops allow-list),
    so a file that ``project`` would refuse is refused here too."""
    from envelope.io.modelfile import model_summary, open_model

    return model_summary(open_model(path)[1])
