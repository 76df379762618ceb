"""The 19 bioclimatic variables (BIO1-BIO19) and growing degree days from 12 monthly values."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError

__all__ = [
    "BIO_NAMES",
    "BIO_LONG_NAMES",
    "BIO_UNITS",
    "DAYS_IN_MONTH",
    "gdd_name",
    "variable_names",
    "variable_units",
    "variable_long_names",
    "quarter_sums",
    "bioclim_kernel",
]

BIO_NAMES = tuple(f"BIO{i}" for i in range(1, 20))

# Standard names of O'Donnell & Ignizio (2012), USGS Data Series 691, Table 1.
BIO_LONG_NAMES = (
    "annual mean temperature",
    "mean diurnal range",
    "isothermality",
    "temperature seasonality",
    "max temperature of warmest month",
    "min temperature of coldest month",
    "temperature annual range",
    "mean temperature of wettest quarter",
    "mean temperature of driest quarter",
    "mean temperature of warmest quarter",
    "mean temperature of coldest quarter",
    "annual precipitation",
    "precipitation of wettest month",
    "precipitation of driest month",
    "precipitation seasonality",
    "precipitation of wettest quarter",
    "precipitation of driest quarter",
    "precipitation of warmest quarter",
    "precipitation of coldest quarter",
)

# UDUNITS spellings. BIO4 is SD x 100 (DS 691), so its unit is hundredths of a degree.
BIO_UNITS = (
    "degC", "degC", "%", "0.01 degC", "degC", "degC", "degC", "degC", "degC", "degC", "degC",
    "mm", "mm", "mm", "%", "mm", "mm", "mm", "mm",
)

# Days in each month of a 365-day (non-leap) year, for growing degree days.
DAYS_IN_MONTH = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=float)


def gdd_name(base: float) -> str:
    """Short name of growing degree days above ``base`` °C, e.g. ``GDD5`` or ``GDD0.5``."""
    return f"GDD{float(base):g}"


def variable_names(gdd_base: float | None = 5.0) -> tuple[str, ...]:
    """Names of the kernel's output columns, in order: BIO1..BIO19 then GDD<base> if asked."""
    return BIO_NAMES + (() if gdd_base is None else (gdd_name(gdd_base),))


def variable_units(gdd_base: float | None = 5.0) -> tuple[str, ...]:
    """Units of the kernel's output columns (UDUNITS spellings)."""
    return BIO_UNITS + (() if gdd_base is None else ("degC day",))


def variable_long_names(gdd_base: float | None = 5.0) -> tuple[str, ...]:
    """Long names of the kernel's output columns."""
    extra = () if gdd_base is None else (f"growing degree days above {float(gdd_base):g} degC (from monthly means)",)
    return BIO_LONG_NAMES + extra


def quarter_sums(monthly: np.ndarray, *, wrap: bool = True) -> np.ndarray:
    """Sums over every run of three consecutive months (months on the last axis).

    Parameters
    ----------
    monthly : ndarray, shape (..., 12)
    wrap : bool, default=True
        True gives 12 windows starting January ... December, the last two wrapping round
        the year end (NDJ, DJF), as for a climatological year. False gives the 10 windows
        that stay inside January-December (JFM ... OND).

    Returns
    -------
    ndarray, shape (..., 12) or (..., 10)
        Window ``k`` covers months ``k, k+1, k+2`` (0 = January).

    References
    ----------
    O'Donnell, M.S. & Ignizio, D.A. (2012) USGS Data Series 691, "Definition of Quarterly
    Indices": a quarter is any three consecutive months, not a calendar quarter.
    """
    sums = monthly + np.roll(monthly, -1, axis=-1) + np.roll(monthly, -2, axis=-1)
    return sums if wrap else sums[..., :10]


def _as_monthly(name, values):
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 0 or arr.shape[-1] != 12:
        raise InputError(f"{name}: expected 12 months on the last axis, got shape {arr.shape}")
    return arr


def _take(values, index):
    return np.take_along_axis(values, index[..., None], axis=-1)[..., 0]


def bioclim_kernel(
    tmin,
    tmax,
    prec,
    tmean=None,
    *,
    wrap: bool = True,
    ddof: int = 0,
    cv_plus_one: bool = False,
    gdd_base: float | None = 5.0,
) -> np.ndarray:
    """BIO1-BIO19 (and growing degree days) from 12 monthly values per cell.

    Parameters
    ----------
    tmin, tmax : array_like, shape (..., 12)
        Monthly mean daily minimum and maximum temperature, °C, January first.
    prec : array_like, shape (..., 12)
        Monthly total precipitation, mm.
    tmean : array_like, shape (..., 12), optional
        Monthly mean temperature, °C. Default ``(tmin + tmax) / 2`` (DS 691, CONFIRMED).
        When given it is used wherever a mean temperature enters (BIO1, BIO4, BIO8-BIO11,
        quarter choice for BIO18/BIO19, GDD); BIO2, BIO5-BIO7 still use tmin/tmax.
    wrap : bool, default=True
        Quarters are rolling three-month windows (CONFIRMED); True lets them wrap round the
        year end (NDJ, DJF), standard for a climatological year (MEMORY for DS 691).
    ddof : {0, 1}, default=0
        Delta degrees of freedom of the standard deviations in BIO4 and BIO15: 0 treats the
        12 months as the whole population. DS 691's choice is NOT confirmed.
    cv_plus_one : bool, default=False
        Compute BIO15 on ``prec + 1`` (a guard some implementations use for dry cells; MEMORY,
        not in DS 691's stated definition, hence off by default).
    gdd_base : float or None, default=5.0
        Base temperature (°C) of growing degree days; None leaves the GDD column out.

    Returns
    -------
    ndarray, shape (..., 19) or (..., 20), float64
        Columns in the order of :func:`variable_names`. A cell with any missing (NaN) month
        in any input gives NaN throughout; BIO3 is NaN where BIO7 is 0 and BIO15 where mean
        precipitation is 0 (undefined ratios). Ties between quarters pick the earliest
        starting month.

    Notes
    -----
    - BIO4 = 100 x SD of the 12 monthly means; BIO15 = 100 x SD(P) / mean(P) (DS 691).
    - Quarterly temperature is the mean of three monthly means; quarterly precipitation
      the sum of three monthly totals. BIO8/9/18/19 pick the quarter by one variable and
      report the other for the same quarter.
    - Growing degree days from monthly means: ``sum_m max(Tmean_m - base, 0) * days_m``
      with a 365-day year. This common approximation ignores days above the base inside a
      month whose mean is below it, so it underestimates GDD near the base (common practice,
      no single source).

    References
    ----------
    O'Donnell, M.S. & Ignizio, D.A. (2012) Bioclimatic predictors for supporting ecological
    applications in the conterminous United States. U.S. Geological Survey Data Series 691.

    Examples
    --------
    >>> tmin = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8.0])
    >>> tmax = tmin + [8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8]
    >>> prec = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110.0])
    >>> round(float(bioclim_kernel(tmin, tmax, prec)[0]), 6)
    6.166667
    """
    if ddof not in (0, 1):
        raise InputError(f"ddof must be 0 or 1, got {ddof!r}")
    tmin = _as_monthly("tmin", tmin)
    tmax = _as_monthly("tmax", tmax)
    prec = _as_monthly("prec", prec)
    arrays = [tmin, tmax, prec]
    if tmean is not None:
        tmean = _as_monthly("tmean", tmean)
        arrays.append(tmean)
    shapes = {a.shape for a in arrays}
    if len(shapes) != 1:
        raise InputError(f"tmin, tmax, prec{', tmean' if tmean is not None else ''} differ in shape: {sorted(shapes)}")
    lead = tmin.shape[:-1]

    # A partial year would bias every sum and extreme, so any NaN month blanks the cell;
    # NaN cells are zeroed while computing so argmax never lands on a NaN.
    valid = np.all([np.isfinite(a).all(axis=-1) for a in arrays], axis=0)
    tmin, tmax, prec = (np.where(valid[..., None], a, 0.0) for a in (tmin, tmax, prec))
    # DS 691: each monthly mean temperature is the mean of that month's max and min.
    tavg = (tmin + tmax) / 2.0 if tmean is None else np.where(valid[..., None], tmean, 0.0)

    n_out = 19 + (gdd_base is not None)
    out = np.empty(lead + (n_out,), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out[..., 0] = tavg.mean(axis=-1)                                   # BIO1
        out[..., 1] = (tmax - tmin).mean(axis=-1)                          # BIO2
        out[..., 4] = tmax.max(axis=-1)                                    # BIO5
        out[..., 5] = tmin.min(axis=-1)                                    # BIO6
        out[..., 6] = out[..., 4] - out[..., 5]                            # BIO7
        bio7 = out[..., 6]
        out[..., 2] = np.where(bio7 != 0, 100.0 * out[..., 1] / bio7, np.nan)   # BIO3
        out[..., 3] = 100.0 * tavg.std(axis=-1, ddof=ddof)                 # BIO4

        # Quarters: mean temperature and total precipitation of each 3-month window.
        q_temp = quarter_sums(tavg, wrap=wrap) / 3.0
        q_prec = quarter_sums(prec, wrap=wrap)
        wettest, driest = q_prec.argmax(axis=-1), q_prec.argmin(axis=-1)
        warmest, coldest = q_temp.argmax(axis=-1), q_temp.argmin(axis=-1)
        out[..., 7] = _take(q_temp, wettest)                               # BIO8
        out[..., 8] = _take(q_temp, driest)                                # BIO9
        out[..., 9] = _take(q_temp, warmest)                               # BIO10
        out[..., 10] = _take(q_temp, coldest)                              # BIO11

        out[..., 11] = prec.sum(axis=-1)                                   # BIO12
        out[..., 12] = prec.max(axis=-1)                                   # BIO13
        out[..., 13] = prec.min(axis=-1)                                   # BIO14
        p_cv = prec + 1.0 if cv_plus_one else prec
        p_mean = p_cv.mean(axis=-1)
        out[..., 14] = np.where(p_mean != 0, 100.0 * p_cv.std(axis=-1, ddof=ddof) / p_mean, np.nan)  # BIO15
        out[..., 15] = _take(q_prec, wettest)                              # BIO16
        out[..., 16] = _take(q_prec, driest)                               # BIO17
        out[..., 17] = _take(q_prec, warmest)                              # BIO18
        out[..., 18] = _take(q_prec, coldest)                              # BIO19

        if gdd_base is not None:
            # Growing degree days from monthly means (see Notes).
            out[..., 19] = (np.maximum(tavg - float(gdd_base), 0.0) * DAYS_IN_MONTH).sum(axis=-1)

    out[~valid] = np.nan
    return out
