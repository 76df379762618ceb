"""Longitude arithmetic on plain arrays: continuous grid axes across 180°, wrapping into a range, antimeridian cuts."""

from __future__ import annotations

import numpy as np

__all__ = ["continuous_axis", "wrap_longitude", "label_longitude", "split_at_antimeridian"]

#: Relative tolerance on column spacing when telling a globe-circling axis from a regional one.
_STEP_RTOL = 1e-5


def wrap_longitude(lon, west: float = -180.0):
    """Longitudes moved by whole turns into ``[west, west + 360)``.

    ``west = -180`` gives the usual −180…180 range; a grid whose west edge is 169.5 takes
    record longitudes into 169.5…529.5, so −179 becomes 181 and lands on the grid's columns
    east of the 180° meridian.
    """
    lon = np.asarray(lon, dtype=np.float64)
    return west + np.mod(lon - west, 360.0)


def label_longitude(lon):
    """Longitudes as labelled on maps: −180 ≤ λ < 180 (180° itself reads as −180, i.e. 180°)."""
    return wrap_longitude(lon, -180.0)


def continuous_axis(x):
    """Order and values that make a longitude axis one continuous west-to-east run.

    Longitudes may come in 0…360, in −180…180, or split at 180° (a NetCDF written
    ``170 … 179.5, −179.5 … −170``). Columns are sorted round the circle and the run starts
    after the widest gap between neighbouring columns, so a grid over the 180° meridian keeps
    its columns side by side (``170 … 190``); its values are then moved by whole turns so
    that the west edge lies in −180…180. An axis without a gap wider than its spacing (a grid
    that circles the globe) runs −180…180, the project's convention.

    Parameters
    ----------
    x : array_like, shape (n,)
        Cell-centre longitudes, degrees, any order.

    Returns
    -------
    order : ndarray of int, shape (n,)
        Column order (indices into ``x``), west to east.
    values : ndarray of float64, shape (n,)
        Longitudes of the ordered columns, increasing; beyond 180 for a grid crossing 180°.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    n = x.size
    if n == 0:
        return np.arange(0), x.copy()
    if n == 1:
        return np.arange(1), label_longitude(x)
    turn = np.mod(x, 360.0)
    order = np.argsort(turn, kind="stable")
    s = turn[order]
    gaps = np.diff(np.concatenate([s, [s[0] + 360.0]]))  # gap east of each column, the last wraps round
    if np.allclose(gaps, np.median(gaps), rtol=_STEP_RTOL, atol=0):
        values = label_longitude(x)
        order = np.argsort(values, kind="stable")
        return order, values[order]
    start = (int(np.argmax(gaps)) + 1) % n
    order = np.roll(order, -start)
    values = turn[order]
    values = values + 360.0 * (np.arange(n) >= n - start)   # the columns after the 0°/360° turn
    half = 0.5 * (values[1] - values[0])
    values = values - 360.0 * np.floor((values[0] - half + 180.0) / 360.0)
    return order, values


def split_at_antimeridian(lon, lat):
    """Cut a line in continuous longitudes where it crosses the 180° meridian (RFC 7946 §3.1.9).

    The line's longitudes may run past ±180 (a front on a grid over the 180° meridian). Each
    crossing of 180° + k·360° ends one part at longitude ±180 and starts the next at ∓180,
    at the latitude interpolated linearly in longitude between the two vertices either side;
    every part's longitudes lie in −180…180.

    Returns
    -------
    list of (lon, lat) ndarray pairs
        The parts, in order along the line.

    References
    ----------
    Butler, H. et al. (2016) The GeoJSON Format. IETF RFC 7946, §3.1.9 (antimeridian cutting).
    """
    lon = np.asarray(lon, dtype=np.float64)
    lat = np.asarray(lat, dtype=np.float64)
    if lon.size == 0:
        return []
    # index of the 360° "sheet" each vertex is on: sheet k holds -180 + 360k <= lon < 180 + 360k
    sheet = np.floor((lon + 180.0) / 360.0)
    parts, cur_lon, cur_lat = [], [lon[0] - 360.0 * sheet[0]], [lat[0]]
    for i in range(1, lon.size):
        k0, k1 = sheet[i - 1], sheet[i]
        if k1 != k0:
            step = 1.0 if k1 > k0 else -1.0
            for k in np.arange(k0, k1, step):
                edge = 180.0 + 360.0 * (k if step > 0 else k - 1)   # meridian between sheets k and k + step
                t = (edge - lon[i - 1]) / (lon[i] - lon[i - 1])
                y = lat[i - 1] + t * (lat[i] - lat[i - 1])
                cur_lon.append(180.0 * step)
                cur_lat.append(y)
                parts.append((np.asarray(cur_lon), np.asarray(cur_lat)))
                cur_lon, cur_lat = [-180.0 * step], [y]
        cur_lon.append(lon[i] - 360.0 * k1)
        cur_lat.append(lat[i])
    parts.append((np.asarray(cur_lon), np.asarray(cur_lat)))
    return parts
