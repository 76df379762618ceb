"""The 19 bioclimatic variables (BIO1-BIO19) and growing degree days from 12 monthly values."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError
from envelope.kernels.rowwise import mean_rows, std_rows, sum_rows

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
    """Sums over every run of three consecutive months (months on the first axis).

    Parameters
    ----------
    monthly : ndarray, shape (12, ...)
    wrap : bool, default=True
        True gives 12 windows starting January ... December, the last two wrapping round
        the year end (NDJ, DJF), as for a climatological year. False gives the 10 windows
        that stay inside January-December (JFM ... OND).

    Returns
    -------
    ndarray, shape (12, ...) or (10, ...)
        Window ``k`` covers months ``k, k+1, k+2`` (0 = January), added in that order.

    References
    ----------
    O'Donnell, M.S. & Ignizio, D.A. (2012) USGS Data Series 691, "Definition of Quarterly
    Indices": a quarter is any three consecutive months, not a calendar quarter.
    """
    monthly = np.asarray(monthly)
    if not wrap:
        sums = monthly[:10] + monthly[1:11]
        sums += monthly[2:12]
        return sums
    sums = np.empty_like(monthly)
    np.add(monthly[:11], monthly[1:], out=sums[:11])
    sums[11] = monthly[11] + monthly[0]
    sums[:10] += monthly[2:]
    sums[10] += monthly[0]
    sums[11] += monthly[1]
    return sums


def _as_monthly(name, values):
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 0 or arr.shape[0] != 12:
        raise InputError(f"{name}: expected 12 months on the first axis, got shape {arr.shape}")
    return arr


def _choose_quarter(key, other, *, largest: bool):
    """The extreme window of ``key`` (windows first) and the value of ``other`` in it.

    Windows are walked January first and a later window must be strictly more extreme, so
    ties keep the earliest start, as ``argmax``/``argmin`` do; both values are taken from
    that window (bit for bit what indexing at the ``argmax`` gives).
    """
    best, at = key[0], other[0]
    for k in range(1, key.shape[0]):
        better = key[k] > best if largest else key[k] < best
        best = np.where(better, key[k], best)
        at = np.where(better, other[k], at)
    return best, at


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
    """BIO1-BIO19 (and growing degree days) from 12 monthly values per cell, months first.

    The month axis comes first, as a (month, y, x) stack is read: every step works on
    whole months of cells at a time, so a C-ordered block is used without reordering.

    Parameters
    ----------
    tmin, tmax : array_like, shape (12, ...)
        Monthly mean daily minimum and maximum temperature, °C, January first.
    prec : array_like, shape (12, ...)
        Monthly total precipitation, mm.
    tmean : array_like, shape (12, ...), optional
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
        Base temperature (°C) of growing degree days; None leaves the GDD row out.

    Returns
    -------
    ndarray, shape (19, ...) or (20, ...), float64
        Rows in the order of :func:`variable_names`. A cell with any missing (NaN) month
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
    - Sums, means and SDs over the months are those of :mod:`envelope.kernels.rowwise`: the
      same bits as NumPy's along a month-last axis. Maxima and minima are exact; only where
      the extreme is a zero present with both signs (+0.0 and -0.0 in one cell's months) may
      its sign differ from NumPy's vectorised month-last ``max``, which itself picks the
      sign by memory layout.

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
    named = {"tmin": tmin, "tmax": tmax, "prec": prec, **({} if tmean is None else {"tmean": tmean})}
    arrays = [_as_monthly(name, values) for name, values in named.items()]
    shapes = {a.shape for a in arrays}
    if len(shapes) != 1:
        raise InputError(f"{', '.join(named)} differ in shape: {sorted(shapes)}")
    lead = arrays[0].shape[1:]
    # one row of cells per month (a view of a C-ordered block)
    arrays = [a.reshape(12, -1) for a in arrays]
    tmin, tmax, prec = arrays[:3]
    tmean = arrays[3] if tmean is not None else None

    # A partial year would bias every sum and extreme, so any NaN month blanks the cell.
    # Such cells are computed like the others (their NaN only reaches their own results,
    # and every comparison with NaN is false) and overwritten at the end.
    valid = np.logical_and.reduce([np.isfinite(a).all(axis=0) for a in arrays])
    # DS 691: each monthly mean temperature is the mean of that month's max and min.
    tavg = (tmin + tmax) / 2.0 if tmean is None else tmean

    n_out = 19 + (gdd_base is not None)
    out = np.empty((n_out, tmin.shape[1]), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out[0] = mean_rows(tavg)                                           # BIO1
        out[1] = mean_rows(tmax - tmin)                                    # BIO2
        np.max(tmax, axis=0, out=out[4])                                   # BIO5
        np.min(tmin, axis=0, out=out[5])                                   # BIO6
        np.subtract(out[4], out[5], out=out[6])                            # BIO7
        bio7 = out[6]
        out[2] = np.where(bio7 != 0, 100.0 * out[1] / bio7, np.nan)        # BIO3
        out[3] = 100.0 * std_rows(tavg, ddof)                              # BIO4

        # Quarters: mean temperature and total precipitation of each 3-month window.
        q_temp = quarter_sums(tavg, wrap=wrap) / 3.0
        q_prec = quarter_sums(prec, wrap=wrap)
        out[15], out[7] = _choose_quarter(q_prec, q_temp, largest=True)    # BIO16, BIO8
        out[16], out[8] = _choose_quarter(q_prec, q_temp, largest=False)   # BIO17, BIO9
        out[9], out[17] = _choose_quarter(q_temp, q_prec, largest=True)    # BIO10, BIO18
        out[10], out[18] = _choose_quarter(q_temp, q_prec, largest=False)  # BIO11, BIO19

        out[11] = sum_rows(prec)                                           # BIO12
        np.max(prec, axis=0, out=out[12])                                  # BIO13
        np.min(prec, axis=0, out=out[13])                                  # BIO14
        p_cv = prec + 1.0 if cv_plus_one else prec
        p_mean = mean_rows(p_cv)
        out[14] = np.where(p_mean != 0, 100.0 * std_rows(p_cv, ddof) / p_mean, np.nan)  # BIO15

        if gdd_base is not None:
            # Growing degree days from monthly means (see Notes).
            degrees = np.maximum(tavg - float(gdd_base), 0.0)
            degrees *= DAYS_IN_MONTH[:, None]
            out[19] = sum_rows(degrees)

    out[:, ~valid] = np.nan
    return out.reshape((n_out,) + lead)
