"""Vector files through GDAL (pyogrio, shapely): study regions rasterised onto a grid, class polygons written out."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.grids import crs_label, grid_crs
from envelope.io.atomic import atomic_output

__all__ = ["POLYGON_DRIVERS", "REGION_SUFFIXES", "read_region", "region_mask", "write_polygons"]

#: Vector formats a region may come in (pyogrio reads any OGR format; these are the documented ones).
REGION_SUFFIXES = (".gpkg", ".geojson", ".json", ".shp")
#: Output formats of class polygons, by suffix.
POLYGON_DRIVERS = {".gpkg": "GPKG", ".geojson": "GeoJSON"}


def read_region(path):
    """The polygons of a vector file (GeoPackage, GeoJSON, shapefile...) and their CRS.

    Returns ``(geometries, crs)``: a numpy array of shapely geometries (made valid; only
    polygonal parts kept) and a :class:`pyproj.CRS`.

    Raises
    ------
    InputError
        Missing or unreadable file, no CRS, no polygon.
    """
    import pyogrio
    import pyproj
    import shapely

    path = Path(path)
    if not path.is_file():
        raise InputError(f"--region {path}: file not found; expected a GeoPackage, GeoJSON or shapefile of polygons")
    try:
        meta, _, wkb, _ = pyogrio.raw.read(path, columns=[])
    except Exception as exc:  # noqa: BLE001 - pyogrio raises DataSourceError, DataLayerError...
        raise InputError(f"--region {path}: not a readable vector file ({type(exc).__name__}: "
                         f"{str(exc).splitlines()[0] if str(exc) else ''}); expected a GeoPackage, GeoJSON "
                         "or shapefile of polygons") from None
    if not meta.get("crs"):
        raise InputError(f"--region {path}: no CRS; expected a vector file with a CRS (a shapefile needs its .prj)")
    crs = pyproj.CRS.from_user_input(meta["crs"])
    geoms = shapely.from_wkb(np.asarray([g for g in (wkb if wkb is not None else []) if g is not None], dtype=object))
    geoms = shapely.make_valid(geoms) if len(geoms) else geoms
    polygons = []
    for geom in geoms:
        parts = shapely.get_parts(geom) if isinstance(geom, shapely.GeometryCollection) else [geom]
        polygons += [p for p in parts if isinstance(p, (shapely.Polygon, shapely.MultiPolygon)) and not p.is_empty]
    if not polygons:
        raise InputError(f"--region {path}: holds no polygon ({len(geoms)} features of other types); "
                         "expected the study region as polygons")
    return np.asarray(polygons, dtype=object), crs


def region_mask(path, grid: xr.DataArray, *, name: str = "--region") -> xr.DataArray:
    """The cells of ``grid`` whose centre lies inside the region of a vector file, as a (y, x) 0/1 layer.

    The polygons are densified (so long edges follow the projection's curves), reprojected
    to the grid's CRS with pyproj, and burnt in with :func:`rasterio.features.rasterize`
    (a cell is in when its centre is).

    Raises
    ------
    InputError
        The region covers no cell centre of the grid (its bounds and the grid's are named).
    """
    import pyproj
    import shapely
    from rasterio.features import rasterize

    geoms, crs = read_region(path)
    target = grid_crs(grid)
    if not crs.equals(target):
        xmin, ymin, xmax, ymax = shapely.total_bounds(geoms)
        step = max(xmax - xmin, ymax - ymin) / 512.0
        if step > 0:
            geoms = shapely.segmentize(geoms, step)
        transformer = pyproj.Transformer.from_crs(crs, target, always_xy=True)
        geoms = shapely.transform(geoms, lambda xy: np.column_stack(transformer.transform(xy[:, 0], xy[:, 1])))
        geoms = shapely.make_valid(geoms)
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    burnt = rasterize([(g, 1) for g in geoms if g is not None and not g.is_empty], out_shape=(ny, nx),
                      transform=grid.rio.transform(), fill=0, dtype="uint8", all_touched=False)
    if not burnt.any():
        bx = shapely.total_bounds(geoms)
        left, bottom, right, top = grid.rio.bounds()
        raise InputError(f"{name} {path}: the region does not overlap the grid (region bounds {bx[0]:.6g}, "
                         f"{bx[1]:.6g}, {bx[2]:.6g}, {bx[3]:.6g}; grid bounds {left:.6g}, {bottom:.6g}, {right:.6g}, "
                         f"{top:.6g}, both in {crs_label(target)}); expected polygons covering part of the grid")
    layer = xr.DataArray(burnt.astype(np.float32), dims=("y", "x"), coords={"y": grid["y"], "x": grid["x"]},
                         name="region")
    return layer.rio.write_crs(grid.rio.crs)


def write_polygons(features: list, path, crs, *, overwrite: bool = False, layer: str | None = None) -> Path:
    """Write polygons with the fields ``class``, ``name``, ``area_km2``; the format follows the suffix.

    ``features`` are dicts with those keys and ``geometry`` (a shapely polygon or
    multipolygon, in ``crs``). ``.gpkg`` writes a GeoPackage, ``.geojson`` GeoJSON
    (RFC 7946 wants WGS84 longitudes/latitudes; a GeoJSON in the grid's CRS is written with
    the CRS named, as GDAL does). The layer is named ``layer`` (default: the file's stem).
    Written atomically.
    """
    import pyogrio
    import shapely

    path = Path(path)
    driver = POLYGON_DRIVERS.get(path.suffix.lower())
    if driver is None:
        raise InputError(f"--polygons {path}: suffix {path.suffix!r}; expected .gpkg or .geojson")
    geometry = np.asarray([shapely.to_wkb(shapely.MultiPolygon([f["geometry"]])
                                          if isinstance(f["geometry"], shapely.Polygon) else f["geometry"])
                           for f in features], dtype=object)
    fields = ["class", "name", "area_km2"]
    data = [np.asarray([int(f["class"]) for f in features], dtype=np.int32),
            np.asarray([str(f["name"]) for f in features], dtype=object),
            np.asarray([float(f["area_km2"]) for f in features], dtype=np.float64)]
    wkt = crs.to_wkt() if hasattr(crs, "to_wkt") else str(crs)
    with atomic_output(path, overwrite) as tmp:
        os.unlink(tmp)  # GDAL creates the file itself
        pyogrio.raw.write(tmp, geometry, data, fields, driver=driver, geometry_type="MultiPolygon", crs=wkt,
                          layer=layer or path.stem)
    return path
