"""Monthly CF-NetCDF series (many years x 12 months, one or many files) read as a lazy 12-month climatology."""

from __future__ import annotations

import glob
import logging
import re
from pathlib import Path

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.io.cf_coords import axes_from_2d_latlon, degree_axes
from envelope.io.monthly import (CELSIUS_UNITS, KELVIN_UNITS, MM_UNITS, PRECIPITATION, TEMPERATURE, X_NAMES, Y_NAMES,
                                 find_dim, normalise_axes, open_monthly)

__all__ = ["CF_STANDARD_NAMES", "ROLE_NAMES", "expand_paths", "parse_period", "open_monthly_series",
           "series_variable", "variable_for_role", "days_in_month"]

log = logging.getLogger(__name__)

#: Variable names looked for per role (CMIP-style short names after the project's own).
ROLE_NAMES = {
    "tmin": ("tmin", "tasmin", "tn"),
    "tmax": ("tmax", "tasmax", "tx"),
    "tmean": ("tmean", "tas", "tg"),
    "prec": ("prec", "pr", "precip", "precipitation"),
}

#: CF standard names per role, with the cell method that tells minimum from maximum temperature.
#: Source: CF Standard Name Table (cfconventions.org), version 84: air_temperature (canonical
#: units K), precipitation_flux (kg m-2 s-1), precipitation_amount (kg m-2).
CF_STANDARD_NAMES = {
    "tmin": ("air_temperature", "minimum"),
    "tmax": ("air_temperature", "maximum"),
    "tmean": ("air_temperature", "mean"),
    "prec": ("precipitation_flux", None),
}
_PRECIP_STANDARD_NAMES = ("precipitation_flux", "precipitation_amount")

# Calendars by their CF names; aliases share one spelling (CF conventions 1.11, section 4.4.1).
_CALENDAR_ALIASES = {"gregorian": "standard", "365_day": "noleap", "366_day": "all_leap", "none": "standard"}

# Precipitation units: a rate per second (kg m-2 s-1 = mm s-1 of water), per day, or a monthly total.
_PER_SECOND = {"kg m-2 s-1", "kg m**-2 s**-1", "kg/m2/s", "kg m^-2 s^-1", "mm s-1", "mm/s", "kg.m-2.s-1"}
_PER_DAY = {"mm d-1", "mm day-1", "mm/day", "mm/d", "kg m-2 d-1", "kg m-2 day-1", "mm day**-1"}
_SECONDS_PER_DAY = 86400.0

_PERIOD = re.compile(r"^\s*(\d{1,4})\s*[-–/:]\s*(\d{1,4})\s*$")


def parse_period(text, *, option: str = "--period") -> tuple[int, int] | None:
    """``"1991-2020"`` -> (1991, 2020), both years inclusive; None for None/empty."""
    if text is None or str(text).strip() == "":
        return None
    match = _PERIOD.match(str(text))
    if not match:
        raise InputError(f"{option} {text!r}: expected FIRST-LAST years, e.g. 1991-2020")
    first, last = int(match.group(1)), int(match.group(2))
    if last < first:
        raise InputError(f"{option} {text!r}: the last year {last} is before the first {first}")
    return first, last


def expand_paths(values, *, option: str = "input") -> list[Path]:
    """Files named by each value: a path, or a glob pattern (``'tas_*.nc'``), sorted; repeats kept once.

    Raises InputError naming the value when a pattern matches nothing or a path does not exist.
    """
    items = [values] if isinstance(values, (str, Path)) else list(values)
    if not items:
        raise InputError(f"{option}: no file given")
    out: list[Path] = []
    for value in items:
        text = str(value)
        if glob.has_magic(text):
            found = sorted(glob.glob(text))
            if not found:
                raise InputError(f"{text!r}: the pattern matches no file ({option})")
            paths = [Path(f) for f in found]
        else:
            paths = [Path(text)]
            if not paths[0].is_file():
                raise InputError(f"{text}: file not found ({option})")
        out.extend(p for p in paths if p not in out)
    return out


def days_in_month(time: xr.DataArray) -> np.ndarray:
    """Days of each time step's month in the series' own calendar (cftime: noleap, 360_day, ...)."""
    return np.asarray(time.dt.days_in_month.values, dtype=np.float64)


def _calendar(attrs) -> str:
    cal = str(attrs.get("calendar", "standard")).strip().lower()
    return _CALENDAR_ALIASES.get(cal, cal)


def _header(path: Path):
    try:
        return xr.open_dataset(path, decode_times=False, decode_coords=False, chunks={})
    except Exception as exc:  # noqa: BLE001 - netCDF4/h5netcdf raise several unrelated types
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot read as NetCDF ({reason})") from None


def _gridded(ds) -> list[str]:
    return [str(v) for v in ds.data_vars if ds[v].ndim >= 3]


def series_variable(ds: xr.Dataset, path, *, role: str | None, requested: str | None = None,
                    hint: str = "add --variable NAME to pick one") -> str:
    """The variable of a file for a role: as requested, by name, by CF standard_name, or the only gridded one.

    Names are looked up in :data:`ROLE_NAMES` (``tasmin`` for ``tmin``), then standard names in
    :data:`CF_STANDARD_NAMES` (``air_temperature`` with ``cell_methods`` saying ``minimum``).
    """
    gridded = _gridded(ds)
    if requested:
        if requested not in ds.data_vars:
            raise InputError(f"{path}: no variable {requested!r}; found {', '.join(map(str, ds.data_vars))}")
        return requested
    names = ROLE_NAMES.get(role or "", ()) + ((role,) if role else ())
    for name in names:
        if name in gridded:
            return name
    if role in CF_STANDARD_NAMES:
        standard, method = CF_STANDARD_NAMES[role]
        wanted = _PRECIP_STANDARD_NAMES if role == "prec" else (standard,)
        hits = [v for v in gridded if ds[v].attrs.get("standard_name") in wanted]
        if method is not None and len(hits) > 1:
            hits = [v for v in hits if method in str(ds[v].attrs.get("cell_methods", ""))] or hits
        if len(hits) == 1:
            return hits[0]
    if len(gridded) == 1:
        return gridded[0]
    raise InputError(f"{path}: {len(gridded)} gridded variables ({', '.join(gridded) or 'none'}) and none that "
                     f"names {role or 'the input'} by name or CF standard_name; {hint}")


def variable_for_role(path, role: str | None, hint: str = "add --variable NAME to pick one") -> str | None:
    """The variable :func:`series_variable` picks in one NetCDF file (only its header is read); None if it has none gridded."""
    with _header(Path(path)) as ds:
        if not _gridded(ds):
            return None
        return series_variable(ds, path, role=role, hint=hint)


def _precipitation_factor(units: str, days: np.ndarray, where: str) -> np.ndarray:
    u = " ".join(units.strip().lower().split())
    if u in _PER_SECOND:
        return days * _SECONDS_PER_DAY
    if u in _PER_DAY:
        return days
    if u in MM_UNITS:
        return np.ones_like(days)
    raise InputError(f"{where}: units {units!r}; expected precipitation as kg m-2 s-1, mm/day or a monthly "
                     "total in mm (kg m-2)")


def _temperature_offset(units: str, where: str) -> float:
    u = units.strip().lower()
    if u in KELVIN_UNITS:
        return -273.15
    if u in CELSIUS_UNITS:
        return 0.0
    raise InputError(f"{where}: units {units!r}; expected a temperature in K or degC")


def _check_files(files, role, requested, hint):
    """Per file: the variable, its units and the calendar; one calendar and one unit for the series."""
    variables, calendars, units, months = [], {}, {}, {}
    for path in files:
        with _header(path) as ds:
            name = series_variable(ds, path, role=role, requested=requested, hint=hint)
            var = ds[name]
            unit = str(var.attrs.get("units", "") or "").strip()
            if not unit:
                raise InputError(f"{path}: variable {name!r} has no units attribute; expected CF units "
                                 "(K or degC for temperature, kg m-2 s-1 or mm for precipitation)")
            tdim = next((d for d in var.dims if str(d).lower() == "time"), None)
            if tdim is None:
                raise InputError(f"{path}: variable {name!r} has dims {var.dims}; expected a time dim of monthly steps")
            calendars[path] = _calendar(ds[tdim].attrs) if tdim in ds.variables else "standard"
            units[path] = unit
            variables.append(name)
            if len(files) > 1 and tdim in ds.variables:
                months[path] = _file_months(ds[tdim], calendars[path], path)
    if len(set(calendars.values())) > 1:
        seen = {}
        for path, cal in calendars.items():
            seen.setdefault(cal, path)
        detail = ", ".join(f"{p.name} {c}" for c, p in seen.items())
        raise InputError(f"{files[0].parent}: mixed calendars in one series ({detail}); expected one calendar")
    _check_no_overlap(months, files)
    if len(set(units.values())) > 1:
        detail = ", ".join(f"{p.name} {u!r}" for p, u in list(units.items())[:3])
        raise InputError(f"{files[0]}: units differ between the files of one series ({detail}); expected one")
    if len(set(variables)) > 1:
        raise InputError(f"{files[0]}: the files name the variable differently ({', '.join(sorted(set(variables)))}); "
                         "expected one variable per series (give --variable)")
    return variables[0], next(iter(calendars.values())), next(iter(units.values()))


def _file_months(time: xr.DataArray, calendar: str, path) -> set:
    """The (year * 12 + month - 1) keys of a file's undecoded time steps, decoded with cftime."""
    import cftime

    units = time.attrs.get("units")
    if not units:
        raise InputError(f"{path}: time has no units attribute; expected CF time units such as "
                         "'days since 1850-01-01'")
    try:
        dates = cftime.num2date(np.atleast_1d(np.asarray(time.values)), units, calendar)
    except Exception as exc:  # noqa: BLE001 - cftime raises ValueError/TypeError on unusable units
        raise InputError(f"{path}: time units {units!r} with calendar {calendar!r} cannot be decoded ({exc}); "
                         "expected CF time units such as 'days since 1850-01-01'") from None
    return {d.year * 12 + d.month - 1 for d in np.ravel(dates)}


def _check_no_overlap(months: dict, files) -> None:
    """Two files of one series must not hold the same month: combining them would keep one
    file's values without saying so (a second version of a file, or another ensemble member,
    matched by the same glob pattern)."""
    seen = {}
    for path in files:
        held = months.get(path, set())
        shared = sorted(held & seen.keys())
        if shared:
            key = shared[0]
            raise InputError(f"{path}: month {_month_label(key // 12, key % 12 + 1)} is also in "
                             f"{seen[key].name}; expected each month in one file of the series (does a "
                             "pattern match two versions or ensemble members?)")
        seen.update(dict.fromkeys(held, path))


def _open_series(files, name, chunks):
    keep = {name}

    def only(ds):
        return axes_from_2d_latlon(ds[[v for v in ds.data_vars if v in keep]], ds.encoding.get("source", files[0]))

    try:
        return xr.open_mfdataset([str(f) for f in files], combine="by_coords", preprocess=only, chunks=chunks,
                                 data_vars="minimal", coords="minimal", compat="override", join="exact",
                                 decode_times=xr.coders.CFDatetimeCoder(use_cftime=True), parallel=False,
                                 combine_attrs="drop_conflicts")
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - xarray raises ValueError/KeyError/MergeError on mismatched files
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{files[0]}: the {len(files)} files do not combine into one series ({reason}); "
                         "expected one grid and non-overlapping time steps") from None


def _month_label(year, month) -> str:
    return f"{int(year):04d}-{int(month):02d}"


def _select_period(da, period, where):
    """Positions of the period's time steps, ordered; InputError if not covered or months are missing."""
    years = np.asarray(da["time"].dt.year.values, dtype=int)
    months = np.asarray(da["time"].dt.month.values, dtype=int)
    span = f"{_month_label(years[0], months[0])} … {_month_label(years[-1], months[-1])}"
    if period is None:
        first, last = int(years.min()), int(years.max())
    else:
        first, last = period
        if first < years.min() or last > years.max():
            raise InputError(f"{where}: period {first}-{last} is not covered (the files run {span})")
    inside = np.flatnonzero((years >= first) & (years <= last))
    key = years[inside] * 12 + (months[inside] - 1)
    if np.unique(key).size != key.size:
        dup = key[np.flatnonzero(np.diff(np.sort(key)) == 0)[0]]
        raise InputError(f"{where}: month {_month_label(dup // 12, dup % 12 + 1)} appears twice in the series; "
                         "expected one step per month")
    expected = np.arange(first * 12, (last + 1) * 12)
    missing = np.setdiff1d(expected, key)
    if missing.size:
        shown = ", ".join(_month_label(k // 12, k % 12 + 1) for k in missing[:3])
        more = f" and {missing.size - 3} more" if missing.size > 3 else ""
        hint = "" if period is not None else "; give --period FIRST-LAST to use whole years only"
        raise InputError(f"{where}: months missing from {first}-{last}: {shown}{more} (the files run {span}){hint}")
    order = inside[np.argsort(key, kind="stable")]
    return order, first, last


def _chunks_for(var, tdim, ydim, xdim, target_bytes=32 * 2 ** 20) -> dict:
    """One year of months per chunk in time; full rows in space, as many as fit ``target_bytes``.

    A file stored in chunks (NetCDF-4) is read in whole file chunks: a window that cuts one
    makes the library read (and decompress) it once per window.
    """
    nx, ny = var.sizes[xdim], var.sizes[ydim]
    rows = int(max(1, target_bytes // (12 * 4 * nx)))
    want = {ydim: min(ny, rows), xdim: nx}
    stored = var.encoding.get("chunksizes")
    if stored is not None and len(stored) == var.ndim:
        for dim, size in zip(var.dims, stored):
            if dim in want and size:
                want[dim] = min(var.sizes[dim], max(size, round(want[dim] / size) * size))
    return {tdim: 12, **want}


def open_monthly_series(paths, *, name: str, units: str | None = None, variable: str | None = None,
                        period=None, role: str | None = None, hint: str = "add --variable NAME to pick one",
                        chunks="auto") -> xr.DataArray:
    """Open a monthly series (or a 12-month stack) as its 12-month climatology, lazily.

    A single GeoTIFF, or a single NetCDF with 12 steps and no ``period``, is read by
    :func:`envelope.io.monthly.open_monthly` as before. Otherwise the files are one CF series
    (``xarray.open_mfdataset``, combined by their time coordinates; cftime calendars), and the
    climatology is the mean per calendar month over the whole years of ``period``:

    - temperature (K converted to °C): each year's monthly mean weighted by the days of
      that month in the series' calendar, so the result is the mean over all days of the
      period in that calendar month (Februaries of leap years count 29 days);
    - precipitation: rates (kg m-2 s-1, mm/day) become monthly totals in mm with the days of
      each month in the series' calendar (noleap, 360_day ... via cftime), then the totals
      are averaged over the years unweighted.

    The work is lazy and chunked (one year of months by a spatial tile per chunk): no series
    is held in memory.

    Parameters
    ----------
    paths : path, glob pattern or list of them
        One or several NetCDF files of one variable (e.g. one per decade).
    name : str
        Name of the result (``"tmin"``, ``"historical"`` ...).
    units : {"temperature", "precipitation"}, optional
        What the series holds; None decides from the units (K/degC temperature, else precipitation).
    variable : str, optional
        The variable to read; default by :func:`series_variable` for ``role`` (default ``name``).
    period : (int, int), optional
        First and last year, inclusive. Default: every year of the series (which must then
        hold whole years).

    Raises
    ------
    InputError
        One line naming the file: mixed calendars, a period the files do not cover, missing or
        repeated months, a variable without units, units that are not temperature or
        precipitation, files that do not combine.
    """
    files = expand_paths(paths, option=name)
    role = role or name
    if len(files) == 1 and period is None:
        twelve, picked = _twelve_months(files[0], role, variable, hint)
        if twelve:
            return open_monthly(files[0], name=name, units=units, variable=picked, chunks=chunks)
    where = str(files[0]) if len(files) == 1 else f"{files[0]} (+{len(files) - 1} files)"
    var_name, calendar, unit = _check_files(files, role, variable, hint)
    with _header(files[0]) as ds:
        var = ds[var_name]
        xdim, ydim = find_dim(var, X_NAMES, "x", files[0]), find_dim(var, Y_NAMES, "y", files[0])
        tdim = next(d for d in var.dims if str(d).lower() == "time")
        file_chunks = _chunks_for(var, tdim, ydim, xdim)
    ds = _open_series(files, var_name, file_chunks)
    da = ds[var_name]
    extra = [d for d in da.dims if d not in (tdim, ydim, xdim)]
    for d in extra:
        if da.sizes[d] != 1:
            raise InputError(f"{where}: extra dim {d!r} of size {da.sizes[d]}; expected only time, y, x")
    da = da.squeeze(extra, drop=True).rename({tdim: "time"}).transpose("time", ydim, xdim)
    order, first, last = _select_period(da, period, where)
    if order.size and np.all(np.diff(order) == 1):
        da = da.isel(time=slice(int(order[0]), int(order[-1]) + 1))   # a plain slice keeps whole chunks
    else:
        da = da.isel(time=order)
    days = days_in_month(da["time"])
    kind = units or (TEMPERATURE if unit.strip().lower() in KELVIN_UNITS | CELSIUS_UNITS else PRECIPITATION)
    if kind == TEMPERATURE:
        offset, scale, weights, out_units = _temperature_offset(unit, where), np.ones_like(days), days, "degC"
    else:
        offset, scale, weights, out_units = 0.0, _precipitation_factor(unit, days, where), np.ones_like(days), "mm"
    clim = _climatology(da.data, scale, offset, weights, last - first + 1)
    out = xr.DataArray(clim, dims=("month", "y", "x"),
                       coords={"month": np.arange(1, 13), "y": da[ydim].values, "x": da[xdim].values})
    out = out.rio.write_crs(_series_crs(ds, var_name, xdim, ydim, where))
    out = normalise_axes(out).astype(np.float32)
    out.name = name
    out.attrs = {"units": out_units, "source": ";".join(str(f) for f in files), "period": f"{first}-{last}",
                 "calendar": calendar, "series_units": unit, "n_files": len(files)}
    log.info("%s: climatology %d-%d from %d file(s), calendar %s, %s -> %s", where, first, last, len(files),
             calendar, unit, out_units)
    return out


def _climatology(data, scale, offset, weights, n_years):
    """Weighted mean per calendar month of a (12 * n_years, y, x) dask array ordered year by year.

    value(t) = (data(t) + offset) * scale(t); month m = sum_t w(t) value(t) / sum_t w(t) over the
    steps of calendar month m. With one year of months per chunk the reshape to
    (years, 12, y, x) moves no data between chunks. The offset and, when a month's factor
    w * scale is the same every year (noleap and 360_day calendars), the factor too are
    applied to the 12-month result rather than to every step of the series.
    """
    import dask.array as dsa

    data = dsa.asarray(data).rechunk({0: 12})
    ny, nx = data.shape[1], data.shape[2]
    w = np.asarray(weights, dtype=np.float64).reshape(n_years, 12)
    coef = np.asarray(scale, dtype=np.float64).reshape(n_years, 12) * w          # weight x unit scale
    norm = w.sum(axis=0)                                                         # (12,)
    years = data.reshape((n_years, 12, ny, nx))
    # float32 throughout: a float64 accumulator doubles every chunk's temporaries and the
    # bench (bench/bench_climatology.py) measured it 2-5x slower; 30 float32 terms summed
    # pairwise keep ~1e-7 relative error
    if np.allclose(coef, coef[0], rtol=1e-12, atol=0):
        total = years.sum(axis=0) / (norm / coef[0]).astype(np.float32)[:, None, None]   # e.g. / 30 years
    else:
        total = (years * coef[:, :, None, None].astype(np.float32)).sum(axis=0) / norm.astype(np.float32)[:, None, None]
    # sum_t w scale (x + offset) / sum_t w = mean of scaled x + offset * sum_t (w scale) / sum_t w
    shift = (offset * coef.sum(axis=0) / norm).astype(np.float32)
    return total + shift[:, None, None] if np.any(shift) else total


def _series_crs(ds, var_name, xdim, ydim, where):
    try:
        crs = ds[var_name].rio.crs
    except Exception:  # noqa: BLE001 - an undecodable grid mapping is treated as absent
        crs = None
    if crs is not None:
        return crs
    if degree_axes(ds, xdim, ydim):
        return "EPSG:4326"
    raise InputError(f"{where}: projected x/y but no grid mapping; expected a CF grid_mapping")


def _twelve_months(path: Path, role, variable, hint):
    """(True, variable) for a file :func:`open_monthly` reads (GeoTIFF, 12 months, M01..M12); (False, None) for a series."""
    if path.suffix.lower() not in (".nc", ".nc4", ".netcdf", ".cdf"):
        return True, variable
    with _header(path) as ds:
        if not _gridded(ds):
            return True, variable
        try:
            name = series_variable(ds, path, role=role, requested=variable, hint=hint)
        except InputError:
            return True, variable   # let open_monthly name the problem as it always has
        var = ds[name]
        tdim = next((d for d in var.dims if str(d).lower() == "time"), None)
        return (tdim is None or var.sizes[tdim] == 12), name
