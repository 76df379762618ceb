"""Radially symmetric 2-D dispersal kernels, parameterised by mean dispersal distance, and their grid discretisation."""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate, special

from envelope.errors import InputError

__all__ = [
    "KERNEL_KINDS",
    "kernel_scale",
    "kernel_mean",
    "kernel_density",
    "kernel_survival",
    "truncation_radius_km",
    "rectangle_tail_mass",
    "sample_distances",
    "integrate_cells",
    "discretise_kernel",
    "cell_size_km",
    "latitude_band_kernels",
]

KERNEL_KINDS = ("exponential", "gaussian", "2dt")

# WGS84 ellipsoid (NIMA TR8350.2, 2000): semi-major axis and first eccentricity squared.
_WGS84_A_M = 6378137.0
_WGS84_F = 1.0 / 298.257223563
_WGS84_E2 = _WGS84_F * (2.0 - _WGS84_F)

# Gauss-Legendre nodes on [0, 1] for the edge integrals of integrate_cells; 16 nodes
# integrate the smooth edge integrands to ~1e-13 relative (checked against dblquad).
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)
_GL_NODES = 0.5 * (_GL_NODES + 1.0)
_GL_WEIGHTS = 0.5 * _GL_WEIGHTS


# --------------------------------------------------------------------------- checks
def _check_kind(kind):
    if kind not in KERNEL_KINDS:
        raise InputError(f"kernel must be one of {', '.join(KERNEL_KINDS)}, got {kind!r}")
    return kind


def _check_mean(mean_km):
    try:
        mean = float(mean_km)
    except (TypeError, ValueError):
        raise InputError(f"mean_distance_km must be a number > 0, got {mean_km!r}") from None
    if not math.isfinite(mean) or mean <= 0:
        raise InputError(f"mean_distance_km must be > 0, got {mean_km!r}")
    return mean


def _check_shape(kind, shape):
    if kind != "2dt":
        if shape is not None:
            raise InputError(f"shape applies only to kernel '2dt', got shape={shape!r} with kernel {kind!r}")
        return None
    if shape is None:
        raise InputError("shape is required with kernel '2dt' (a number > 1.5)")
    try:
        b = float(shape)
    except (TypeError, ValueError):
        raise InputError(f"shape must be a number > 1.5, got {shape!r}") from None
    if not math.isfinite(b) or b <= 1.5:
        raise InputError(
            f"shape must be > 1.5 for the 2Dt kernel (the mean distance is infinite for shape <= 1.5), got {shape!r}"
        )
    return b


def _check_tolerance(tail_tolerance):
    tol = float(tail_tolerance)
    if not (0.0 < tol < 0.1):
        raise InputError(f"tail_tolerance must be in (0, 0.1), got {tail_tolerance!r}")
    return tol


def kernel_parameters(kind, mean_km, shape):
    kind = _check_kind(kind)
    mean = _check_mean(mean_km)
    b = _check_shape(kind, shape)
    return kind, _scale(kind, mean, b), b


# ----------------------------------------------------------------------- closed forms
def _scale(kind, mean, b):
    # Mean distance of each 2-D kernel (Nathan et al. 2012, table; REFERENCES item 7).
    if kind == "exponential":
        return mean / 2.0  # mean = 2a
    if kind == "gaussian":
        return 2.0 * mean / math.sqrt(math.pi)  # mean = a*sqrt(pi)/2
    # 2Dt: mean = a*sqrt(pi)*Gamma(b-3/2) / (2*Gamma(b-1)); gammaln keeps large b finite.
    return 2.0 * mean / (math.sqrt(math.pi) * math.exp(special.gammaln(b - 1.5) - special.gammaln(b - 1.0)))


def kernel_scale(kind, mean_km, shape=None):
    """Scale parameter ``a`` (km) of a kernel with the given mean dispersal distance.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    mean_km : float
        Mean dispersal distance (km), > 0.
    shape : float, optional
        2Dt shape ``b`` (> 1.5 for a finite mean); only for ``kind="2dt"``.

    Returns
    -------
    float
        ``a`` with mean = 2a (exponential), a*sqrt(pi)/2 (Gaussian),
        a*sqrt(pi)*Gamma(b-3/2)/(2*Gamma(b-1)) (2Dt).

    References
    ----------
    Nathan, R., Klein, E., Robledo-Arnuncio, J.J. & Revilla, E. (2012) Dispersal kernels:
    review. In Dispersal Ecology and Evolution, OUP, 187-210.
    Clark, J.S. et al. (1999) Seed dispersal near and far. Ecology 80: 1475-1494.

    Examples
    --------
    >>> kernel_scale("exponential", 6.0)
    3.0
    """
    return kernel_parameters(kind, mean_km, shape)[1]


def kernel_mean(kind, scale_km, shape=None):
    """Mean dispersal distance (km) of a kernel with scale ``a`` (the inverse of :func:`kernel_scale`).

    References
    ----------
    Nathan et al. (2012), see :func:`kernel_scale`.
    """
    kind = _check_kind(kind)
    a = float(scale_km)
    b = _check_shape(kind, shape)
    if kind == "exponential":
        return 2.0 * a
    if kind == "gaussian":
        return a * math.sqrt(math.pi) / 2.0
    return a * math.sqrt(math.pi) * math.exp(special.gammaln(b - 1.5) - special.gammaln(b - 1.0)) / 2.0


def _check_r(r, name="r"):
    r = np.asarray(r, dtype=float)
    if np.any(r < 0):
        raise InputError(f"{name} (distance, km) must be >= 0, got minimum {float(np.min(r))}")
    return r


def _density(kind, r, a, b):
    # 2-D densities per unit area, normalised so that int_0^inf 2 pi r k(r) dr = 1
    # (Nathan et al. 2012; REFERENCES item 7).
    if kind == "exponential":
        return np.exp(-r / a) / (2.0 * math.pi * a * a)
    if kind == "gaussian":
        return np.exp(-((r / a) ** 2)) / (math.pi * a * a)
    return (b - 1.0) / (math.pi * a * a) * (1.0 + (r / a) ** 2) ** (-b)


def _survival(kind, r, a, b):
    # P(distance > r) (REFERENCES item 7).
    x = r / a
    if kind == "exponential":
        return (1.0 + x) * np.exp(-x)
    if kind == "gaussian":
        return np.exp(-x * x)
    return np.exp((1.0 - b) * np.log1p(x * x))


def _cdf(kind, r, a, b):
    # 1 - survival, written to keep precision where it is small (near the source).
    x = r / a
    if kind == "exponential":
        return -np.expm1(-x) - x * np.exp(-x)
    if kind == "gaussian":
        return -np.expm1(-x * x)
    return -np.expm1((1.0 - b) * np.log1p(x * x))


def kernel_density(kind, r, mean_km, shape=None):
    """Dispersal kernel: 2-D probability density per unit area (km^-2) at distance ``r`` km.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    r : array_like
        Distance(s) from the source, km, >= 0.
    mean_km : float
        Mean dispersal distance, km.
    shape : float, optional
        2Dt shape ``b`` > 1.5.

    Returns
    -------
    ndarray
        exp(-r/a)/(2 pi a^2); exp(-r^2/a^2)/(pi a^2); (b-1)/(pi a^2) (1 + r^2/a^2)^-b.

    References
    ----------
    Nathan et al. (2012); Clark et al. (1999), see :func:`kernel_scale`.
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    return _density(kind, _check_r(r), a, b)


def kernel_survival(kind, R, mean_km, shape=None):
    """P(dispersal distance > R): (1 + R/a) e^(-R/a); e^(-R^2/a^2); (1 + R^2/a^2)^(1-b).

    References
    ----------
    Nathan et al. (2012), see :func:`kernel_scale`.
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    return _survival(kind, _check_r(R, "R"), a, b)


def truncation_radius_km(kind, mean_km, shape=None, tail_tolerance=1e-6):
    """Radius (km) beyond which the kernel's tail mass equals ``tail_tolerance``.

    Solves survival(R) = tail_tolerance in closed form: exponential via the Lambert W
    function (R/a = -1 - W_{-1}(-tol/e)), Gaussian R = a sqrt(-ln tol), 2Dt
    R = a sqrt(tol^(1/(1-b)) - 1).

    References
    ----------
    Corless, R.M. et al. (1996) On the Lambert W function. Adv. Comput. Math. 5: 329-359.
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    tol = _check_tolerance(tail_tolerance)
    if kind == "exponential":
        return a * float(-1.0 - special.lambertw(-tol / math.e, k=-1).real)
    if kind == "gaussian":
        return a * math.sqrt(-math.log(tol))
    return a * math.sqrt(math.expm1(math.log(tol) / (1.0 - b)))


def sample_distances(kind, n, rng, mean_km, shape=None):
    """Draw ``n`` dispersal distances (km) from the kernel.

    Radius laws: exponential -> Gamma(shape 2, scale a); Gaussian -> Rayleigh(sigma = a/sqrt 2);
    2Dt -> r = a sqrt(U^(-1/(b-1)) - 1), U ~ Uniform(0, 1) (inverse of the survival function).
    Directions (not returned) are uniform on [0, 2 pi).

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    n : int
    rng : numpy.random.Generator
    mean_km : float
    shape : float, optional

    References
    ----------
    Nathan et al. (2012), see :func:`kernel_scale`; REFERENCES item 7 (sampling hint).
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    if kind == "exponential":
        return rng.gamma(2.0, a, size=n)
    if kind == "gaussian":
        return rng.rayleigh(a / math.sqrt(2.0), size=n)
    u = 1.0 - rng.random(n)  # in (0, 1]: avoids u = 0
    return a * np.sqrt(np.expm1(-np.log(u) / (b - 1.0)))


# ----------------------------------------------------------------- cell integration
def _integrate_rectangles(kind, a, b, x0, x1, y0, y1):
    """Kernel mass in axis-aligned rectangles [x0,x1]x[y0,y1] (km), none with the source on its edge.

    In polar coordinates about the source, the mass of a convex region is
    (1/2 pi) * (contour integral of F(r(theta)) d theta), with F = 1 - survival the radial
    CDF (Green's theorem with the exact inner radial integral). Each of the 4 edges is a
    1-D integral in theta done by Gauss-Legendre quadrature, so the peak of the exponential
    at r = 0 never enters a quadrature node. Where F is near 1 (far cells) we use the
    equivalent form [source inside] - (1/2 pi) * contour integral of S(r) to avoid
    cancellation.
    """
    x0, x1, y0, y1 = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (x0, x1, y0, y1)))
    corners = [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]  # counter-clockwise
    inside = (x0 < 0) & (x1 > 0) & (y0 < 0) & (y1 > 0)
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    use_survival = _survival(kind, np.hypot(cx, cy), a, b) < 0.5
    total = np.zeros(x0.shape)
    t = _GL_NODES.reshape((1,) * x0.ndim + (-1,))
    for k in range(4):
        px, py = corners[k]
        qx, qy = corners[(k + 1) % 4]
        dx, dy = qx - px, qy - py
        cross_pd = px * dy - py * dx
        dtheta = np.arctan2(px * qy - py * qx, px * qx + py * qy)
        theta = np.arctan2(py, px)[..., None] + t * dtheta[..., None]
        # Ray at angle theta meets the edge's line at r = (P x D) / (u x D).
        r = cross_pd[..., None] / (np.cos(theta) * dy[..., None] - np.sin(theta) * dx[..., None])
        r = np.abs(r)
        s = _survival(kind, r, a, b)
        f = _cdf(kind, r, a, b)
        vals = np.where(use_survival[..., None], s, f)
        total += dtheta * (vals @ _GL_WEIGHTS)
    mass = np.where(use_survival, inside.astype(float) - total / (2 * math.pi), total / (2 * math.pi))
    return np.clip(mass, 0.0, 1.0)


def integrate_cells(kind, mean_km, shape=None, *, x0, x1, y0, y1):
    """Kernel mass (probability) falling in rectangles [x0, x1] x [y0, y1] (km, source at 0, 0).

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    mean_km : float
    shape : float, optional
    x0, x1, y0, y1 : array_like
        Rectangle bounds in km relative to the source (broadcast together); the source
        must not lie on a rectangle's edge.

    Returns
    -------
    ndarray
        The integral of :func:`kernel_density` over each rectangle, to ~1e-13.

    References
    ----------
    Polar reduction of the area integral of a radial density; Gauss-Legendre quadrature
    (Davis, P.J. & Rabinowitz, P. (1984) Methods of Numerical Integration, 2nd ed.).
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    return _integrate_rectangles(kind, a, b, x0, x1, y0, y1)


def discretise_kernel(kind, mean_km, shape=None, *, cell_dx_km, cell_dy_km, tail_tolerance=1e-6,
                      max_radius_cells=None, normalise=True, support_cells=None, return_tail_mass=False):
    """Discretise a dispersal kernel onto grid cells by integrating it over each cell.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    mean_km : float
        Mean dispersal distance, km.
    shape : float, optional
        2Dt shape ``b`` > 1.5.
    cell_dx_km, cell_dy_km : float
        Cell width (E-W, columns) and height (N-S, rows) in km; may differ.
    tail_tolerance : float, default=1e-6
        The kernel is truncated at the radius R where the analytic tail mass P(r > R)
        equals this value (:func:`truncation_radius_km`); cells lying wholly beyond R get 0.
        The default leaves at most one propagule in a million unaccounted for before
        renormalisation. Must lie in (0, 0.1).
    max_radius_cells : int, optional
        Cap on the half-width in cells along each axis (a memory guard for fat tails or
        fine grids); the truncation radius is then reduced so that the support stays a disc.
    normalise : bool, default=True
        Divide by the captured mass so the weights sum to 1 (the truncated tail mass is
        redistributed proportionally).
    support_cells : (int, int), optional
        (largest half-height, largest half-width) in cells: a per-axis cap on the support
        that, unlike ``max_radius_cells``, leaves the disc alone (the support is the disc
        clipped to the rectangle). ``(ny - 1, nx - 1)`` caps it at the domain: no two cells
        of an ny x nx grid are farther apart, so a kernel clipped there is exact on that grid
        apart from the mass it sends beyond the grid from every cell.
    return_tail_mass : bool, default=False
        Also return the analytic kernel mass beyond the support actually used (outside the
        kept cells, before any renormalisation).

    Returns
    -------
    ndarray, shape (2*hy + 1, 2*hx + 1), float64
        Weights with the source cell at the centre; rows are the y (row) axis.
    float
        Only with ``return_tail_mass``: the truncated tail mass, :func:`rectangle_tail_mass`
        of the kept rectangle plus the mass of the cells zeroed inside it.

    References
    ----------
    Nathan et al. (2012) for the kernels; see :func:`integrate_cells` for the quadrature.

    Examples
    --------
    >>> w = discretise_kernel("gaussian", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    >>> w.shape, round(float(w.sum()), 12)
    ((17, 17), 1.0)
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    tol = _check_tolerance(tail_tolerance)
    dx, dy = float(cell_dx_km), float(cell_dy_km)
    for name, v in (("cell_dx_km", dx), ("cell_dy_km", dy)):
        if not math.isfinite(v) or v <= 0:
            raise InputError(f"{name} must be > 0, got {v!r}")
    radius = truncation_radius_km(kind, mean_km, shape, tol)
    # Smallest half-width h with (h + 1/2) * cell >= radius.
    hx = max(0, math.ceil(radius / dx - 0.5))
    hy = max(0, math.ceil(radius / dy - 0.5))
    if max_radius_cells is not None:
        cap = int(max_radius_cells)
        if cap < 0:
            raise InputError(f"max_radius_cells must be >= 0, got {max_radius_cells!r}")
        if hx > cap or hy > cap:
            hx, hy = min(hx, cap), min(hy, cap)
            radius = min(radius, (hx + 0.5) * dx, (hy + 0.5) * dy)
    if support_cells is not None:
        cap_y, cap_x = (int(v) for v in support_cells)
        if cap_y < 0 or cap_x < 0:
            raise InputError(f"support_cells must be two sizes >= 0, got {support_cells!r}")
        hx, hy = min(hx, cap_x), min(hy, cap_y)
    if (hx + 1) * (hy + 1) > 50_000_000:
        raise InputError(
            f"dispersal kernel would span {2 * hx + 1} x {2 * hy + 1} cells; "
            "raise tail_tolerance or set max_radius_cells"
        )
    # One quadrant (the kernel is symmetric in x and y), row blocks to bound memory.
    quadrant = np.zeros((hy + 1, hx + 1))
    i = np.arange(hx + 1)
    rows_per_block = max(1, 2_000_000 // (64 * (hx + 1)))
    for j0 in range(0, hy + 1, rows_per_block):
        j = np.arange(j0, min(hy + 1, j0 + rows_per_block))[:, None]
        quadrant[j0:j0 + j.shape[0]] = _integrate_rectangles(
            kind, a, b, (i - 0.5) * dx, (i + 0.5) * dx, (j - 0.5) * dy, (j + 0.5) * dy)
    # Zero the cells lying wholly beyond the truncation radius (nearest point > radius).
    near = np.hypot(np.maximum(i - 0.5, 0.0) * dx, np.maximum(np.arange(hy + 1) - 0.5, 0.0)[:, None] * dy)
    beyond = near > radius
    if return_tail_mass:
        # Each quadrant cell off an axis stands for 4 cells, on one axis for 2, the source for 1.
        copies = (np.where(np.arange(hy + 1) == 0, 1, 2)[:, None] * np.where(i == 0, 1, 2)[None, :])
        tail = _rectangle_tail(kind, a, b, (hx + 0.5) * dx, (hy + 0.5) * dy) + float(
            np.sum(quadrant[beyond] * copies[beyond]))
    quadrant[beyond] = 0.0
    top = np.concatenate([quadrant[:0:-1], quadrant], axis=0)
    weights = np.concatenate([top[:, :0:-1], top], axis=1)
    if normalise:
        weights /= weights.sum()
    return (weights, tail) if return_tail_mass else weights


def _rectangle_tail(kind, a, b, half_x, half_y):
    # P(|X| > half_x or |Y| > half_y) = (2/pi) int_0^{pi/2} S(rho(theta)) d theta, rho the distance
    # from the centre to the rectangle's edge in direction theta (polar form, as in
    # _integrate_rectangles); split where rho switches from the vertical to the horizontal edge.
    corner = math.atan2(half_y, half_x)
    opts = {"epsabs": 0.0, "epsrel": 1e-10, "limit": 200}
    right, _ = integrate.quad(lambda t: float(_survival(kind, half_x / math.cos(t), a, b)), 0.0, corner, **opts)
    top, _ = integrate.quad(lambda t: float(_survival(kind, half_y / math.sin(t), a, b)), corner,
                            0.5 * math.pi, **opts)
    return min(1.0, max(0.0, 2.0 / math.pi * (right + top)))


def rectangle_tail_mass(kind, mean_km, shape=None, *, half_width_km, half_height_km):
    """Kernel mass outside the source-centred rectangle [-W, W] x [-H, H] (km).

    The polar form of the mass of a region containing the source, (1/2 pi) times the contour
    integral of the survival function P(distance > r(theta)), by adaptive quadrature
    (``scipy.integrate.quad``, relative accuracy 1e-10) on the two pieces of the quarter turn.

    Parameters
    ----------
    kind : {"exponential", "gaussian", "2dt"}
    mean_km : float
    shape : float, optional
    half_width_km, half_height_km : float
        W and H, > 0.

    Returns
    -------
    float
        P(|x| > W or |y| > H) for a displacement (x, y) drawn from the kernel.

    References
    ----------
    Nathan et al. (2012), see :func:`kernel_scale`; for the Gaussian the value is
    1 - erf(W/a) erf(H/a) (independent axes with SD a/sqrt 2).
    """
    kind, a, b = kernel_parameters(kind, mean_km, shape)
    w, h = float(half_width_km), float(half_height_km)
    for name, v in (("half_width_km", w), ("half_height_km", h)):
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"{name} must be > 0, got {v!r}")
    return _rectangle_tail(kind, a, b, w, h)


# ------------------------------------------------------------------ geographic grids
def cell_size_km(lat_deg, dlon_deg, dlat_deg):
    """E-W and N-S size (km) of a geographic cell centred at ``lat_deg`` on the WGS84 ellipsoid.

    dx = N(phi) cos(phi) dlon, dy = M(phi) dlat (angles in radians), with the
    prime-vertical radius N = a / sqrt(1 - e^2 sin^2 phi) and the meridional radius
    M = a (1 - e^2) / (1 - e^2 sin^2 phi)^(3/2).

    Returns
    -------
    (ndarray, ndarray)
        dx_km, dy_km, same shape as ``lat_deg``.

    References
    ----------
    NIMA TR8350.2 (2000) Department of Defense World Geodetic System 1984, 3rd ed.
    Torge, W. & Mueller, J. (2012) Geodesy, 4th ed., de Gruyter, section 4.1.
    """
    phi = np.radians(np.asarray(lat_deg, dtype=float))
    w2 = 1.0 - _WGS84_E2 * np.sin(phi) ** 2
    n = _WGS84_A_M / np.sqrt(w2)
    m = _WGS84_A_M * (1.0 - _WGS84_E2) / w2 ** 1.5
    return n * np.cos(phi) * math.radians(dlon_deg) / 1000.0, m * math.radians(dlat_deg) / 1000.0


def latitude_band_kernels(kind, mean_km, shape=None, *, lat_centres_deg, dlon_deg, dlat_deg,
                          band_tolerance=0.05, tail_tolerance=1e-6, max_radius_cells=None, normalise=True,
                          support_cells=None, return_tail_mass=False):
    """One discretised kernel per band of grid rows on a geographic (longitude/latitude) grid.

    Rows are grouped, in order, into bands within which the E-W cell size varies by less
    than ``band_tolerance`` (max/min - 1); each band's kernel is discretised with the cell
    sizes (:func:`cell_size_km`) at the band's central latitude (the mean of its first and
    last row-centre latitudes), so within a band the kernel's E-W scale is wrong by less
    than about ``band_tolerance``/2 relative.

    Parameters
    ----------
    kind, mean_km, shape : see :func:`discretise_kernel`.
    lat_centres_deg : array_like, shape (ny,)
        Latitude of each row's cell centres (either order), strictly inside (-90, 90).
    dlon_deg, dlat_deg : float
        Cell width and height in degrees.
    band_tolerance : float, default=0.05
    tail_tolerance, max_radius_cells, normalise, support_cells : see :func:`discretise_kernel`.
    return_tail_mass : bool, default=False
        Also return each band's truncated tail mass (see :func:`discretise_kernel`).

    Returns
    -------
    list of (int, int, ndarray)
        (row_start, row_stop, kernel) covering rows 0..ny contiguously.
    list of float
        Only with ``return_tail_mass``: the tail mass of each band's kernel, in band order.

    References
    ----------
    NIMA TR8350.2 (2000) for the WGS84 radii of curvature.
    """
    lats = np.asarray(lat_centres_deg, dtype=float).ravel()
    if lats.size == 0 or not np.all(np.isfinite(lats)) or np.any(np.abs(lats) >= 90):
        raise InputError("lat_centres_deg must be finite latitudes strictly between -90 and 90")
    for name, v in (("dlon_deg", dlon_deg), ("dlat_deg", dlat_deg)):
        if not (math.isfinite(float(v)) and float(v) > 0):
            raise InputError(f"{name} must be > 0, got {v!r}")
    if not (0.0 < float(band_tolerance) < 1.0):
        raise InputError(f"band_tolerance must be in (0, 1), got {band_tolerance!r}")
    dx, _ = cell_size_km(lats, dlon_deg, dlat_deg)
    bands = []
    start, lo, hi = 0, dx[0], dx[0]
    for row in range(1, lats.size):
        lo2, hi2 = min(lo, dx[row]), max(hi, dx[row])
        if hi2 / lo2 - 1.0 < band_tolerance:
            lo, hi = lo2, hi2
            continue
        bands.append((start, row))
        start, lo, hi = row, dx[row], dx[row]
    bands.append((start, lats.size))
    out, tails = [], []
    for r0, r1 in bands:
        mid = 0.5 * (lats[r0] + lats[r1 - 1])
        bdx, bdy = cell_size_km(mid, dlon_deg, dlat_deg)
        kernel, tail = discretise_kernel(kind, mean_km, shape, cell_dx_km=float(bdx), cell_dy_km=float(bdy),
                                         tail_tolerance=tail_tolerance, max_radius_cells=max_radius_cells,
                                         normalise=normalise, support_cells=support_cells, return_tail_mass=True)
        out.append((r0, r1, kernel))
        tails.append(tail)
    return (out, tails) if return_tail_mass else out
