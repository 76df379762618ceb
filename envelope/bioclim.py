"""Bioclimatic variables on grids: 12-month stacks (month, y, x) to a stack (variable, y, x), chunk by chunk."""

from __future__ import annotations

import logging
import warnings

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from envelope.errors import InputError
from envelope.grids import check_same_grid, georeferenced_like
from envelope.kernels.bioclim import bioclim_kernel, variable_long_names, variable_names, variable_units
from envelope.projection import KERNEL_CELLS, map_cells

__all__ = ["bioclim", "check_monthly", "check_monthly_grids"]

log = logging.getLogger(__name__)

# Plausible monthly temperatures in °C; beyond this the stack is probably kelvin or °C x 10.
_MAX_ABS_CELSIUS = 100.0
# Plausible monthly precipitation totals in mm. The wettest calendar month on record is about
# 9,300 mm (from memory: Cherrapunji, July 1861), so more than 10,000 mm in one cell-month means
# scaled integers (mm x 10, x 100) read without their scale. A stack whose wettest cell-month
# holds under 1 mm is kept but warned about: a rate in kg m-2 s-1 labelled mm/day or mm looks so.
_MAX_MONTHLY_MM = 10_000.0
_MIN_WETTEST_MM = 1.0


def _check_monthly_dims(da, name):
    if not isinstance(da, xr.DataArray):
        raise InputError(f"{name}: expected an xarray.DataArray with dims (month, y, x), got {type(da).__name__}")
    if set(da.dims) != {"month", "y", "x"}:
        raise InputError(f"{name}: dims {da.dims}; expected (month, y, x)")
    if da.sizes["month"] != 12:
        raise InputError(f"{name}: {da.sizes['month']} months; expected 12 (January ... December)")


def check_monthly_grids(arrays: dict[str, xr.DataArray]) -> None:
    """Check that named 12-month stacks share one grid (CRS, shape and cell centres).

    Raises
    ------
    GridMismatchError
        Naming the first pair of stacks that differ and how.
    """
    items = [(n, a) for n, a in arrays.items() if a is not None]
    for name, da in items:
        _check_monthly_dims(da, name)
    ref_name, ref = items[0]
    for name, da in items[1:]:
        check_same_grid(ref, da, ref_name=ref_name, other_name=name)


def check_monthly(tmin, tmax, prec, tmean=None, *, names=None) -> None:
    """Check the values of 12-month stacks before computing bioclimatic variables.

    One pass over the data (dask computes a few counts; nothing is kept in memory):

    - tmin > tmax in any cell-month is an error, with the count: swapped or misaligned
      files are the usual cause, and BIO2/BIO3/BIO7 would be meaningless.
    - negative precipitation is an error, with the count.
    - |temperature| above 100 is an error: the stack is probably kelvin or °C x 10.
    - a monthly total above 10,000 mm is an error (scaled integers read without their
      scale); a stack whose wettest cell-month holds under 1 mm is logged as a warning
      (a per-second rate labelled mm/day or mm).

    Parameters
    ----------
    tmin, tmax, prec, tmean : DataArray (month, y, x)
    names : dict, optional
        Role -> file name used in messages, e.g. ``{"prec": "prec.tif"}``.

    Raises
    ------
    InputError
    """
    import dask

    names = {"tmin": "tmin", "tmax": "tmax", "prec": "prec", "tmean": "tmean", **(names or {})}
    temps = {"tmin": tmin, "tmax": tmax, **({"tmean": tmean} if tmean is not None else {})}
    lazy = {
        "swapped": (tmin > tmax).sum(),
        "negative": (prec < 0).sum(),
        "wettest": prec.max(),
        **{f"abs_{k}": abs(v).max() for k, v in temps.items()},
    }
    values = dict(zip(lazy, dask.compute(*[v.data for v in lazy.values()])))
    if int(values["negative"]):
        raise InputError(f"{names['prec']}: {int(values['negative'])} cell-months of negative precipitation; "
                         "expected monthly totals >= 0 mm")
    wettest = float(values["wettest"])
    if np.isfinite(wettest) and wettest > _MAX_MONTHLY_MM:
        raise InputError(f"{names['prec']}: precipitation up to {wettest:g} mm in one month; expected monthly "
                         f"totals in mm, at most {_MAX_MONTHLY_MM:g} (the wettest month on record is about "
                         "9,300 mm): is the stack stored as scaled integers (mm x 10 or x 100)?")
    if np.isfinite(wettest) and wettest < _MIN_WETTEST_MM:
        log.warning("%s: the wettest cell-month holds %.3g mm; expected monthly totals in mm -- check the units "
                    "(a rate in kg m-2 s-1 labelled mm/day or mm reads 86,400 times too small)", names["prec"],
                    wettest)
    for role in temps:
        big = float(values[f"abs_{role}"])
        if np.isfinite(big) and big > _MAX_ABS_CELSIUS:
            raise InputError(f"{names[role]}: temperatures up to {big:g}; expected degC "
                             "(is this stack in kelvin or degC x 10?)")
    if int(values["swapped"]):
        raise InputError(f"{names['tmin']} and {names['tmax']}: tmin > tmax in {int(values['swapped'])} "
                         "cell-months; expected tmin <= tmax (files swapped or on different grids?)")


def _bioclim_cells(*months, conventions):
    """(month, cells) runs of tmin, tmax, prec[, tmean] -> float32 (variable, cells)."""
    tmean = months[3] if len(months) == 4 else None
    return bioclim_kernel(*months[:3], tmean, **conventions).astype(np.float32)


def bioclim(
    tmin: xr.DataArray,
    tmax: xr.DataArray,
    prec: xr.DataArray,
    tmean: xr.DataArray | None = None,
    *,
    variables=None,
    wrap: bool = True,
    ddof: int = 0,
    cv_plus_one: bool = False,
    gdd_base: float | None = 5.0,
) -> xr.DataArray:
    """Bioclimatic variables BIO1-BIO19 (and growing degree days) from 12-month stacks.

    Lazy: with dask-backed inputs nothing is computed until the result is written or
    ``.compute()`` is called; each (month, y, x) block goes through
    :func:`envelope.kernels.bioclim.bioclim_kernel` as it was read, months first (see
    :func:`envelope.projection.map_cells`), in runs of
    :data:`envelope.projection.KERNEL_CELLS` cells.

    Parameters
    ----------
    tmin, tmax : DataArray (month, y, x)
        Monthly mean daily minimum / maximum temperature, °C, months 1..12.
    prec : DataArray (month, y, x)
        Monthly total precipitation, mm.
    tmean : DataArray (month, y, x), optional
        Monthly mean temperature, °C; default (tmin + tmax) / 2.
    variables : list of str, optional
        Subset and order of the output, e.g. ``["BIO1", "BIO12", "GDD5"]``; default all.
    wrap, ddof, cv_plus_one, gdd_base
        Conventions, see :func:`envelope.kernels.bioclim.bioclim_kernel`.

    Returns
    -------
    DataArray (variable, y, x), float32, named "climate"
        Coordinate ``variable`` holds ``BIO1`` ... ``BIO19`` (and ``GDD<base>``), non-dim
        coordinates ``units`` and ``long_name`` along it; attrs record the conventions. CRS
        is that of ``tmin``.

    References
    ----------
    O'Donnell, M.S. & Ignizio, D.A. (2012) U.S. Geological Survey Data Series 691.
    """
    if gdd_base is not None and not np.isfinite(gdd_base):
        raise InputError(f"gdd_base (--gdd-base): got {gdd_base!r}; expected a finite temperature in degC")
    inputs = {"tmin": tmin, "tmax": tmax, "prec": prec, "tmean": tmean}
    check_monthly_grids(inputs)
    all_names = list(variable_names(gdd_base))
    if variables is not None:
        unknown = [v for v in variables if v not in all_names]
        if unknown:
            raise InputError(f"variables: {unknown[0]!r} is not a bioclimatic variable here; "
                             f"expected some of {', '.join(all_names)}")
    # months first, as read: the kernel works on whole months of cells at a time
    stacks = [v.transpose("month", "y", "x") for v in inputs.values() if v is not None]
    conventions = {"wrap": wrap, "ddof": ddof, "cv_plus_one": cv_plus_one, "gdd_base": gdd_base}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        out = map_cells(_bioclim_cells, *stacks, bands=len(all_names), batch_cells=KERNEL_CELLS,
                        conventions=conventions)
    has_tmean = tmean is not None
    out = out.assign_coords(
        variable=all_names,
        units=("variable", list(variable_units(gdd_base))),
        long_name=("variable", list(variable_long_names(gdd_base))),
    )
    if variables is not None:
        out = out.sel(variable=list(variables))
    out.name = "climate"
    out.attrs = {
        "source": "bioclimatic variables after O'Donnell & Ignizio (2012), USGS Data Series 691",
        "quarters": "rolling 3-month windows wrapping the year end" if wrap else
                    "rolling 3-month windows within January-December",
        "sd_ddof": int(ddof),
        "bio15_on_prec_plus_one": int(bool(cv_plus_one)),
        "tavg": "input tmean" if has_tmean else "(tmin + tmax) / 2",
    }
    if gdd_base is not None:
        out.attrs["gdd_method"] = (f"sum over months of max(Tavg - {float(gdd_base):g}, 0) x days in month "
                                   "(365-day year)")
    # CRS, and the stated transform of a one-row or one-column grid (its cell size is not in the coordinates)
    return georeferenced_like(out, tmin)
