"""Raster reading: GeoTIFF / CF-NetCDF into climate stacks and layers (writing is in envelope.io.writing)."""

from __future__ import annotations

import json
import logging
import os
from pathlib import Path

import numpy as np
import xarray as xr
import rioxarray  # noqa: F401  (registers .rio)

from envelope.errors import GridMismatchError, InputError, LayerError, LayerGridMismatchError
from envelope.io.cf_coords import axes_from_2d_latlon
from envelope.io.layers import ClimateLayer

log = logging.getLogger(__name__)

GEOTIFF_SUFFIXES = (".tif", ".tiff")
NETCDF_SUFFIXES = (".nc", ".nc4", ".cdf", ".netcdf")
_EXPECTED = "expected a GeoTIFF or CF-NetCDF grid"

_X_NAMES = ("x", "lon", "longitude", "rlon", "easting")
_Y_NAMES = ("y", "lat", "latitude", "rlat", "northing")
_TIME_NAMES = ("time", "t")


# --------------------------------------------------------------------------- helpers


def raster_format(path) -> str:
    """``"GeoTIFF"``, ``"NetCDF"`` or ``"GDAL"`` (another raster format rasterio reads), by suffix."""
    suffix = Path(path).suffix.lower()
    if suffix in NETCDF_SUFFIXES:
        return "NetCDF"
    if suffix in GEOTIFF_SUFFIXES:
        return "GeoTIFF"
    return "GDAL"


def _check_file(path) -> Path:
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found ({_EXPECTED})")
    if path.is_dir():
        raise InputError(f"{path}: is a folder ({_EXPECTED})")
    if path.stat().st_size == 0:
        raise InputError(f"{path}: file is empty ({_EXPECTED})")
    return path


def _decode(value):
    """JSON-decode a tag value when it is JSON; otherwise return it unchanged."""
    if not isinstance(value, str):
        return value
    try:
        return json.loads(value)
    except (ValueError, TypeError):
        return value


def encode_tag(value) -> str:
    return value if isinstance(value, str) else json.dumps(value, default=str)


def _decode_categories(value):
    """Categories as ``{int code: meaning}`` from a JSON tag or a ``"1=a;2=b"`` string."""
    value = _decode(value)
    if isinstance(value, str) and "=" in value:
        pairs = [item.split("=", 1) for item in value.split(";") if "=" in item]
        value = {k.strip(): v.strip() for k, v in pairs}
    if isinstance(value, dict):
        try:
            return {int(k): v for k, v in value.items()}
        except (TypeError, ValueError):
            return value
    return value


def _decode_tags(tags: dict) -> dict:
    out = {k: _decode(v) for k, v in tags.items()}
    if "categories" in out:
        out["categories"] = _decode_categories(tags["categories"])
    return out


# --------------------------------------------------------------------------- GeoTIFF reading


def _open_rasterio_dataset(path: Path):
    import rasterio
    from rasterio.errors import RasterioIOError

    try:
        return rasterio.open(path)
    except RasterioIOError:
        raise InputError(f"{path}: not a readable raster ({_EXPECTED})") from None


def _read_gdal(path: Path, *, chunks, categorical: bool, name_from_stem: bool, bands=None) -> xr.DataArray:
    """A GDAL raster as (variable, y, x): float32 NaN nodata, or native dtype if categorical.

    ``bands`` (0-based indexes) keeps only those bands; only they are ever read.
    """
    from envelope.io.blocks import WindowReader, window_array

    with _open_rasterio_dataset(path) as src:
        if src.crs is None:
            raise InputError(f"{path}: no CRS (expected a georeferenced grid with a CRS)")
        if src.transform.b != 0 or src.transform.d != 0:
            raise InputError(f"{path}: rotated or sheared geotransform (expected a north-up grid)")
        count = src.count
        descriptions = list(src.descriptions)
        units = [(src.tags(i + 1).get("units") or (src.units[i] if src.units else "") or "") for i in range(count)]
        band_tags = [src.tags(i + 1) for i in range(count)]
        tags = src.tags()
        nodata = src.nodata
        crs = src.crs
        scales, offsets = src.scales, src.offsets
        height, width, transform = src.height, src.width, src.transform
        file_dtype = np.dtype(src.dtypes[0])
        block_shape = tuple(src.block_shapes[0])
    if count == 1 and name_from_stem:
        names = [path.stem]
    else:
        names = [d if d else f"band_{i + 1}" for i, d in enumerate(descriptions)]
        if count > 1 and not all(descriptions):
            log.warning("%s: bands without descriptions named %s", path,
                        ", ".join(n for n, d in zip(names, descriptions) if not d))
    if len(set(names)) != len(names):
        raise InputError(f"{path}: band descriptions {names} repeat a name (expected one name per band)")
    keep = list(range(count)) if bands is None else [int(b) for b in bands]
    packed = not categorical and (any(s != 1.0 for s in scales) or any(o != 0.0 for o in offsets))
    reader = WindowReader(path, [b + 1 for b in keep], shape=(height, width),
                          dtype=file_dtype if categorical else np.float32,
                          nodata=None if categorical else nodata,
                          scales=[scales[b] for b in keep] if packed else None,
                          offsets=[offsets[b] for b in keep] if packed else None, categorical=categorical)
    data = window_array(reader, _window_chunks(chunks, reader, block_shape))
    # pixel centres, as GDAL and rioxarray compute them from the geotransform
    x = transform * (np.arange(width) + 0.5, np.full(width, 0.5))
    y = transform * (np.full(height, 0.5), np.arange(height) + 0.5)
    da = xr.DataArray(data, dims=("variable", "y", "x"),
                      coords={"variable": [names[b] for b in keep], "y": np.asarray(y[1], dtype=np.float64),
                              "x": np.asarray(x[0], dtype=np.float64)})
    out = _normalised(da, crs, path, resolution=(abs(transform.a), abs(transform.e)))
    out = out.assign_coords(units=("variable", [units[b] for b in keep]))
    out.attrs = {k: v for k, v in tags.items()}
    out.attrs["band_tags"] = json.dumps([band_tags[b] for b in keep])
    if categorical and nodata is not None:
        out = out.rio.write_nodata(nodata)
    return out


def _window_chunks(chunks, reader, block_shape) -> tuple:
    """(band, y, x) chunks for a window reader from ``"auto"``, a dict by dim name or a tuple.

    ``"auto"`` reads every band of a window together, in windows of whole file blocks
    sized by dask's ``array.chunk-size``. Sizes given by dim name of at least one file
    block are rounded to whole blocks (a window that cuts a compressed tile or strip
    makes GDAL decompress it once per window), and a file stored in strips is read full
    width; smaller sizes are taken as given.
    """
    from dask.array.core import normalize_chunks

    shape = reader.shape
    if chunks in (True, "auto", None):
        return normalize_chunks((-1, "auto", "auto"), shape=shape, dtype=reader.dtype,
                                previous_chunks=(shape[0],) + tuple(block_shape))
    if isinstance(chunks, dict):
        band = chunks.get("band", chunks.get("variable", -1))
        (block_y, block_x), width = block_shape, shape[2]
        y, x = chunks.get("y", "auto"), chunks.get("x", "auto")
        strips = block_x >= width and block_y < block_x
        if isinstance(x, int) and x > 0:
            if strips and x < width:
                # full rows, and as many of them as the requested window holds cells
                y = max(1, y * x // width) if isinstance(y, int) and y > 0 else y
                x = width
            elif x >= block_x:
                x = round(x / block_x) * block_x
        if isinstance(y, int) and y >= block_y:
            y = round(y / block_y) * block_y
        return normalize_chunks((band, y, x), shape=shape, dtype=reader.dtype,
                                previous_chunks=(shape[0],) + tuple(block_shape))
    return normalize_chunks(chunks, shape=shape, dtype=reader.dtype)


def _normalised(da: xr.DataArray, crs, path, resolution=None) -> xr.DataArray:
    """Clean (variable, y, x) array: north-up, continuous longitudes (-180..180 unless over 180°), CRS attached.

    ``resolution`` ((dx, dy), positive) is the cell size the file states (a GeoTIFF's
    transform, a NetCDF file's cell bounds). A grid of one row or one column cannot tell
    its cell size from coordinate spacing, so such a grid carries the stated transform
    (rioxarray's ``GeoTransform``) and every later reader of ``rio.transform()`` gets it.
    """
    x = np.asarray(da["x"].values, dtype=np.float64)
    if crs.is_geographic and x.size > 1:
        da = _continuous_columns(da)
    elif x.size > 1 and x[1] < x[0]:
        da = da.isel(x=slice(None, None, -1))
    y = np.asarray(da["y"].values)
    if y.size > 1 and y[1] > y[0]:
        da = da.isel(y=slice(None, None, -1))
    da = da.transpose("variable", "y", "x")
    clean = xr.DataArray(da.data, dims=("variable", "y", "x"),
                         coords={"variable": [str(v) for v in da["variable"].values],
                                 "y": da["y"].values.astype(np.float64), "x": da["x"].values.astype(np.float64)},
                         name="climate")
    _check_regular(clean, path)
    clean = clean.rio.write_crs(crs)
    if min(clean.sizes["y"], clean.sizes["x"]) == 1:
        clean = _with_stated_transform(clean, resolution, path)
    return clean


def _with_stated_transform(da: xr.DataArray, resolution, path) -> xr.DataArray:
    """A one-row or one-column grid with its transform from the file's stated cell size."""
    from affine import Affine

    x, y = da["x"].values, da["y"].values
    dx = resolution[0] if resolution and resolution[0] else (abs(x[1] - x[0]) if x.size > 1 else None)
    dy = resolution[1] if resolution and resolution[1] else (abs(y[0] - y[1]) if y.size > 1 else None)
    if not dx or not dy:
        raise InputError(f"{path}: a grid of {y.size} row(s) x {x.size} column(s) without a stated cell size "
                         "(expected a GeoTIFF transform, or cell bounds on the NetCDF coordinates)")
    transform = Affine(float(dx), 0.0, float(x[0]) - dx / 2.0, 0.0, -float(dy), float(y[0]) + dy / 2.0)
    return da.rio.write_transform(transform)


def _continuous_columns(da: xr.DataArray) -> xr.DataArray:
    """Longitude columns west to east in one run: 0–360 and split −180/180 axes made continuous.

    A grid over the 180° meridian keeps longitudes beyond 180 (170…190); see
    :func:`envelope.grids.continuous_longitudes`.
    """
    from envelope.grids import continuous_longitudes

    return continuous_longitudes(da)


def _check_regular(da: xr.DataArray, path) -> None:
    for dim in ("x", "y"):
        c = da[dim].values
        if c.size > 2:
            step = np.diff(c)
            if not np.allclose(step, step[0], rtol=1e-5, atol=0):
                raise InputError(f"{path}: {dim} coordinates are not evenly spaced (expected a regular grid)")


# --------------------------------------------------------------------------- NetCDF reading


def _is_x(name, var) -> bool:
    attrs = var.attrs
    return (str(name).lower() in _X_NAMES or attrs.get("axis") == "X"
            or attrs.get("standard_name") in ("longitude", "projection_x_coordinate", "grid_longitude"))


def _is_y(name, var) -> bool:
    attrs = var.attrs
    return (str(name).lower() in _Y_NAMES or attrs.get("axis") == "Y"
            or attrs.get("standard_name") in ("latitude", "projection_y_coordinate", "grid_latitude"))


def _is_time(name, var) -> bool:
    return (str(name).lower() in _TIME_NAMES or var.attrs.get("axis") == "T"
            or var.attrs.get("standard_name") == "time" or np.issubdtype(var.dtype, np.datetime64))


def _netcdf_crs(ds: xr.Dataset, var: xr.DataArray, xname, yname, path):
    from pyproj import CRS
    from rasterio.crs import CRS as RioCRS

    mapping_name = var.attrs.get("grid_mapping") or var.encoding.get("grid_mapping")
    candidates = []
    if mapping_name and mapping_name in ds.variables:
        candidates.append(ds[mapping_name].attrs)
    for name in ("spatial_ref", "crs"):
        if name in ds.variables and name != mapping_name:
            candidates.append(ds[name].attrs)
    for attrs in candidates:
        wkt = attrs.get("crs_wkt") or attrs.get("spatial_ref")
        try:
            pcrs = CRS.from_wkt(wkt) if wkt else CRS.from_cf(dict(attrs))
        except Exception:  # noqa: BLE001 - pyproj raises several types for unusable CF
            raise InputError(f"{path}: grid mapping of {var.name!r} does not describe a CRS "
                             f"(expected crs_wkt, spatial_ref or CF grid-mapping parameters)") from None
        return RioCRS.from_wkt(pcrs.to_wkt())
    xunits = str(ds[xname].attrs.get("units", "")).lower()
    if str(xname).lower() in ("lon", "longitude") or xunits.startswith("degree"):
        return RioCRS.from_epsg(4326)
    raise InputError(f"{path}: unknown CRS for projected x/y coordinates "
                     f"(expected a grid_mapping variable with crs_wkt or CF parameters)")


def _select_time(var: xr.DataArray, tdim: str, time, path) -> xr.DataArray:
    n = var.sizes[tdim]
    if time is None:
        if n == 1:
            return var.isel({tdim: 0})
        raise InputError(f"{path}: {n} time steps in {var.name!r} (expected one; pass time= an index or an ISO date)")
    if isinstance(time, (int, np.integer)):
        if not -n <= time < n:
            raise InputError(f"{path}: time index {time} out of range (expected 0..{n - 1})")
        return var.isel({tdim: int(time)})
    try:
        picked = var.sel({tdim: str(time)})
    except (KeyError, TypeError, ValueError):
        picked = None
    if picked is None or (tdim in picked.dims and picked.sizes[tdim] != 1):
        found = 0 if picked is None else picked.sizes[tdim]
        values = ", ".join(str(v)[:10] for v in var[tdim].values[:6])
        raise InputError(f"{path}: time {time!r} matches {found} time steps "
                         f"(expected exactly one; times start {values})")
    return picked.isel({tdim: 0}) if tdim in picked.dims else picked


def _read_netcdf(path: Path, *, time, chunks, categorical: bool) -> xr.DataArray:
    try:
        ds = xr.open_dataset(path, chunks=chunks, mask_and_scale=True, decode_coords=True)
    except Exception as exc:  # noqa: BLE001 - netCDF4/h5 raise OSError, ValueError...
        raise InputError(f"{path}: not a readable NetCDF file ({type(exc).__name__}; {_EXPECTED})") from None
    ds = axes_from_2d_latlon(ds, path)
    layers, names, units = [], [], []
    xname = yname = crs = None
    for name, var in ds.data_vars.items():
        xs = [d for d in var.dims if _is_x(d, ds[d] if d in ds.variables else var)]
        ys = [d for d in var.dims if _is_y(d, ds[d] if d in ds.variables else var)]
        if not xs or not ys:
            continue  # bounds, grid-mapping or scalar variables are not layers
        extra = [d for d in var.dims if d not in (xs[0], ys[0])]
        for d in extra:
            coord = ds[d] if d in ds.variables else var[d]
            if _is_time(d, coord):
                var = _select_time(var, d, time, path)
            elif var.sizes[d] == 1:
                var = var.isel({d: 0})
            else:
                raise InputError(f"{path}: variable {name!r} has extra dimension {d!r} of length "
                                 f"{var.sizes[d]} (expected 2-D (y, x) layers)")
        if xname is None:
            xname, yname = xs[0], ys[0]
            crs = _netcdf_crs(ds, ds[name], xname, yname, path)
        elif (xs[0], ys[0]) != (xname, yname):
            raise InputError(f"{path}: variable {name!r} is on dims ({ys[0]}, {xs[0]}), "
                             f"others on ({yname}, {xname}) (expected one grid per file)")
        var = var.transpose(yname, xname)
        layers.append(var.drop_vars([c for c in var.coords if c not in (xname, yname)]))
        names.append(str(name))
        units.append(str(var.attrs.get("units", "")))
    if not layers:
        raise InputError(f"{path}: no 2-D data variables (expected (y, x) or (time, y, x) variables "
                         f"with lat/lon or x/y coordinates)")
    stacked = xr.concat([lay.astype(lay.dtype if categorical else np.float32) for lay in layers],
                        dim="variable", coords="minimal", compat="override", join="exact")
    stacked = stacked.rename({xname: "x", yname: "y"}).assign_coords(variable=names)
    resolution = (_bounds_step(ds, xname), _bounds_step(ds, yname))
    out = _normalised(stacked, crs, path, resolution=resolution).assign_coords(units=("variable", units))
    out.attrs = {k: v if isinstance(v, str) else json.dumps(v, default=str)
                 for k, v in ds.attrs.items() if isinstance(v, (str, int, float))}
    return out


def _bounds_step(ds: xr.Dataset, dim: str):
    """Cell size along ``dim`` from its CF cell bounds (``bounds`` attribute), or None."""
    name = ds[dim].attrs.get("bounds") if dim in ds.variables else None
    if not name or name not in ds.variables:
        return None
    edges = np.asarray(ds[name].values, dtype=np.float64)
    if edges.ndim != 2 or edges.shape[-1] != 2 or not edges.size:
        return None
    step = float(abs(edges[0, 1] - edges[0, 0]))
    return step or None


def _read(path, *, time=None, chunks="auto", categorical=False, name_from_stem=True, bands=None) -> xr.DataArray:
    path = _check_file(path)
    if raster_format(path) == "NetCDF":
        return _read_netcdf(path, time=time, chunks=chunks, categorical=categorical)
    if time is not None:
        raise InputError(f"{path}: time= applies to NetCDF files only (a GeoTIFF has no time axis)")
    return _read_gdal(path, chunks=chunks, categorical=categorical, name_from_stem=name_from_stem, bands=bands)


# --------------------------------------------------------------------------- public readers


def open_climate(paths, *, variables=None, rename=None, time=None, chunks="auto") -> xr.DataArray:
    """Open climate grids as one stack with dims (variable, y, x).

    Parameters
    ----------
    paths : path or list of paths
        A multi-band GeoTIFF (band descriptions name the variables; ``band_1``... with a
        warning when missing), several single-band GeoTIFFs (each file's stem names its
        variable; all must share one grid), or a CF-NetCDF file (each 2-D data variable is a
        variable; lat/lon or projected x/y with a grid mapping). Any item may be a
        :class:`envelope.io.layers.ClimateLayer`: one band of a file under the name the
        user gives it, whatever the file calls it.
    variables : list of str, optional
        Keep these variables, in this order.
    rename : dict, optional
        ``{old_name: new_name}``, applied before ``variables`` is looked up.
    time : int or str, optional
        For NetCDF files with several time steps: index or ISO date to pick.
    chunks : dask chunks, default="auto"

    Returns
    -------
    DataArray (variable, y, x)
        float32, NaN nodata, north-up (y descending), longitudes -180..180 (continuous beyond
        180 for a grid over the 180° meridian), CRS attached, dask-backed; coordinate
        ``variable`` (names) and non-dim ``units`` ("" if unknown).

    Raises
    ------
    InputError
        A file cannot be read, has no CRS, holds several time steps, or a name is missing.
    GridMismatchError
        Files are on different grids (the message names the file and the first difference).

    Examples
    --------
    >>> stack = open_climate("sample_grids/demo/baseline.tif")        # doctest: +SKIP
    >>> stack = open_climate(["tmin.tif", "prec.tif"], variables=["prec"])  # doctest: +SKIP
    """
    from envelope.grids import check_same_grid

    items = [paths] if isinstance(paths, (str, os.PathLike)) else list(paths)
    if not items:
        raise InputError(f"climate: no files given ({_EXPECTED})")
    parts = []
    for path in items:
        try:
            part = _read_named(path, time=time, chunks=chunks) if isinstance(path, ClimateLayer) else \
                _read(path, time=time, chunks=chunks)
            if parts:
                check_same_grid(parts[0], part, ref_name=str(items[0]), other_name=str(path))
        except InputError as exc:
            if not isinstance(path, ClimateLayer) or isinstance(exc, LayerError):
                raise
            detail = str(exc).removeprefix(f"{path}: ").removeprefix(f"{path.path}: ")
            raise _layer_error(path, detail, grid=isinstance(exc, GridMismatchError)) from None
        parts.append(part)
    per_file = [[str(v) for v in part["variable"].values] for part in parts]
    names = [n for file_names in per_file for n in file_names]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise InputError(f"{', '.join(map(str, items))}: variable names repeat: {', '.join(dup)} "
                         f"(expected one file or band per variable)")
    rename = dict(rename or {})
    missing = [k for k in rename if k not in names]
    if missing:
        raise InputError(f"rename: no variable {', '.join(missing)} (the grids hold {', '.join(names)})")
    if variables is not None:
        renamed = [rename.get(n, n) for n in names]
        missing = [v for v in variables if v not in renamed]
        if missing:
            raise InputError(f"variables: {', '.join(missing)} not found (the grids hold {', '.join(renamed)})")
        parts = _keep_variables(items, parts, per_file, {k for k, v in zip(names, renamed) if v in variables},
                                time=time, chunks=chunks)
    for i in range(1, len(parts)):
        parts[i] = parts[i].assign_coords(x=parts[0]["x"].values, y=parts[0]["y"].values)
    stack = parts[0] if len(parts) == 1 else xr.concat(parts, dim="variable", join="override",
                                                       combine_attrs="drop_conflicts")
    if rename:
        stack = stack.assign_coords(variable=[rename.get(str(n), str(n)) for n in stack["variable"].values])
    if variables is not None and [str(v) for v in stack["variable"].values] != list(variables):
        stack = stack.sel(variable=list(variables))  # (a no-op selection would copy every block)
    stack.name = "climate"
    stack.attrs.pop("band_tags", None)
    return stack.rio.write_crs(parts[0].rio.crs)


def _layer_error(layer: ClimateLayer, detail: str, grid: bool = False) -> LayerError:
    kind = LayerGridMismatchError if grid else LayerError
    return kind(f"{layer}: {detail}", layer=layer, detail=detail)


def _read_named(layer: ClimateLayer, *, time, chunks) -> xr.DataArray:
    """One band of a file as a one-variable stack named ``layer.name``; only that band is ever read."""
    part = _read(layer.path, time=time, chunks=chunks)
    names = [str(v) for v in part["variable"].values]
    band = layer.band
    if band is None:
        if len(names) != 1:
            raise _layer_error(layer, f"holds {len(names)} layers ({', '.join(names)}); "
                                      f"name one with {layer.name}={layer.path}:BAND (a band number or name)")
        index = 0
    elif isinstance(band, int):
        if not 1 <= band <= len(names):
            raise _layer_error(layer, f"band {band} does not exist (the file has bands 1..{len(names)})")
        index = band - 1
    elif band in names:
        index = names.index(band)
    else:
        raise _layer_error(layer, f"has no band or variable {band!r} (it holds {', '.join(names)})")
    if len(names) > 1:
        part = (part.isel(variable=[index]) if raster_format(layer.path) == "NetCDF"
                else _read(layer.path, time=time, chunks=chunks, bands=[index]))
    return part.assign_coords(variable=[layer.name])


def _keep_variables(items, parts, per_file, wanted: set, *, time, chunks) -> list:
    """Drop the parts (files) and bands not in ``wanted``; a multi-band GeoTIFF is reopened
    with only the wanted bands, so the others are never read."""
    kept = []
    for path, part, file_names in zip(items, parts, per_file):
        index = [i for i, n in enumerate(file_names) if n in wanted]
        if not index:
            continue
        if len(index) < len(file_names) and raster_format(path) != "NetCDF":
            part = _read(path, time=time, chunks=chunks, bands=index)
        elif len(index) < len(file_names):
            part = part.isel(variable=index)
        kept.append(part)
    return kept


def open_layer(path, *, band=None, chunks="auto", categorical=False) -> xr.DataArray:
    """Open one layer (suitability, habitat, mask, classes...) as a (y, x) DataArray.

    Parameters
    ----------
    path : path
        GeoTIFF (or other GDAL raster) or NetCDF.
    band : int or str, optional
        1-based band number or band description (GeoTIFF), or variable name (NetCDF);
        required when the file holds several.
    chunks : dask chunks, default="auto"
    categorical : bool, default=False
        Keep the file's integer dtype (class codes) with its nodata in ``rio.nodata``
        instead of float32 with NaN.

    Returns
    -------
    DataArray (y, x)
        Named after the band; ``attrs`` holds the file's tags (as stored) and ``units``.
    """
    stack = _read(path, chunks=chunks, categorical=categorical, name_from_stem=False)
    names = [str(v) for v in stack["variable"].values]
    if band is None:
        if len(names) != 1:
            raise InputError(f"{path}: holds {len(names)} layers ({', '.join(names)}); expected one, or pass band=")
        index = 0
    elif isinstance(band, (int, np.integer)) and not isinstance(band, bool):
        if not 1 <= band <= len(names):
            raise InputError(f"{path}: band {band} does not exist (expected 1..{len(names)})")
        index = int(band) - 1
    elif str(band) in names:
        index = names.index(str(band))
    else:
        raise InputError(f"{path}: no band or variable {band!r} (the file holds {', '.join(names)})")
    layer = stack.isel(variable=index)
    units = str(layer["units"].values)
    attrs = dict(stack.attrs)
    band_tags = json.loads(attrs.pop("band_tags", "[]") or "[]")
    if band_tags:
        attrs.update({k: v for k, v in band_tags[index].items()})
    attrs["units"] = units
    nodata = stack.rio.nodata if categorical else None
    layer = layer.drop_vars(["variable", "units"])
    layer.name = names[index]
    layer.attrs = attrs
    layer = layer.rio.write_crs(stack.rio.crs)
    if nodata is not None:
        layer = layer.rio.write_nodata(nodata)
    return layer


def read_tags(path) -> dict:
    """Dataset-level tags of a GeoTIFF or global attributes of a NetCDF file, JSON-decoded.

    A ``categories`` tag comes back as ``{int code: meaning}``.
    """
    path = _check_file(path)
    if raster_format(path) == "NetCDF":
        try:
            with xr.open_dataset(path, decode_cf=False) as ds:
                tags = dict(ds.attrs)
        except Exception as exc:  # noqa: BLE001
            raise InputError(f"{path}: not a readable NetCDF file ({type(exc).__name__}; {_EXPECTED})") from None
    else:
        with _open_rasterio_dataset(path) as src:
            tags = src.tags()
    return _decode_tags(tags)
