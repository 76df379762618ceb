"""Range-change kernels: change classes, area-weighted mean position, weighted quantiles, meridian arcs."""

from __future__ import annotations

import numpy as np
import scipy.special

from envelope.errors import InputError

__all__ = [
    "CHANGE_CLASSES",
    "CHANGE_NODATA",
    "WGS84_A",
    "WGS84_INVERSE_FLATTENING",
    "check_threshold",
    "classify_change",
    "class_sums",
    "normal_vectors",
    "normal_vector_sums",
    "position_from_vector",
    "weighted_quantile",
    "LATITUDE_BINS",
    "latitude_bin",
    "quantile_bin",
    "quantile_in_bin",
    "meridian_distance_m",
    "meridian_arc_km",
]

#: Range-change classes (uint8 codes) and their meanings, stored in the raster's metadata.
CHANGE_CLASSES = {
    0: "absent",        # suitable neither now nor in the future
    1: "lost",          # suitable now, not in the future
    2: "stable",        # suitable now and in the future
    3: "gained",        # newly suitable, climate within the reference range (MESS >= 0 or no MESS)
    4: "gained_novel",  # newly suitable where the future climate is novel (MESS < 0)
    5: "stable_novel",  # suitable now and in the future, but the future climate is novel (MESS < 0)
}
#: Code of cells where either suitability map has no value.
CHANGE_NODATA = 255

# WGS84 defining constants (NIMA TR8350.2, 2000; /work/shared/REFERENCES.md section 6).
WGS84_A = 6_378_137.0
WGS84_INVERSE_FLATTENING = 298.257223563


def check_threshold(threshold, *, source: str = "threshold") -> float:
    """Return ``threshold`` as a float after checking it is a finite number in [0, 1].

    ``source`` names where the value came from (an option or a file's tag) for the message.
    """
    try:
        value = float(threshold)
    except (TypeError, ValueError):
        raise InputError(f"{source}: found {threshold!r}; expected a number between 0 and 1") from None
    if not np.isfinite(value) or not 0.0 <= value <= 1.0:
        raise InputError(f"{source}: found {value!r}; expected a number between 0 and 1")
    return value


def classify_change(now, future, threshold: float, mess=None) -> np.ndarray:
    """Range-change class of every cell from two suitability maps (uint8 codes of CHANGE_CLASSES).

    Parameters
    ----------
    now, future : ndarray of float, same shape
        Suitability (0-1) at present and in the future; NaN where unknown.
    threshold : float
        A cell is suitable when ``suitability >= threshold`` (the ``>=`` convention, so a
        cell exactly at the threshold counts as suitable).
    mess : ndarray of float, same shape, optional
        MESS of the future climate (Elith, Kearney & Phillips 2010). A gained cell with
        ``mess < 0`` is ``gained_novel`` (code 4), a stable cell with ``mess < 0`` is
        ``stable_novel`` (code 5): still called suitable, but only by extrapolation. A cell
        with unknown (NaN) MESS keeps its plain class: novelty is claimed only where it is
        shown. Without ``mess`` codes 4 and 5 never occur.

    Returns
    -------
    ndarray of uint8, same shape: 0 absent, 1 lost, 2 stable, 3 gained, 4 gained_novel,
    5 stable_novel, 255 where ``now`` or ``future`` is NaN.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) The art of modelling range-shifting species.
    Methods in Ecology and Evolution 1: 330-342.

    Examples
    --------
    >>> classify_change(np.array([0.9, 0.9, 0.1, 0.1]), np.array([0.9, 0.1, 0.9, 0.1]), 0.5)
    array([2, 1, 3, 0], dtype=uint8)
    """
    now = np.asarray(now, dtype=np.float64)
    future = np.asarray(future, dtype=np.float64)
    if now.shape != future.shape:
        raise InputError(f"now and future suitability differ in shape: {now.shape} vs {future.shape}")
    valid = np.isfinite(now) & np.isfinite(future)
    with np.errstate(invalid="ignore"):
        suitable_now = now >= threshold
        suitable_future = future >= threshold
    # code = 1*now + 2*future maps (F,F)->0, (T,F)->1, (T,T)->3, (F,T)->2; reorder to the legend.
    codes = np.array([0, 1, 3, 2], dtype=np.uint8)[suitable_now.astype(np.intp) + 2 * suitable_future.astype(np.intp)]
    if mess is not None:
        mess = np.asarray(mess, dtype=np.float64)
        if mess.shape != now.shape:
            raise InputError(f"MESS differs in shape from suitability: {mess.shape} vs {now.shape}")
        with np.errstate(invalid="ignore"):
            novel = mess < 0  # NaN compares False: unknown novelty stays "gained"
        codes[(codes == 3) & novel] = 4
        codes[(codes == 2) & novel] = 5
    codes[~valid] = CHANGE_NODATA
    return codes


def class_sums(classes, weights, n_classes: int = len(CHANGE_CLASSES)) -> np.ndarray:
    """Sum of ``weights`` (e.g. cell areas) per class code 0..n_classes-1, and the cell counts.

    Returns an array of shape (2, n_classes): row 0 the weight sums, row 1 the cell counts.
    Cells with other codes (nodata) or NaN weight are left out. Partial sums of blocks add up,
    so a grid wrapper can reduce chunk by chunk.
    """
    classes = np.asarray(classes).ravel()
    weights = np.asarray(weights, dtype=np.float64).ravel()
    keep = (classes < n_classes) & np.isfinite(weights)
    codes = classes[keep].astype(np.intp)
    out = np.empty((2, n_classes), dtype=np.float64)
    out[0] = np.bincount(codes, weights=weights[keep], minlength=n_classes)
    out[1] = np.bincount(codes, minlength=n_classes)
    return out


def normal_vectors(lon, lat) -> np.ndarray:
    """Unit surface normals (n-vectors) at geodetic ``lon``, ``lat`` (degrees), shape (..., 3).

    (cos phi cos lambda, cos phi sin lambda, sin phi) (Gade 2010, eq. 3). Chord lengths
    between them are monotone in the angle between the normals.

    References
    ----------
    Gade, K. (2010) A non-singular horizontal position representation. Journal of
    Navigation 63: 395-417.
    """
    lam = np.radians(np.asarray(lon, dtype=np.float64))
    phi = np.radians(np.asarray(lat, dtype=np.float64))
    cos_phi = np.cos(phi)
    return np.stack([cos_phi * np.cos(lam), cos_phi * np.sin(lam), np.sin(phi)], axis=-1)


def normal_vector_sums(lon, lat, weights) -> np.ndarray:
    """Weighted sum of the ellipsoid's unit surface normals (n-vectors) at geodetic ``lon``, ``lat``.

    The n-vector of geodetic latitude phi and longitude lambda is
    (cos phi cos lambda, cos phi sin lambda, sin phi) (Gade 2010, eq. 3). Cells with NaN
    position or weight are left out. Partial sums of blocks add up, so a grid wrapper can
    reduce chunk by chunk; :func:`position_from_vector` turns the total into a position.

    Returns
    -------
    ndarray, shape (4,): the three vector components and the total weight.

    References
    ----------
    Gade, K. (2010) A non-singular horizontal position representation. Journal of
    Navigation 63: 395-417.
    """
    lon, lat, w = np.broadcast_arrays(np.asarray(lon, dtype=np.float64), np.asarray(lat, dtype=np.float64),
                                      np.asarray(weights, dtype=np.float64))
    keep = np.isfinite(lon) & np.isfinite(lat) & np.isfinite(w)
    w = w[keep]
    vectors = normal_vectors(lon[keep], lat[keep])
    return np.append(w @ vectors, np.sum(w))


def position_from_vector(vector_sums) -> tuple[float, float]:
    """Geodetic (lon, lat) in degrees of the direction of a summed n-vector; NaN if no weight.

    The area-weighted mean of n-vectors, scaled back to unit length, is the surface normal
    of the mean position; its geodetic latitude is atan2(z, sqrt(x^2 + y^2)) and its
    longitude atan2(y, x) (Gade 2010, eqs. 5-6). Longitude is in (-180, 180].

    References
    ----------
    Gade, K. (2010) A non-singular horizontal position representation. Journal of
    Navigation 63: 395-417.
    """
    x, y, z, total = (float(v) for v in vector_sums)
    norm = np.sqrt(x * x + y * y + z * z)
    # a vanishing mean vector (weight spread evenly round the globe) has no direction
    if not total > 0 or norm <= 1e-12 * total:
        return float("nan"), float("nan")
    lon = float(np.degrees(np.arctan2(y, x)))
    lat = float(np.degrees(np.arctan2(z, np.hypot(x, y))))
    return (180.0 if lon == -180.0 else lon), lat


def weighted_quantile(values, weights, q: float) -> float:
    """Weighted quantile by the inverted empirical distribution function.

    The ``q``-quantile (0 < q <= 1) is the smallest value at which the cumulative weight
    share reaches ``q``: with values sorted ascending and C_k the share of weight of the
    first k values, it is v_k for the first k with C_k >= q (Hyndman & Fan 1996, definition 1,
    with weights). The result is always one of the given values (a cell centre). Values or
    weights that are NaN, and zero weights, are left out; NaN if no weight remains.

    References
    ----------
    Hyndman, R.J. & Fan, Y. (1996) Sample quantiles in statistical packages. The American
    Statistician 50: 361-365.

    Examples
    --------
    >>> weighted_quantile([1.0, 2.0, 3.0], [1.0, 1.0, 2.0], 0.5)
    2.0
    """
    if not 0.0 < q <= 1.0:
        raise InputError(f"quantile: found {q!r}; expected a number in (0, 1]")
    values = np.asarray(values, dtype=np.float64).ravel()
    weights = np.asarray(weights, dtype=np.float64).ravel()
    keep = np.isfinite(values) & np.isfinite(weights) & (weights > 0)
    values, weights = values[keep], weights[keep]
    if values.size == 0:
        return float("nan")
    order = np.argsort(values, kind="stable")
    values, weights = values[order], weights[order]
    share = np.cumsum(weights) / weights.sum()
    # a relative slack of a few ulps keeps e.g. 19/20 >= 0.95 true despite round-off
    k = int(np.searchsorted(share, q * (1.0 - 8 * np.finfo(float).eps), side="left"))
    return float(values[min(k, values.size - 1)])


#: Bins of the latitude histogram of :func:`latitude_bin` (0.00275 degrees, about 300 m, each).
LATITUDE_BINS = 2**16

# the slack of weighted_quantile: a few ulps keep e.g. 19/20 >= 0.95 true despite round-off
_SHARE_SLACK = 1.0 - 8 * np.finfo(float).eps


def latitude_bin(lat) -> np.ndarray:
    """Index (0 .. LATITUDE_BINS - 1) of the equal-width bin of [-90, 90] holding each latitude.

    Monotone: a higher latitude never has a lower bin, so every value of a bin lies below
    every value of the next one, and a quantile can be located by bins first.
    """
    lat = np.asarray(lat, dtype=np.float64)
    index = np.floor((lat + 90.0) * (LATITUDE_BINS / 180.0)).astype(np.intp)
    return np.clip(index, 0, LATITUDE_BINS - 1)


def quantile_bin(hist, q: float, *, reverse: bool = False):
    """The bin of a weight histogram holding the weighted ``q``-quantile (definition 1).

    With ``reverse`` the bins are taken from the last down, which is the quantile of the
    negated values. Returns ``(bin index, weight of the bins before it in that order, total
    weight)``, or None without weight. The quantile itself is then found among the values
    of that bin by :func:`quantile_in_bin`; together they give what
    :func:`weighted_quantile` gives on all values (Hyndman & Fan 1996, definition 1),
    holding only one bin's values.
    """
    if not 0.0 < q <= 1.0:
        raise InputError(f"quantile: found {q!r}; expected a number in (0, 1]")
    hist = np.asarray(hist, dtype=np.float64)
    ordered = hist[::-1] if reverse else hist
    cumulative = np.cumsum(ordered)
    total = float(cumulative[-1]) if cumulative.size else 0.0
    if not total > 0:
        return None
    k = int(np.searchsorted(cumulative / total, q * _SHARE_SLACK, side="left"))
    k = min(k, ordered.size - 1)
    below = float(cumulative[k - 1]) if k > 0 else 0.0
    return (ordered.size - 1 - k if reverse else k), below, total


def quantile_in_bin(values, weights, below: float, total: float, q: float) -> float:
    """The weighted ``q``-quantile (definition 1) from the values of the bin that holds it.

    ``below`` is the weight of all values smaller than those given and ``total`` the weight
    of all values: the result is the smallest given value at which ``(below + cumulative
    weight) / total`` reaches ``q`` (the same slack as :func:`weighted_quantile`). NaN
    values and zero weights are left out; NaN if nothing remains.
    """
    values = np.asarray(values, dtype=np.float64).ravel()
    weights = np.asarray(weights, dtype=np.float64).ravel()
    keep = np.isfinite(values) & np.isfinite(weights) & (weights > 0)
    values, weights = values[keep], weights[keep]
    if values.size == 0 or not total > 0:
        return float("nan")
    order = np.argsort(values, kind="stable")
    values, weights = values[order], weights[order]
    share = (below + np.cumsum(weights)) / total
    k = int(np.searchsorted(share, q * _SHARE_SLACK, side="left"))
    return float(values[min(k, values.size - 1)])


def meridian_distance_m(lat, *, a: float = WGS84_A, inverse_flattening: float = WGS84_INVERSE_FLATTENING):
    """Meridian arc length (m) from the equator to geodetic latitude ``lat`` (degrees), signed.

    m(phi) = a [E(phi | e^2) - e^2 sin(phi) cos(phi) / sqrt(1 - e^2 sin^2 phi)], with
    E(phi | m) the incomplete elliptic integral of the second kind (parameter m = e^2); this
    is the integral of the meridian radius of curvature M(phi) = a(1 - e^2)/(1 - e^2 sin^2
    phi)^(3/2) from 0 to phi.

    References
    ----------
    Torge, W. & Mueller, J. (2012) Geodesy, 4th ed., de Gruyter (meridian radius of
    curvature M and meridian arc) -- from memory; the closed form is checked in the tests
    against pyproj.Geod.inv along a meridian.
    """
    f = 1.0 / inverse_flattening
    e2 = f * (2.0 - f)
    phi = np.radians(np.asarray(lat, dtype=np.float64))
    s = np.sin(phi)
    return a * (scipy.special.ellipeinc(phi, e2) - e2 * s * np.cos(phi) / np.sqrt(1.0 - e2 * s * s))


def meridian_arc_km(lat_from, lat_to, **ellipsoid) -> float:
    """Length (km) along a meridian from ``lat_from`` to ``lat_to`` (degrees), positive northward."""
    return float((meridian_distance_m(lat_to, **ellipsoid) - meridian_distance_m(lat_from, **ellipsoid)) / 1000.0)
