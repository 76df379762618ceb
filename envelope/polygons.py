"""Class rasters as dissolved polygons: one (multi)polygon per class, with its true area, for planning GIS."""

from __future__ import annotations

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.grids import cell_area_km2

__all__ = ["class_polygons"]


def class_polygons(classes: xr.DataArray, categories: dict, *, nodata=None, skip=()) -> list[dict]:
    """One dissolved (multi)polygon per class of a class raster, in the raster's CRS.

    Cells of one class are traced into polygons with :func:`rasterio.features.shapes`
    (4-connected, cell edges exactly) and dissolved into one geometry per class with
    :func:`shapely.union_all`. ``area_km2`` is the class's true area on the ground: the sum
    of :func:`envelope.grids.cell_area_km2` over its cells (the same areas the change and
    reach summaries report), not the planar area of the polygon in the grid's units.

    Parameters
    ----------
    classes : DataArray (y, x)
        Integer class codes, CRS attached.
    categories : dict
        Code -> class name; codes not listed are skipped.
    nodata : int, optional
        Code of cells without a class (skipped).
    skip : sequence of int
        Further codes to leave out.

    Returns
    -------
    list of dict
        ``{"class", "name", "area_km2", "geometry"}``, by code; classes without cells are left out.
    """
    import shapely
    from rasterio.features import shapes

    if classes.ndim != 2:
        raise InputError(f"class polygons: expected a (y, x) class raster, got dims {tuple(classes.dims)}")
    values = np.asarray(classes.values)
    if np.issubdtype(values.dtype, np.floating):
        finite = np.isfinite(values)
        values = np.where(finite, values, -1).astype(np.int32)
    else:
        values = values.astype(np.int32)
    area = np.asarray(cell_area_km2(classes).values, dtype=np.float64)
    transform = classes.rio.transform()
    wanted = {int(k): str(v) for k, v in categories.items()
              if (nodata is None or int(k) != int(nodata)) and int(k) not in {int(s) for s in skip}}
    out = []
    for code in sorted(wanted):
        cells = values == code
        if not cells.any():
            continue
        pieces = [shapely.geometry.shape(geom) for geom, _ in
                  shapes(cells.astype(np.uint8), mask=cells, connectivity=4, transform=transform)]
        geometry = shapely.union_all(pieces)
        out.append({"class": code, "name": wanted[code], "area_km2": float(area[cells].sum()), "geometry": geometry})
    return out
