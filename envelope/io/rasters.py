"""Raster I/O: read GeoTIFF / CF-NetCDF into climate stacks and layers, write COG or CF-NetCDF atomically."""

from __future__ import annotations

import contextlib
import json
import logging
import os
import threading
from pathlib import Path

import numpy as np
import xarray as xr
import rioxarray  # noqa: F401  (registers .rio)

from envelope.errors import InputError
from envelope.io.atomic import atomic_output, check_writable

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


def _encode(value) -> str:
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


def _read_gdal(path: Path, *, chunks, categorical: bool, name_from_stem: bool) -> xr.DataArray:
    """A GDAL raster as (variable, y, x): float32 NaN nodata, or native dtype if categorical."""
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
        if chunks in (True, "auto"):
            # rioxarray's own "auto" passes dimension-order tuples (deprecated in xarray);
            # the same tile-aware choice, given by dimension name
            from dask.array.core import normalize_chunks

            band_c, y_c, x_c = normalize_chunks((1, "auto", "auto"), shape=(count, src.height, src.width),
                                                dtype=np.dtype(src.dtypes[0]),
                                                previous_chunks=(1,) + tuple(src.block_shapes[0]))
            chunks = {"band": band_c, "y": y_c, "x": x_c}
    if count == 1 and name_from_stem:
        names = [path.stem]
    else:
        names = [d if d else f"band_{i + 1}" for i, d in enumerate(descriptions)]
        if count > 1 and not all(descriptions):
            log.warning("%s: bands without descriptions named %s", path,
                        ", ".join(n for n, d in zip(names, descriptions) if not d))
    if len(set(names)) != len(names):
        raise InputError(f"{path}: band descriptions {names} repeat a name (expected one name per band)")
    import rioxarray as rxr

    packed = any(s != 1.0 for s in scales) or any(o != 0.0 for o in offsets)
    da = rxr.open_rasterio(path, chunks=chunks, masked=not categorical, mask_and_scale=packed and not categorical,
                           lock=False)
    if not categorical:
        da = da.astype(np.float32)
    da = da.rename({"band": "variable"}).assign_coords(variable=names)
    out = _normalised(da, crs, path)
    out = out.assign_coords(units=("variable", units))
    out.attrs = {k: v for k, v in tags.items()}
    out.attrs["band_tags"] = json.dumps(band_tags)
    if categorical and nodata is not None:
        out = out.rio.write_nodata(nodata)
    return out


def _normalised(da: xr.DataArray, crs, path) -> xr.DataArray:
    """Clean (variable, y, x) array: north-up, -180..180 longitudes, CRS attached, no extra coords."""
    geographic = bool(crs.is_geographic)
    x = np.asarray(da["x"].values, dtype=np.float64)
    if geographic and x.size and np.nanmax(x) > 180.0:
        # 0-360 longitudes -> -180..180, then columns sorted west to east
        x = np.where(x > 180.0, x - 360.0, x)
        da = da.assign_coords(x=x).sortby("x")
        step = np.diff(da["x"].values)
        if step.size > 1 and not np.allclose(step, step[0], rtol=1e-5, atol=0):
            raise InputError(f"{path}: 0–360 longitudes of a grid that spans the 180° meridian cannot be "
                             f"normalised to -180..180 (expected a global grid, or one on one side of 180°)")
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
    return clean.rio.write_crs(crs)


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
    out = _normalised(stacked, crs, path).assign_coords(units=("variable", units))
    out.attrs = {k: v if isinstance(v, str) else json.dumps(v, default=str)
                 for k, v in ds.attrs.items() if isinstance(v, (str, int, float))}
    return out


def _read(path, *, time=None, chunks="auto", categorical=False, name_from_stem=True) -> xr.DataArray:
    path = _check_file(path)
    if raster_format(path) == "NetCDF":
        return _read_netcdf(path, time=time, chunks=chunks, categorical=categorical)
    if time is not None:
        raise InputError(f"{path}: time= applies to NetCDF files only (a GeoTIFF has no time axis)")
    return _read_gdal(path, chunks=chunks, categorical=categorical, name_from_stem=name_from_stem)


# --------------------------------------------------------------------------- public readers


def open_climate(paths, *, variables=None, rename=None, time=None, chunks="auto") -> xr.DataArray:
    """Open climate grids as one stack with dims (variable, y, x).

    Parameters
    ----------
    paths : path or list of paths
        A multi-band GeoTIFF (band descriptions name the variables; ``band_1``... with a
        warning when missing), several single-band GeoTIFFs (each file's stem names its
        variable; all must share one grid), or a CF-NetCDF file (each 2-D data variable is a
        variable; lat/lon or projected x/y with a grid mapping).
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
        float32, NaN nodata, north-up (y descending), longitudes -180..180, CRS attached,
        dask-backed; coordinate ``variable`` (names) and non-dim ``units`` ("" if unknown).

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
        part = _read(path, time=time, chunks=chunks)
        if parts:
            check_same_grid(parts[0], part, ref_name=str(items[0]), other_name=str(path))
            part = part.assign_coords(x=parts[0]["x"].values, y=parts[0]["y"].values)
        parts.append(part)
    stack = parts[0] if len(parts) == 1 else xr.concat(parts, dim="variable", join="override",
                                                       combine_attrs="drop_conflicts")
    names = [str(v) for v in stack["variable"].values]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise InputError(f"{', '.join(map(str, items))}: variable names repeat: {', '.join(dup)} "
                         f"(expected one file or band per variable)")
    if rename:
        missing = [k for k in rename if k not in names]
        if missing:
            raise InputError(f"rename: no variable {', '.join(missing)} (the grids hold {', '.join(names)})")
        names = [rename.get(n, n) for n in names]
        stack = stack.assign_coords(variable=names)
    if variables is not None:
        missing = [v for v in variables if v not in names]
        if missing:
            raise InputError(f"variables: {', '.join(missing)} not found (the grids hold {', '.join(names)})")
        stack = stack.sel(variable=list(variables))
    stack.name = "climate"
    stack.attrs.pop("band_tags", None)
    return stack.rio.write_crs(parts[0].rio.crs)


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


# --------------------------------------------------------------------------- writing


def _as_stack(da: xr.DataArray, path) -> xr.DataArray:
    if not isinstance(da, xr.DataArray):
        raise InputError(f"{path}: can only write an xarray.DataArray, got {type(da).__name__}")
    if da.rio.crs is None:
        raise InputError(f"{path}: the grid has no CRS (expected a CRS attached with rio.write_crs)")
    if da.ndim == 2:
        name = str(da.name) if da.name is not None else Path(path).stem
        units = str(da.attrs.get("units", ""))
        da = da.expand_dims(variable=[name]).assign_coords(units=("variable", [units]))
    if da.ndim != 3 or set(da.dims) != {"variable", "y", "x"}:
        raise InputError(f"{path}: cannot write dims {da.dims} (expected (y, x) or (variable, y, x))")
    return da.transpose("variable", "y", "x")


def _block_size(width: int, height: int) -> int:
    """Tile edge: 512, or 256 / 128 for small grids (GDAL's COG driver needs >= 128)."""
    largest = max(width, height)
    return 512 if largest > 512 else 256 if largest > 256 else 128


def write_raster(da, path, *, overwrite=False, tags=None, categories=None, nodata=None, dtype=None) -> Path:
    """Write a layer or stack to a cloud-optimised GeoTIFF or a CF-NetCDF file, atomically.

    Parameters
    ----------
    da : DataArray (y, x) or (variable, y, x)
        With CRS attached; dask-backed arrays are written block by block (never loaded whole).
    path : path
        ``.tif``/``.tiff`` -> GeoTIFF (COG layout: 512-pixel tiles or smaller, DEFLATE with
        predictor, internal overviews); ``.nc`` -> CF-1.8 NetCDF (zlib compression).
    overwrite : bool, default=False
        Replace an existing file; otherwise :class:`OutputExistsError`.
    tags : dict, optional
        Dataset tags (GeoTIFF) / global attributes (NetCDF); non-string values JSON-encoded.
    categories : dict, optional
        ``{code: meaning}`` for categorical rasters, stored as JSON tag ``categories``
        (and CF ``flag_values``/``flag_meanings`` in NetCDF).
    nodata : number, optional
        Nodata value for integer outputs (NaN is used for floating-point outputs).
    dtype : str or numpy dtype, optional
        Output data type (default: the array's).

    Returns
    -------
    Path
        The written file. Nothing is left behind if writing fails.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in GEOTIFF_SUFFIXES and suffix != ".nc":
        raise InputError(f"{path}: unknown output format {suffix or '(no suffix)'!r} (expected .tif, .tiff or .nc)")
    check_writable(path, overwrite)
    stack = _as_stack(da, path)
    dtype = np.dtype(dtype or stack.dtype)
    if dtype == np.float64 and stack.dtype != np.float64:
        dtype = np.dtype(np.float64)
    integer = np.issubdtype(dtype, np.integer) or dtype == np.bool_
    if dtype == np.bool_:
        dtype = np.dtype(np.uint8)
    if integer:
        if nodata is None:
            nodata = stack.rio.nodata if stack.rio.nodata is not None and np.isfinite(stack.rio.nodata) else None
        values = stack.fillna(nodata if nodata is not None else 0) if np.issubdtype(stack.dtype, np.floating) else stack
        values = values.astype(dtype)
    else:
        nodata = np.nan
        values = stack.astype(dtype)
    all_tags = {k: _encode(v) for k, v in (tags or {}).items()}
    if categories is not None:
        all_tags["categories"] = json.dumps({str(k): v for k, v in dict(categories).items()})
    names = [str(v) for v in stack["variable"].values]
    units = ([str(u) for u in np.atleast_1d(stack["units"].values)] if "units" in stack.coords
             else [""] * len(names))
    with atomic_output(path, overwrite) as tmp:
        if suffix == ".nc":
            _write_netcdf(values, tmp, names, units, all_tags, categories, nodata)
        else:
            _write_geotiff(values, tmp, names, units, all_tags, nodata)
    return path


def _write_geotiff(values: xr.DataArray, tmp: Path, names, units, tags: dict, nodata) -> None:
    import rasterio
    import rasterio.shutil

    height, width = values.sizes["y"], values.sizes["x"]
    block = _block_size(width, height)
    floating = np.issubdtype(values.dtype, np.floating)
    predictor = 3 if floating else 2
    stage = tmp.with_name(tmp.name + ".stage.tif")
    clean = xr.DataArray(values.data, dims=("band", "y", "x"),
                         coords={"band": np.arange(1, len(names) + 1), "y": values["y"].values,
                                 "x": values["x"].values})
    clean = clean.rio.write_crs(values.rio.crs)
    if nodata is not None:
        clean = clean.rio.write_nodata(nodata, encoded=False)
    try:
        # stage 1: a tiled GTiff streamed from dask (one block at a time, under a lock)
        clean.rio.to_raster(stage, driver="GTiff", tiled=True, blockxsize=block, blockysize=block,
                            compress="DEFLATE", predictor=predictor, BIGTIFF="IF_SAFER",
                            lock=threading.Lock() if clean.chunks is not None else None)
        with rasterio.open(stage, "r+") as dst:
            for i, (name, unit) in enumerate(zip(names, units), start=1):
                dst.set_band_description(i, name)
                dst.update_tags(i, units=unit)
            dst.update_tags(**tags)
        # stage 2: cloud-optimised layout (tiles, overviews ahead of data) by GDAL's copy
        tmp.unlink(missing_ok=True)
        if _driver_available("COG"):
            rasterio.shutil.copy(stage, tmp, driver="COG", COMPRESS="DEFLATE", PREDICTOR=str(predictor),
                                 BLOCKSIZE=str(block), OVERVIEWS="AUTO", RESAMPLING="NEAREST" if not floating
                                 else "AVERAGE", BIGTIFF="IF_SAFER")
        else:  # pragma: no cover - old GDAL
            _overviews_and_copy(stage, tmp, block, predictor, floating)
    finally:
        stage.unlink(missing_ok=True)
        with contextlib.suppress(FileNotFoundError):
            Path(str(stage) + ".aux.xml").unlink()


def _driver_available(name: str) -> bool:
    import rasterio

    with rasterio.Env() as env:
        return name in env.drivers()


def _overviews_and_copy(stage: Path, tmp: Path, block: int, predictor: int, floating: bool) -> None:
    import rasterio
    import rasterio.shutil
    from rasterio.enums import Resampling

    with rasterio.open(stage, "r+") as dst:
        factors, size = [], max(dst.width, dst.height)
        while size / (2 ** (len(factors) + 1)) >= block / 2 and len(factors) < 8:
            factors.append(2 ** (len(factors) + 1))
        if factors:
            dst.build_overviews(factors, Resampling.average if floating else Resampling.nearest)
    rasterio.shutil.copy(stage, tmp, driver="GTiff", tiled=True, blockxsize=block, blockysize=block,
                         compress="DEFLATE", predictor=predictor, copy_src_overviews=True)


_KNOWN_CF = {
    # name -> (standard_name, long_name); only names whose meaning is unambiguous
    "suitability": (None, "habitat suitability (0-1)"),
    "mess": (None, "multivariate environmental similarity surface"),
    "tas": ("air_temperature", "near-surface air temperature"),
    "pr": ("precipitation_flux", "precipitation"),
}


def _write_netcdf(values: xr.DataArray, tmp: Path, names, units, tags: dict, categories, nodata) -> None:
    from pyproj import CRS

    pcrs = CRS.from_user_input(values.rio.crs.to_wkt())
    geographic = pcrs.is_geographic
    xname, yname = ("lon", "lat") if geographic else ("x", "y")
    coords = {
        yname: (yname, values["y"].values.astype(np.float64)),
        xname: (xname, values["x"].values.astype(np.float64)),
    }
    ds = xr.Dataset(coords=coords)
    if geographic:
        ds[xname].attrs = {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east", "axis": "X"}
        ds[yname].attrs = {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north", "axis": "Y"}
    else:
        unit = pcrs.axis_info[0].unit_name if pcrs.axis_info else "m"
        unit = "m" if unit in ("metre", "meter") else unit
        ds[xname].attrs = {"standard_name": "projection_x_coordinate", "long_name": "x coordinate of projection",
                           "units": unit, "axis": "X"}
        ds[yname].attrs = {"standard_name": "projection_y_coordinate", "long_name": "y coordinate of projection",
                           "units": unit, "axis": "Y"}
    mapping = pcrs.to_cf()
    mapping["crs_wkt"] = pcrs.to_wkt()
    mapping["spatial_ref"] = mapping["crs_wkt"]
    ds["crs"] = xr.DataArray(np.int32(0), attrs=mapping)
    encoding = {}
    for i, (name, unit) in enumerate(zip(names, units)):
        var = xr.DataArray(values.data[i], dims=(yname, xname))
        standard, long_name = _KNOWN_CF.get(name, (None, name))
        attrs = {"long_name": long_name, "units": unit, "grid_mapping": "crs"}
        if standard:
            attrs["standard_name"] = standard
        if categories:
            codes = sorted(int(k) for k in categories)
            attrs["flag_values"] = np.array(codes, dtype=values.dtype)
            attrs["flag_meanings"] = " ".join(str(categories[k]).replace(" ", "_") for k in codes)
        var.attrs = attrs
        ds[name] = var
        enc = {"zlib": True, "complevel": 4, "dtype": values.dtype}
        if nodata is not None:
            enc["_FillValue"] = nodata
        if values.chunks is not None:
            enc["chunksizes"] = (min(512, values.sizes["y"]), min(512, values.sizes["x"]))
        encoding[name] = enc
    ds.attrs = {"Conventions": "CF-1.8", **tags}
    tmp.unlink(missing_ok=True)
    ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding)
