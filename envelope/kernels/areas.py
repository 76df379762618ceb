"""True areas of grid cells: exact ellipsoidal bands between parallels, planar shoelace rings."""

from __future__ import annotations

import numpy as np

#: WGS84 semi-major axis (m) and inverse flattening. Source: NIMA TR8350.2 (2000).
WGS84_A = 6_378_137.0
WGS84_INVERSE_FLATTENING = 298.257223563


def _q(phi, e):
    """Authalic function q(phi) = sin/(1 - e^2 sin^2) + ln((1 + e sin)/(1 - e sin)) / (2e)."""
    s = np.sin(phi)
    e2 = e * e
    return s / (1.0 - e2 * s * s) + np.log((1.0 + e * s) / (1.0 - e * s)) / (2.0 * e)


def ellipsoid_band_area(lat1_deg, lat2_deg, dlon_deg, a=WGS84_A, f=1.0 / WGS84_INVERSE_FLATTENING):
    """Area (m²) between two parallels and two meridians ``dlon_deg`` apart on an ellipsoid.

    A = Δλ · (b²/2) · |q(φ₂) − q(φ₁)| with q the authalic function above; on a sphere
    (f = 0) A = R² Δλ |sin φ₂ − sin φ₁|. Vectorised over all arguments.

    References
    ----------
    Snyder, J.P. (1987) Map projections: a working manual. USGS Prof. Paper 1395, eq. 3-12
    (the q function); checked against pyproj.Geod in the tests (REFERENCES.md item 6).

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
    """Total surface (m²) of an ellipsoid of revolution: 2πa² + π(b²/e) ln((1+e)/(1−e))."""
    b = a * (1.0 - f)
    e = np.sqrt(f * (2.0 - f))
    return float(2 * np.pi * a * a + np.pi * (b * b / e) * np.log((1 + e) / (1 - e)))


def polygon_area_planar(xs, ys):
    """Shoelace area of rings (last axis = vertices, not closed), absolute, vectorised."""
    xs = np.asarray(xs, dtype=np.float64)
    ys = np.asarray(ys, dtype=np.float64)
    return 0.5 * np.abs(np.sum(xs * np.roll(ys, -1, axis=-1) - np.roll(xs, -1, axis=-1) * ys, axis=-1))
