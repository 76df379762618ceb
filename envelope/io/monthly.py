"""Reading and writing 12-month climate stacks (month, y, x): 12-band GeoTIFF or NetCDF with a month/time axis."""

from __future__ import annotations

import logging
import warnings
from pathlib import Path

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from envelope.errors import InputError
from envelope.grids import continuous_longitudes
from envelope.io.cf_coords import axes_from_2d_latlon, degree_axes

__all__ = ["gridded_variables", "open_monthly", "write_monthly", "TEMPERATURE", "PRECIPITATION", "MONTH_VARIABLES",
           "kind_of_units"]

log = logging.getLogger(__name__)

TEMPERATURE = "temperature"
PRECIPITATION = "precipitation"

CELSIUS_UNITS = {"degc", "°c", "c", "celsius", "deg_c", "degrees_c", "degree_c", "degrees_celsius",
            "degree_celsius", "degrees c", "deg c", "oc"}
KELVIN_UNITS = {"k", "kelvin", "degk", "deg_k"}
MM_UNITS = {"mm", "millimeter", "millimeters", "millimetre", "millimetres", "mm/month", "mm month-1",
       "mm/mon", "kg m-2", "kg/m2", "kg m**-2"}


#: Names of the 12 bands (GeoTIFF) or 2-D variables (NetCDF) that :func:`write_monthly` writes.
MONTH_VARIABLES = [f"M{m:02d}" for m in range(1, 13)]

_GEOTIFF = {".tif", ".tiff"}
_NETCDF = {".nc", ".nc4", ".netcdf", ".cdf"}
Y_NAMES = ("y", "lat", "latitude", "rlat", "northing")
X_NAMES = ("x", "lon", "longitude", "rlon", "easting")


def kind_of_units(units: str) -> str | None:
    """``"temperature"`` for °C or kelvin, ``"precipitation"`` for mm per month, else None."""
    u = (units or "").strip().lower()
    if u in CELSIUS_UNITS or u in KELVIN_UNITS:
        return TEMPERATURE
    if u in MM_UNITS:
        return PRECIPITATION
    return None


def _check_units(da, path, expect):
    units = str(da.attrs.get("units", "") or "").strip()
    if expect is None or not units:
        # no units in the file: the caller's stated units (°C, mm) are assumed
        return da, units
    u = units.lower()
    if expect == TEMPERATURE:
        if u in CELSIUS_UNITS:
            return da, "degC"
        if u in KELVIN_UNITS:
            log.info("%s: converting kelvin to degC", path)
            out = da - np.float32(273.15)
            out.attrs = dict(da.attrs)
            return out, "degC"
        raise InputError(f"{path}: units {units!r}; expected a temperature in degC (or K)")
    if u in MM_UNITS:
        return da, "mm"
    raise InputError(f"{path}: units {units!r}; expected monthly precipitation totals in mm "
                     "(convert rates such as kg m-2 s-1 to mm per month first)")


def _open_geotiff(path, chunks):
    import rasterio
    import rioxarray

    try:
        with rasterio.open(path) as src:
            count, crs = src.count, src.crs
            units = (src.tags(1).get("units") or (src.units[0] if src.units else "")
                     or src.tags().get("units", "")) if count else ""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)  # rioxarray's chunk-tuple deprecation
            da = rioxarray.open_rasterio(path, chunks=chunks, masked=True, lock=False)
    except rasterio.errors.RasterioIOError as exc:
        raise InputError(f"{path}: not a readable GeoTIFF ({str(exc).splitlines()[0]})") from None
    if crs is None:
        raise InputError(f"{path}: no CRS in the file; expected a georeferenced GeoTIFF")
    if count != 12:
        raise InputError(f"{path}: {count} bands; expected 12 monthly bands (January ... December)")
    da = da.rename(band="month").assign_coords(month=np.arange(1, 13))
    da.attrs["units"] = units or ""
    return da


def find_dim(da, candidates, what, path):
    found = next((d for d in da.dims if str(d).lower() in candidates), None)
    if found is None:
        raise InputError(f"{path}: dims {da.dims}; expected a {what} dim named one of {', '.join(candidates)}")
    return found


def _pick_variable(ds, path, name, variable):
    if variable is not None:
        if variable not in ds.data_vars:
            raise InputError(f"{path}: no variable {variable!r}; found {', '.join(map(str, ds.data_vars))}")
        return ds[variable]
    gridded = [v for v in ds.data_vars if ds[v].ndim >= 3]
    if name in gridded:
        return ds[name]
    if len(gridded) == 1:
        return ds[gridded[0]]
    raise InputError(f"{path}: {len(gridded)} gridded variables ({', '.join(map(str, gridded)) or 'none'}); "
                     f"expected one, or one called {name!r}")


def _open_dataset(path, chunks):
    try:
        return xr.open_dataset(path, chunks=chunks, mask_and_scale=True, decode_coords="all",
                               decode_times=xr.coders.CFDatetimeCoder(use_cftime=None))
    except Exception as exc:  # netCDF4/h5netcdf raise several unrelated types
        raise InputError(f"{path}: cannot read as NetCDF ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})") from None


def gridded_variables(path) -> list[str] | None:
    """Names of the gridded (3-D or more) variables of a NetCDF file; None for a GeoTIFF.

    Only the file's header is read (the data stay on disk), so a caller can choose the
    ``variable=`` of :func:`open_monthly` before opening the stack.

    Raises
    ------
    InputError
        Naming the file: not found or not readable as NetCDF.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: file not found")
    if path.suffix.lower() not in _NETCDF:
        return None
    with _open_dataset(path, {}) as ds:
        return [str(v) for v in ds.data_vars if ds[v].ndim >= 3]


def _order_by_month_coordinate(da, path):
    """A ``month`` dim: sorted by its coordinate when the file has one (each month 1..12 once), else file order."""
    if "month" not in da.coords:  # a dimension without a coordinate variable: January .. December
        return da.assign_coords(month=np.arange(1, 13))
    values = da["month"].values
    try:
        months = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        months = None
    if months is None or sorted(months.tolist()) != list(range(1, 13)):
        raise InputError(f"{path}: month values {list(values.tolist())}; expected each month 1..12 once")
    return da.assign_coords(month=months.astype(int)).sortby("month")


def _open_month_variables(path, chunks):
    """A NetCDF as :func:`write_monthly` writes it (2-D variables M01 ... M12) as one (month, y, x) array."""
    from envelope.io.rasters import open_climate

    stack = open_climate(path, variables=MONTH_VARIABLES, chunks=chunks)
    units = sorted({str(u) for u in stack["units"].values})
    if len(units) > 1:
        raise InputError(f"{path}: variables M01 ... M12 have different units ({', '.join(units)}); expected one")
    crs = stack.rio.crs
    da = stack.drop_vars("units").rename(variable="month").assign_coords(month=np.arange(1, 13))
    da.attrs = {"units": units[0]}
    return da.rio.write_crs(crs)


def _open_netcdf(path, chunks, name, variable):
    ds = axes_from_2d_latlon(_open_dataset(path, chunks), path)
    if (variable is None and not any(ds[v].ndim >= 3 for v in ds.data_vars)
            and all(m in ds.data_vars for m in MONTH_VARIABLES)):
        ds.close()
        return _open_month_variables(path, chunks)
    da = _pick_variable(ds, path, name, variable)
    xdim = find_dim(da, X_NAMES, "x", path)
    ydim = find_dim(da, Y_NAMES, "y", path)
    geographic = degree_axes(da, xdim, ydim)
    mdim = "month" if "month" in da.dims else ("time" if "time" in da.dims else None)
    if mdim is None or ydim not in da.dims or xdim not in da.dims:
        raise InputError(f"{path}: dims {da.dims}; expected a month or time dim and y/x or lat/lon")
    extra = [d for d in da.dims if d not in (ydim, xdim, mdim)]
    for d in extra:
        if da.sizes[d] != 1:
            raise InputError(f"{path}: extra dim {d!r} of size {da.sizes[d]}; expected only month, y, x")
    da = da.squeeze(extra, drop=True)
    if da.sizes[mdim] != 12:
        raise InputError(f"{path}: {da.sizes[mdim]} steps along {mdim!r}; expected 12 months "
                         "(average a multi-year series into a monthly climatology first)")
    if mdim == "time":
        try:
            months = np.asarray(da["time"].dt.month.values, dtype=int)
        except (AttributeError, TypeError):
            raise InputError(f"{path}: time values are not dates; expected 12 monthly dates") from None
        if sorted(months) != list(range(1, 13)):
            raise InputError(f"{path}: time steps fall in months {sorted(set(months.tolist()))}; "
                             "expected each month 1..12 once")
        da = da.drop_vars("time").rename(time="month").assign_coords(month=months).sortby("month")
    else:
        da = _order_by_month_coordinate(da, path)
    da = da.rename({ydim: "y", xdim: "x"})
    try:
        crs = da.rio.crs
    except Exception:  # noqa: BLE001  an undecodable grid mapping is treated as absent
        crs = None
    if crs is None:
        if not geographic:
            raise InputError(f"{path}: projected x/y but no grid mapping; expected a CF grid_mapping")
        crs = "EPSG:4326"
    return da.rio.write_crs(crs)


def normalise_axes(da):
    """North-up rows and continuous west-to-east longitudes, the project-wide grid conventions."""
    crs = da.rio.crs
    if da.sizes["y"] > 1 and float(da["y"][0]) < float(da["y"][-1]):
        da = da.isel(y=slice(None, None, -1))
    if crs is not None and crs.is_geographic and da.sizes["x"] > 1:
        da = continuous_longitudes(da)   # 0-360 or split at 180 deg: one west-to-east run
    elif da.sizes["x"] > 1 and float(da["x"][0]) > float(da["x"][-1]):
        da = da.isel(x=slice(None, None, -1))
    return da.rio.write_crs(crs)


def open_monthly(path, *, name: str, variable: str | None = None, units: str | None = None,
                 chunks="auto") -> xr.DataArray:
    """Open a 12-month climate stack as a lazy DataArray (month, y, x).

    Parameters
    ----------
    path : str or Path
        A GeoTIFF with 12 bands (band 1 = January) or a NetCDF file whose variable has a
        ``month`` dim of 12 (ordered by its coordinate 1..12 when it has one) or a ``time``
        dim of 12 dates (months taken from the dates), or 2-D variables ``M01`` ... ``M12``
        as :func:`write_monthly` writes them.
    name : str
        Role of the stack (``"tmin"``, ``"prec"`` ...): the array's name, and the NetCDF
        variable picked when the file holds several.
    variable : str, optional
        NetCDF variable to read, when it is not called ``name``.
    units : {"temperature", "precipitation"}, optional
        What the stack must hold. Temperatures in °C pass, kelvin is converted to °C;
        precipitation must be monthly totals in mm. Other units are an error; a stack without
        units is taken to be in °C / mm as the caller states.
    chunks : default "auto"
        Dask chunks for y/x; the month axis is one chunk.

    Returns
    -------
    DataArray (month, y, x), float32, NaN nodata, CRS attached, north-up, longitudes in
    -180..180 (continuous beyond 180 for a grid over the 180° meridian); coordinate ``month`` = 1..12; ``attrs["units"]`` ("" if unknown) and
    ``attrs["source"]`` (the file).

    Raises
    ------
    InputError
        Naming the file: not found, unreadable, not 12 months, or wrong units.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: file not found ({name})")
    suffix = path.suffix.lower()
    if suffix in _GEOTIFF:
        da = _open_geotiff(path, chunks)
    elif suffix in _NETCDF:
        da = _open_netcdf(path, {} if chunks == "auto" else chunks, name, variable)
    else:
        raise InputError(f"{path}: suffix {path.suffix!r}; expected a GeoTIFF (.tif) or NetCDF (.nc) file")
    da = normalise_axes(da.transpose("month", "y", "x"))
    da, unit_text = _check_units(da, path, units)
    crs = da.rio.crs
    keep = [c for c in da.coords if c in ("month", "y", "x")]
    da = da.drop_vars([c for c in da.coords if c not in keep]).astype(np.float32)
    if da.chunks is not None:
        da = da.chunk({"month": -1})
    da = da.rio.write_crs(crs) if crs is not None else da
    da.name = name
    da.attrs = {"units": unit_text, "source": str(path)}
    return da


def write_monthly(da: xr.DataArray, path, *, overwrite: bool = False, tags: dict | None = None) -> Path:
    """Write a (month, y, x) stack as 12 bands described ``M01`` ... ``M12`` (GeoTIFF or NetCDF by suffix)."""
    from envelope.io.writing import write_raster

    crs = da.rio.crs
    stack = da.rename(month="variable").assign_coords(
        variable=[f"M{int(m):02d}" for m in da["month"].values])
    stack = stack.assign_coords(units=("variable", [str(da.attrs.get("units", ""))] * 12))
    if crs is not None:
        stack = stack.rio.write_crs(crs)
    write_raster(stack, path, overwrite=overwrite, tags=tags)
    return Path(path)
