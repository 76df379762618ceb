"""Asymptotic spread speed of integrodifference models from the kernel's moment-generating function."""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy import optimize, special

from envelope.errors import InputError
from envelope.kernels.dispersal import kernel_parameters

__all__ = [
    "SpreadSpeed",
    "marginal_mgf",
    "linear_spread_speed",
    "colonisation_spread_speed",
    "lattice_spread_speed",
]


class SpreadSpeed(NamedTuple):
    """Result of a spread-speed calculation.

    Attributes
    ----------
    speed : float
        c* in km (or the kernel's distance unit) per step; ``math.inf`` when accelerating.
    regime : str
        "finite", or "accelerating" for fat-tailed kernels without a moment-generating function.
    wave_number : float
        The minimising s* (1/km); ``nan`` when accelerating.
    """

    speed: float
    regime: str
    wave_number: float


_ACCELERATING = SpreadSpeed(math.inf, "accelerating", math.nan)


def marginal_mgf(kind, s, mean_km, shape=None):
    """Moment-generating function M(s) = E[exp(s X)] of the kernel's 1-D marginal.

    Gaussian (per-axis SD sigma = a/sqrt 2): exp(sigma^2 s^2 / 2). 2-D negative exponential
    (scale a): (1 - a^2 s^2)^(-3/2) for |s| < 1/a, inf beyond. 2Dt: inf for every s != 0
    (algebraic tail, no MGF).

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    s : array_like
        Wave number(s), 1/km.
    mean_km : float
    shape : float, optional

    References
    ----------
    Kot, M., Lewis, M.A. & van den Driessche, P. (1996) Dispersal data and the spread of
    invading organisms. Ecology 77: 2027-2042. REFERENCES item 8 (2-D exponential marginal,
    verified by a double integral).
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    s = np.asarray(s, dtype=float)
    if kind == "gaussian":
        return np.exp(a * a * s * s / 4.0)
    if kind == "exponential":
        x = (a * s) ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(x < 1.0, (1.0 - x) ** -1.5, np.inf)
    return np.where(s == 0, 1.0, np.inf)


def _minimise(log_growth, s_hi):
    """min over 0 < s < s_hi of log_growth(s)/s, searched in log s (the ratio is unimodal)."""
    def objective(u):
        s = math.exp(u)
        return log_growth(s) / s

    lo, hi = math.log(s_hi) - 40.0, math.log(s_hi)
    res = optimize.minimize_scalar(objective, bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12, "maxiter": 1000})
    s_star = math.exp(res.x)
    if hi - res.x < 1e-6:
        raise InputError("spread speed minimisation hit its upper bound; the kernel's MGF diverges too early")
    return SpreadSpeed(float(res.fun), "finite", s_star)


def _upper_bound(kind, a, log_r0):
    # Exponential: M exists for s < 1/a. Gaussian: s* = sqrt(2 ln R0)/sigma for the IDE;
    # the bound is well above it for any R0 reached here.
    if kind == "exponential":
        return (1.0 - 1e-12) / a
    sigma = a / math.sqrt(2.0)
    return (math.sqrt(2.0 * max(log_r0, 1e-12)) + 20.0) / sigma


def linear_spread_speed(kind, growth_R0, mean_km, shape=None):
    """Asymptotic spread speed c* = min_{s>0} (1/s) ln(R0 M(s)) of an integrodifference model.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    growth_R0 : float
        Net growth factor per step at low density, > 1.
    mean_km : float
        Mean dispersal distance of the 2-D kernel (km); its 1-D marginal's MGF is used.
    shape : float, optional
        2Dt shape.

    Returns
    -------
    SpreadSpeed
        (speed km/step, "finite" | "accelerating", s*). The 2Dt kernel has no MGF, so there
        is no finite speed: (inf, "accelerating", nan).

    References
    ----------
    Kot, M., Lewis, M.A. & van den Driessche, P. (1996) Ecology 77: 2027-2042.
    Weinberger, H.F. (1982) Long-time behavior of a class of biological models. SIAM J.
    Math. Anal. 13: 353-396.

    Examples
    --------
    >>> round(linear_spread_speed("gaussian", math.e, math.sqrt(math.pi / 2)).speed, 7)  # sigma = 1
    1.4142136
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    r0 = float(growth_R0)
    if not (math.isfinite(r0) and r0 > 1.0):
        raise InputError(f"growth_R0 must be > 1 for the population to spread, got {growth_R0!r}")
    if kind == "2dt":
        return _ACCELERATING
    log_r0 = math.log(r0)
    if kind == "gaussian":
        return _minimise(lambda s: log_r0 + a * a * s * s / 4.0, _upper_bound(kind, a, log_r0))
    return _minimise(lambda s: log_r0 - 1.5 * math.log1p(-(a * s) ** 2), _upper_bound(kind, a, log_r0))


def colonisation_spread_speed(kind, rate, mean_km, shape=None):
    """Spread speed of the colonisation model of :class:`envelope.kernels.spread.SpreadOperator`.

    At low occupancy in suitable habitat (h = s = 1) the step p' = p + (1 - p)(1 - exp(-R k*p))
    linearises to p' = p + R (k * p) = (delta + R k) * p, an integrodifference model with
    growth factor R0 = 1 + R and kernel (delta + R k)/(1 + R). Its MGF gives
    R0 M_eff(s) = 1 + R M(s), so c* = min_{s>0} (1/s) ln(1 + R M(s)). The step map is
    monotone and bounded above by its linearisation, so the speed is linearly determined.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    rate : float
        Colonisation rate R > 0.
    mean_km : float
    shape : float, optional

    Returns
    -------
    SpreadSpeed

    References
    ----------
    Kot et al. (1996); Weinberger (1982), see :func:`linear_spread_speed`.
    Lui, R. (1989) Biological growth and spread modeled by systems of recursions. I.
    Mathematical theory. Math. Biosci. 93: 269-295 (linear determinacy).
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    rate = float(rate)
    if not (math.isfinite(rate) and rate > 0):
        raise InputError(f"rate must be > 0, got {rate!r}")
    if kind == "2dt":
        return _ACCELERATING
    log_r = math.log(rate)
    if kind == "gaussian":
        log_m = lambda s: a * a * s * s / 4.0  # noqa: E731
    else:
        log_m = lambda s: -1.5 * math.log1p(-(a * s) ** 2)  # noqa: E731
    # ln(1 + R M) = logaddexp(0, ln R + ln M) without overflow.
    return _minimise(lambda s: float(np.logaddexp(0.0, log_r + log_m(s))),
                     _upper_bound(kind, a, math.log1p(rate)))


def lattice_spread_speed(kernel, cell_km, *, rate=None, growth_R0=None, axis=1):
    """Spread speed along one grid axis for a discretised kernel (the lattice model's own c*).

    The marginal of the weights along ``axis`` (summing the other axis) at offsets
    x_i = (i - h) * cell_km gives M(s) = sum_i w_i exp(s x_i); then c* is as in
    :func:`colonisation_spread_speed` (``rate``) or :func:`linear_spread_speed` (``growth_R0``).
    This is the exact asymptotic speed of a plane front along that axis on the grid.

    Parameters
    ----------
    kernel : ndarray, shape (2*hy + 1, 2*hx + 1)
        Discretised kernel, summing to 1.
    cell_km : float
        Cell size along ``axis``.
    rate, growth_R0 : float
        Exactly one of them.
    axis : {0, 1}, default=1
        1 = along columns (x), 0 = along rows (y).

    Returns
    -------
    SpreadSpeed

    References
    ----------
    Weinberger (1982) (lattice and continuous habitats); Kot et al. (1996).
    """
    if (rate is None) == (growth_R0 is None):
        raise InputError("give exactly one of rate (colonisation model) or growth_R0 (integrodifference model)")
    k = np.asarray(kernel, dtype=float)
    w = k.sum(axis=1 - axis)
    h = w.size // 2
    x = (np.arange(w.size) - h) * float(cell_km)
    keep = w > 0
    log_w, x = np.log(w[keep]), x[keep]
    if x.max() <= 0:
        raise InputError("the kernel puts no weight ahead of the source; no spread along this axis")

    def log_m(s):
        return float(special.logsumexp(log_w + s * x))

    if rate is not None:
        rate = float(rate)
        if not (math.isfinite(rate) and rate > 0):
            raise InputError(f"rate must be > 0, got {rate!r}")
        fn = lambda s: float(np.logaddexp(0.0, math.log(rate) + log_m(s)))  # noqa: E731
    else:
        r0 = float(growth_R0)
        if not (math.isfinite(r0) and r0 > 1.0):
            raise InputError(f"growth_R0 must be > 1 for the population to spread, got {growth_R0!r}")
        fn = lambda s: math.log(r0) + log_m(s)  # noqa: E731
    # Speed tends to max(x) as s -> inf; a bound of 60 / (marginal SD) is far past s*.
    sd = math.sqrt(float(np.sum(np.exp(log_w) * x * x)))
    return _minimise(fn, 60.0 / sd)
