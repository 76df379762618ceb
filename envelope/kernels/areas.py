"""True areas of grid cells: exact ellipsoidal bands between parallels, planar shoelace rings."""

from __future__ import annotations

import numpy as np

#: WGS84 semi-major axis (m) and inverse flattening. Source: NIMA TR8350.2 (2000).
WGS84_A = 6_378_137.0
WGS84_INVERSE_FLATTENING = 298.257223563


def _q(phi, e):
    """Authalic function q(phi) without Snyder's (1 - e²) factor (carried by b² below).

    q(phi) = sin phi / (1 - e² sin² phi) + (1/(2e)) ln[(1 + e sin phi)/(1 - e sin phi)];
    the log term is written ``atanh(e sin phi) / e``, which is the same and exact near 0.
    """
    s = np.sin(phi)
    return s / (1.0 - e * e * s * s) + np.arctanh(e * s) / e


def ellipsoid_band_area(lat1_deg, lat2_deg, dlon_deg, a=WGS84_A, f=1.0 / WGS84_INVERSE_FLATTENING):
    """Area between two parallels and two meridians on an ellipsoid of revolution.

    Parameters
    ----------
    lat1_deg, lat2_deg : array_like
        Bounding geodetic latitudes in degrees (either order; broadcast together).
    dlon_deg : array_like
        Longitude extent in degrees (broadcast with the latitudes).
    a : float, default=WGS84_A
        Semi-major axis in metres.
    f : float, default=1/298.257223563
        Flattening; 0 gives a sphere of radius ``a``.

    Returns
    -------
    ndarray
        Area in m², non-negative.

    Notes
    -----
    Ellipsoid: A = Δλ · (b²/2) · |q(φ₂) − q(φ₁)|; sphere: A = a² Δλ |sin φ₂ − sin φ₁|.
    Summed over a complete graticule it gives the ellipsoid's closed-form surface area.

    References
    ----------
    Snyder, J.P. (1987) Map projections: a working manual. USGS Prof. Paper 1395, eq. 3-12
    (the q function); WGS84 constants from NIMA TR8350.2 (2000); REFERENCES.md item 6.

    Examples
    --------
    >>> round(float(ellipsoid_band_area(0.0, 1.0, 1.0)) / 1e6, 6)
    12308.463894
    """
    phi1 = np.radians(np.asarray(lat1_deg, dtype=np.float64))
    phi2 = np.radians(np.asarray(lat2_deg, dtype=np.float64))
    dlam = np.radians(np.abs(np.asarray(dlon_deg, dtype=np.float64)))
    if f == 0:
        return a * a * dlam * np.abs(np.sin(phi2) - np.sin(phi1))
    b = a * (1.0 - f)
    e = np.sqrt(f * (2.0 - f))
    return dlam * (b * b / 2.0) * np.abs(_q(phi2, e) - _q(phi1, e))


def ellipsoid_surface_area(a=WGS84_A, f=1.0 / WGS84_INVERSE_FLATTENING) -> float:
    """Total surface (m²) of an ellipsoid of revolution: 2πa² + π(b²/e) ln((1+e)/(1−e)).

    References
    ----------
    Closed form for an oblate spheroid; REFERENCES.md item 6 (510 065 621.724 km² for WGS84).
    """
    if f == 0:
        return float(4 * np.pi * a * a)
    b = a * (1.0 - f)
    e = np.sqrt(f * (2.0 - f))
    return float(2 * np.pi * a * a + np.pi * (b * b / e) * np.log((1 + e) / (1 - e)))


def polygon_area_planar(xs, ys, *, signed: bool = False):
    """Shoelace area of rings in a plane, vectorised over leading axes.

    Parameters
    ----------
    xs, ys : array_like, shape (..., n_vertices)
        Vertex coordinates; each ring closes implicitly (last vertex joins the first).
    signed : bool, default=False
        Return the signed area (counter-clockwise positive) instead of its magnitude.

    Returns
    -------
    ndarray, shape (...)
        Area in squared coordinate units.

    References
    ----------
    Braden, B. (1986) The surveyor's area formula. The College Mathematics Journal 17(4): 326–337.
    """
    x = np.asarray(xs, dtype=np.float64)
    y = np.asarray(ys, dtype=np.float64)
    # shift each ring to its first vertex: projected coordinates of 1e6 m would otherwise
    # cancel catastrophically in the cross products of a small cell
    x = x - x[..., :1]
    y = y - y[..., :1]
    area = 0.5 * np.sum(x * np.roll(y, -1, axis=-1) - np.roll(x, -1, axis=-1) * y, axis=-1)
    return area if signed else np.abs(area)
