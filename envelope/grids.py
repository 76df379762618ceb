"""Grid identity: the CRS helpers, longitude ranges, grid comparison and alignment, true cell areas, validity masks and variable matching."""

from __future__ import annotations

import logging
import math

import numpy as np
import xarray as xr
import rioxarray  # noqa: F401  (registers .rio)

from envelope.errors import GridMismatchError, InputError
from envelope.kernels.areas import ellipsoid_band_area
from envelope.kernels.longitude import continuous_axis, wrap_longitude

log = logging.getLogger(__name__)

RESAMPLING = ("nearest", "bilinear", "average")

# Projection methods that preserve area (PROJ / EPSG method names, lower case, substrings).
# Source: Snyder (1987) Map Projections — A Working Manual, USGS PP 1395, table of properties.
_EQUAL_AREA_METHODS = (
    "equal area", "equal-area", "mollweide", "sinusoidal", "equal earth", "eckert ii",
    "eckert iv", "eckert vi", "homolosine", "bonne", "hammer", "quartic authalic", "ease",
)

# Relative tolerances for calling two grids "the same": float noise in coordinates read
# from NetCDF must not count as a difference, a real shift of a fraction of a cell must.
_RES_RTOL = 1e-6
_ORIGIN_CELL_TOL = 1e-4

_warned_crs: set[str] = set()


def grid_crs(grid: xr.DataArray, name: str | None = None):
    """The grid's CRS as a :class:`pyproj.CRS`; InputError if none is attached."""
    import pyproj

    crs = grid.rio.crs
    if crs is None:
        raise InputError(f"{name or grid.name or 'grid'}: no CRS attached; expected a georeferenced grid "
                         "(e.g. da.rio.write_crs('EPSG:4326'))")
    return pyproj.CRS.from_user_input(crs.to_wkt())


def parse_crs(value, where: str = "records"):
    """A :class:`pyproj.CRS` from anything pyproj understands; InputError naming ``where`` otherwise."""
    import pyproj

    if isinstance(value, pyproj.CRS):
        return value
    try:
        return pyproj.CRS.from_user_input(value)
    except pyproj.exceptions.CRSError as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(
            f"{where}: CRS {value!r} is not understood by pyproj ({reason}); "
            "expected e.g. 'EPSG:4326' or 'EPSG:3035'"
        ) from None


def crs_label(crs) -> str:
    """Short name of a CRS: ``EPSG:4326`` when it has an EPSG code, else its name."""
    if crs is None:
        return "none"
    from pyproj import CRS

    pcrs = CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
    code = pcrs.to_epsg(min_confidence=90)
    if code is not None:
        return f"EPSG:{code}"
    auth = pcrs.to_authority(min_confidence=90)
    return f"{auth[0]}:{auth[1]}" if auth else pcrs.name


def is_geographic(da: xr.DataArray) -> bool:
    """True when the grid's CRS is geographic (x = longitude, y = latitude, degrees)."""
    crs = da.rio.crs
    return bool(crs is not None and crs.is_geographic)


def georeferenced_like(result: xr.DataArray, ref: xr.DataArray) -> xr.DataArray:
    """``result`` (on ``ref``'s cells) with ``ref``'s CRS and, for a one-row or one-column
    grid, ``ref``'s stated transform: such a grid cannot recover its cell size from
    coordinate spacing, and an output without it would be written with an identity
    geotransform."""
    if ref.rio.crs is not None:
        result = result.rio.write_crs(ref.rio.crs)
    if min(ref.sizes["y"], ref.sizes["x"]) == 1:
        from affine import Affine

        stated = ref.rio.transform()  # the stored GeoTransform; identity when there is none
        if stated != Affine.identity():
            result = result.rio.write_transform(stated)
    return result


def lon_west(grid: xr.DataArray) -> float:
    """West edge (degrees) of a geographic grid's columns, from its x coordinates and transform."""
    x = np.asarray(grid["x"].values, dtype=np.float64)
    dx = abs(float(x[1] - x[0])) if x.size > 1 else abs(_steps(grid)[0] or 0.0)
    return float(x.min() - 0.5 * dx)


def spans_globe(grid: xr.DataArray) -> bool:
    """True for a geographic grid whose columns circle the globe (width 360° within 1e-6 of a cell).

    On such a grid the x axis is periodic: the east edge meets the west edge.
    """
    if not is_geographic(grid) or grid.sizes.get("x", 0) < 2:
        return False
    x = np.asarray(grid["x"].values, dtype=np.float64)
    dx = abs(float(x[1] - x[0]))
    return bool(abs(dx * x.size - 360.0) <= 1e-6 * dx)


def crosses_antimeridian(grid: xr.DataArray) -> bool:
    """True for a geographic grid whose columns run across the 180° meridian (x beyond ±180)."""
    if not is_geographic(grid) or spans_globe(grid):
        return False
    west = lon_west(grid)
    dx = abs(float(grid["x"][1] - grid["x"][0])) if grid.sizes["x"] > 1 else 0.0
    return bool(west + dx * grid.sizes["x"] > 180.0 + 1e-9 or west < -180.0 - 1e-9)


def lon_into_grid(grid: xr.DataArray, lon):
    """Longitudes moved by whole turns into the grid's range (west edge … west edge + 360°).

    Records given in −180…180 then fall on the right columns of a grid over the 180° meridian
    (x = 170…190): −179.5 becomes 180.5. Non-geographic grids: ``lon`` unchanged.
    """
    if not is_geographic(grid):
        return np.asarray(lon, dtype=np.float64)
    return wrap_longitude(lon, lon_west(grid))


def continuous_longitudes(da: xr.DataArray) -> xr.DataArray:
    """A geographic grid's columns in one continuous west-to-east run (:func:`envelope.kernels.longitude.continuous_axis`).

    0–360 axes and axes split at 180° become continuous; a grid over the 180° meridian keeps
    longitudes beyond 180 (170…190), a globe-circling grid runs −180…180. Columns are only
    re-ordered (lazily) when they are not in order already.
    """
    order, values = continuous_axis(da["x"].values)
    if not np.array_equal(order, np.arange(order.size)):
        da = da.isel(x=order)
    return da.assign_coords(x=values)


def grid_signature(da: xr.DataArray) -> dict:
    """What identifies a grid: CRS, resolution, shape (rows, columns), transform and bounds.

    Returns
    -------
    dict
        ``crs`` (rasterio CRS or None), ``crs_label`` (str), ``resolution`` ((dx, dy),
        dy negative for north-up), ``shape`` ((rows, columns)), ``transform`` (affine 6-tuple),
        ``bounds`` ((left, bottom, right, top)).
    """
    transform = da.rio.transform(recalc=True)
    shape = (int(da.sizes["y"]), int(da.sizes["x"]))
    return {
        "crs": da.rio.crs,
        "crs_label": crs_label(da.rio.crs),
        "resolution": (float(transform.a), float(transform.e)),
        "shape": shape,
        "transform": tuple(float(v) for v in transform[:6]),
        "bounds": tuple(float(v) for v in da.rio.bounds(recalc=True)),
    }


def _same_crs(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    if a == b:
        return True
    from pyproj import CRS

    return CRS.from_user_input(a.to_wkt()).equals(CRS.from_user_input(b.to_wkt()), ignore_axis_order=True)


def _fmt_res(res) -> str:
    dx, dy = abs(res[0]), abs(res[1])
    return f"{dx:.4g}" if math.isclose(dx, dy, rel_tol=_RES_RTOL) else f"{dx:.4g} x {dy:.4g}"


def check_same_grid(ref: xr.DataArray, other: xr.DataArray, *, ref_name: str = "baseline",
                    other_name: str = "grid") -> xr.DataArray:
    """Raise :class:`GridMismatchError` naming the first difference between two grids; return ``other`` on ``ref``'s labels.

    Grids are compared by CRS, transform and shape within a tolerance, never by exact
    coordinate labels: a NetCDF and a GeoTIFF of one grid differ by float noise (~1e-14) in
    their coordinates. The returned copy of ``other`` carries ``ref``'s x/y labels, so
    xarray arithmetic between the two aligns exactly.

    Differences are looked for in the order CRS, resolution, shape, origin/transform, so
    the message names the most fundamental one, e.g.
    ``"scenario high/2070: resolution 0.04167 differs from baseline 0.008333"``.

    Parameters
    ----------
    ref, other : DataArray
        Grids with dims (..., y, x) and CRS attached.
    ref_name, other_name : str
        How the two grids are named in the message.
    """
    a, b = grid_signature(ref), grid_signature(other)
    if not _same_crs(a["crs"], b["crs"]):
        raise GridMismatchError(f"{other_name}: CRS {b['crs_label']} differs from {ref_name} {a['crs_label']}")
    ra, rb = a["resolution"], b["resolution"]
    if not all(math.isclose(u, v, rel_tol=_RES_RTOL) for u, v in zip(np.abs(ra), np.abs(rb))):
        raise GridMismatchError(f"{other_name}: resolution {_fmt_res(rb)} differs from {ref_name} {_fmt_res(ra)}")
    if a["shape"] != b["shape"]:
        raise GridMismatchError(
            f"{other_name}: shape {b['shape'][0]} x {b['shape'][1]} (rows x columns) differs from "
            f"{ref_name} {a['shape'][0]} x {a['shape'][1]}")
    ta, tb = a["transform"], b["transform"]
    tol = _ORIGIN_CELL_TOL * max(abs(ra[0]), abs(ra[1]))
    if any(abs(u - v) > tol for u, v in zip(ta, tb)):
        raise GridMismatchError(
            f"{other_name}: origin/transform (x0 {tb[2]:.10g}, y0 {tb[5]:.10g}, dy {tb[4]:.4g}) differs from "
            f"{ref_name} (x0 {ta[2]:.10g}, y0 {ta[5]:.10g}, dy {ta[4]:.4g})")
    if other.dims[-2:] == ("y", "x") and {"x", "y"} <= set(ref.coords) and {"x", "y"} <= set(other.coords):
        if not (other.indexes["x"].equals(ref.indexes["x"]) and other.indexes["y"].equals(ref.indexes["y"])):
            other = other.assign_coords(x=ref["x"].values, y=ref["y"].values)
    return other


def align_to(da: xr.DataArray, ref: xr.DataArray, *, resampling: str = "bilinear") -> xr.DataArray:
    """Resample ``da`` onto the grid of ``ref`` (CRS, transform and shape).

    Parameters
    ----------
    da : DataArray (..., y, x)
        Source grid with CRS. Float grids use NaN as nodata; integer grids their
        ``rio.nodata``.
    ref : DataArray (..., y, x)
        Target grid.
    resampling : {"nearest", "bilinear", "average"}, default="bilinear"
        ``"nearest"`` for categories (class codes), ``"bilinear"`` for continuous climate,
        ``"average"`` for aggregating finer grids.

    Returns
    -------
    DataArray
        On ``ref``'s grid, with ``ref``'s exact x/y coordinates. Computed eagerly (GDAL warp);
        re-chunked like ``da`` when ``da`` was dask-backed.

    References
    ----------
    GDAL warp (``gdalwarp``) resampling methods, via rioxarray ``reproject_match``.
    """
    from rasterio.enums import Resampling

    if resampling not in RESAMPLING:
        raise InputError(f"resampling: {resampling!r} is not known (expected one of {', '.join(RESAMPLING)})")
    grid_crs(da), grid_crs(ref)
    src = da
    if np.issubdtype(src.dtype, np.floating):
        src = src.rio.write_nodata(np.nan, encoded=False)
    chunked = src.chunks is not None
    out = src.rio.reproject_match(ref, resampling=getattr(Resampling, resampling))
    out = out.assign_coords(x=ref["x"].values, y=ref["y"].values)
    if chunked:
        out = out.chunk({"y": min(2048, out.sizes["y"]), "x": min(2048, out.sizes["x"])})
    out.name = da.name
    out.attrs = dict(da.attrs)
    return out


def is_equal_area(crs) -> bool:
    """True when a projected CRS's projection method preserves area (name-based check)."""
    from pyproj import CRS

    pcrs = CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
    op = pcrs.coordinate_operation
    method = (op.method_name if op is not None else "") or ""
    return any(key in method.lower() for key in _EQUAL_AREA_METHODS)


def _edges(centres: np.ndarray, step: float | None = None) -> np.ndarray:
    """Cell edges from cell-centre coordinates (mid-points; the ends extrapolated).

    A single row or column takes its size from ``step`` (the stored transform).
    """
    c = np.asarray(centres, dtype=np.float64)
    if c.size == 1:
        if not step:
            raise InputError("grid: a single row or column without a stored transform cannot tell its "
                             "cell size (expected 2 or more cells, or a GeoTransform)")
        return np.array([c[0] - 0.5 * step, c[0] + 0.5 * step])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def _lazy_outer(rows: np.ndarray, cols: np.ndarray, like: xr.DataArray) -> xr.DataArray:
    """rows[:, None] * cols[None, :] as a (y, x) DataArray; dask-backed when ``like`` is."""
    coords = {"y": like["y"].values, "x": like["x"].values}
    if like.chunks is not None:
        import dask.array as dsa

        ychunks = like.chunksizes["y"]
        xchunks = like.chunksizes["x"]
        data = dsa.from_array(rows, chunks=(ychunks,))[:, None] * dsa.from_array(cols, chunks=(xchunks,))[None, :]
    else:
        data = rows[:, None] * cols[None, :]
    return xr.DataArray(data, dims=("y", "x"), coords=coords, name="cell_area")


def _steps(da: xr.DataArray):
    """(dx, dy) of the stored transform, or (None, None)."""
    try:
        res = da.rio.resolution()
    except Exception:  # noqa: BLE001 - rioxarray raises several types without a transform
        return None, None
    return float(res[0]), float(res[1])


def _geographic_areas(da: xr.DataArray, pcrs) -> xr.DataArray:
    ell = pcrs.ellipsoid
    a = ell.semi_major_metre
    inv_f = ell.inverse_flattening
    f = 0.0 if not inv_f else 1.0 / inv_f
    step_x, step_y = _steps(da) if min(da.sizes["x"], da.sizes["y"]) == 1 else (None, None)
    lat_edges = np.clip(_edges(da["y"].values, step_y), -90.0, 90.0)
    lon_edges = _edges(da["x"].values, step_x)
    # a band of 1 degree of longitude per row, scaled by each column's width: the area
    # of a graticule cell is linear in its longitude extent.
    per_row = ellipsoid_band_area(lat_edges[:-1], lat_edges[1:], 1.0, a, f) / 1e6
    per_col = np.abs(np.diff(lon_edges))
    return _lazy_outer(per_row, per_col, da)


def _projected_areas(da: xr.DataArray, pcrs) -> xr.DataArray:
    step_x, step_y = _steps(da) if min(da.sizes["x"], da.sizes["y"]) == 1 else (None, None)
    x_edges = _edges(da["x"].values, step_x)
    y_edges = _edges(da["y"].values, step_y)
    unit = pcrs.axis_info[0].unit_conversion_factor if pcrs.axis_info else 1.0
    dx = np.abs(np.diff(x_edges)) * unit
    dy = np.abs(np.diff(y_edges)) * unit
    if is_equal_area(pcrs):
        return _lazy_outer(dy / 1e3, dx / 1e3, da)
    key = pcrs.to_wkt()
    if key not in _warned_crs:
        _warned_crs.add(key)
        log.warning("CRS %s is not equal-area; cell areas come from the projection's areal scale "
                    "at cell centres", crs_label(pcrs))
    if da.chunks is not None:
        import dask.array as dsa

        ychunks, xchunks = da.chunksizes["y"], da.chunksizes["x"]
        ys = dsa.from_array(da["y"].values.astype(np.float64), chunks=(ychunks,))
        xs = dsa.from_array(da["x"].values.astype(np.float64), chunks=(xchunks,))
        wkt = pcrs.to_wkt()
        scale = dsa.blockwise(_areal_scale_block, "yx", ys, "y", xs, "x", wkt=wkt, dtype=np.float64)
        data = (dsa.from_array(dy, chunks=(ychunks,))[:, None] * dsa.from_array(dx, chunks=(xchunks,))[None, :]
                / scale / 1e6)
    else:
        scale = _areal_scale_block(da["y"].values, da["x"].values, wkt=pcrs.to_wkt())
        data = dy[:, None] * dx[None, :] / scale / 1e6
    return xr.DataArray(data, dims=("y", "x"), coords={"y": da["y"].values, "x": da["x"].values},
                        name="cell_area")


def _areal_scale_block(ys: np.ndarray, xs: np.ndarray, *, wkt: str) -> np.ndarray:
    """Areal scale of the projection with respect to the CRS's own ellipsoid, shape (y, x).

    ``Proj.get_factors`` gives the projection's partial derivatives (in units of the
    semi-major axis per radian); the areal scale is ``|det J| / (M N cos phi)`` with the
    meridian (M) and prime-vertical (N) radii of curvature of the CRS's datum ellipsoid.
    For projections defined on that ellipsoid this equals ``Factors.areal_scale``; for
    spherical-formula projections on an ellipsoidal datum (Web Mercator, EPSG:3857) it
    measures area on the datum ellipsoid rather than on the projection's sphere.

    References
    ----------
    Snyder (1987) Map Projections — A Working Manual, USGS PP 1395, eqs. 4-9 to 4-13 and 4-18
    (h, k and the areal scale factor); PROJ ``proj_factors``.
    """
    from pyproj import CRS, Proj, Transformer

    crs = CRS.from_wkt(wkt)
    xx, yy = np.meshgrid(np.asarray(xs, dtype=np.float64), np.asarray(ys, dtype=np.float64))
    to_geo = Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    lon, lat = to_geo.transform(xx, yy)
    factors = Proj(crs).get_factors(lon, lat)
    inv_f = crs.ellipsoid.inverse_flattening
    e2 = 0.0 if not inv_f else (1.0 / inv_f) * (2.0 - 1.0 / inv_f)
    phi = np.deg2rad(lat)
    w = 1.0 - e2 * np.sin(phi) ** 2
    radius_m = (1.0 - e2) / w ** 1.5   # M / a
    radius_n = 1.0 / np.sqrt(w)        # N / a
    det = np.abs(np.asarray(factors.dx_dlam) * np.asarray(factors.dy_dphi)
                 - np.asarray(factors.dx_dphi) * np.asarray(factors.dy_dlam))
    return det / (radius_m * radius_n * np.cos(phi))


def cell_area_km2(da: xr.DataArray) -> xr.DataArray:
    """True area of every cell on the ground, in km², as a (y, x) DataArray.

    Geographic grids: the exact area of each graticule cell on the CRS's ellipsoid (WGS84
    when the CRS names it) from the authalic q formula; it depends only on the row, so it
    is computed per row and broadcast lazily. Projected equal-area grids (Lambert azimuthal,
    Albers, cylindrical equal area/EASE, Mollweide, sinusoidal, Equal Earth, ...): the pixel
    area. Other projected grids: ``dx * dy / areal_scale`` with the projection's areal scale
    at each cell centre (a first-order approximation that is exact as cells shrink); a
    warning is logged once per CRS.

    Parameters
    ----------
    da : DataArray (..., y, x)
        Grid with CRS attached; only its coordinates are used.

    Returns
    -------
    DataArray (y, x), float64
        Dask-backed when ``da`` is.

    References
    ----------
    Snyder, J.P. (1987) Map Projections — A Working Manual. USGS PP 1395 (authalic latitude
    and areal scale factors). NIMA TR8350.2 (2000), WGS84 constants.
    """
    pcrs = grid_crs(da)
    if pcrs.is_geographic:
        return _geographic_areas(da, pcrs)
    return _projected_areas(da, pcrs)


def valid_mask(stack: xr.DataArray) -> xr.DataArray:
    """Cells where every variable is finite, as a lazy boolean (y, x) DataArray."""
    finite = xr.apply_ufunc(np.isfinite, stack, dask="parallelized", output_dtypes=[bool])
    if "variable" in finite.dims:
        finite = finite.all("variable")
    finite.name = "valid"
    return finite


def match_variables(stack: xr.DataArray, variables, *, source="climate grid") -> xr.DataArray:
    """Select the model's variables from ``stack`` by name, in the model's order.

    A missing variable is an error that names both sides (the variables needed, the names
    the grid has) and the fix: name each layer as the model does.
    """
    have = [str(v) for v in stack["variable"].values]
    missing = [v for v in variables if v not in have]
    if missing:
        example = f"--climate {missing[0]}=FILE.tif (or FILE.tif:BAND)"
        raise InputError(
            f"{source}: variable {missing[0]!r} needed by the model is missing "
            f"(needed: {', '.join(map(str, variables))}; grid has {', '.join(have)}); "
            f"name each layer as the model does: {example}, a layer table --layers LAYERS.csv "
            "(name,path,band), or [climate.layers] in a study file"
        )
    if have == list(variables):
        return stack  # already in the model's order: selecting would copy every block
    return stack.sel(variable=list(variables))


def check_grid_dims(grid: xr.DataArray, name: str = "grid") -> xr.DataArray:
    """The grid with dims in the conventional order; InputError for any other dims."""
    if grid.ndim == 3 and set(grid.dims) == {"variable", "y", "x"}:
        return grid.transpose("variable", "y", "x")
    if grid.ndim == 2 and set(grid.dims) == {"y", "x"}:
        return grid.transpose("y", "x")
    raise InputError(f"{name}: dims {tuple(grid.dims)}; expected ('variable', 'y', 'x') or ('y', 'x')")


def valid_cells(grid: xr.DataArray) -> np.ndarray:
    """2-D boolean array (y, x): True where every variable is finite.

    Computed chunk by chunk on dask-backed stacks; only the 2-D result is held in memory.
    """
    grid = check_grid_dims(grid)
    finite = np.isfinite(grid)
    if "variable" in finite.dims:
        finite = finite.all("variable")
    return np.asarray(finite.values, dtype=bool)


def check_same_shape(layer, grid: xr.DataArray, name: str) -> np.ndarray:
    """A 2-D layer on the grid as a float64 array (y, x); GridMismatchError if shape or transform differ."""
    grid = check_grid_dims(grid)
    shape = (grid.sizes["y"], grid.sizes["x"])
    if isinstance(layer, xr.DataArray):
        if layer.ndim == 3 and "band" in layer.dims and layer.sizes["band"] == 1:
            layer = layer.squeeze("band", drop=True)
        if set(layer.dims) != {"y", "x"}:
            raise InputError(f"{name}: dims {tuple(layer.dims)}; expected ('y', 'x')")
        layer = layer.transpose("y", "x")
        if tuple(layer.shape) != shape:
            raise GridMismatchError(f"{name}: shape {tuple(layer.shape)} differs from the grid's {shape}")
        if {"x", "y"} <= set(layer.coords):
            if not np.allclose(tuple(layer.rio.transform())[:6], tuple(grid.rio.transform())[:6],
                               rtol=0, atol=1e-9 * max(1.0, abs(grid.rio.resolution()[0]))):
                raise GridMismatchError(f"{name}: transform {tuple(layer.rio.transform())[:6]} differs from "
                                        f"the grid's {tuple(grid.rio.transform())[:6]}")
        return np.asarray(layer.values, dtype=np.float64)
    array = np.asarray(layer, dtype=np.float64)
    if array.shape != shape:
        raise GridMismatchError(f"{name}: shape {array.shape} differs from the grid's {shape}")
    return array
