"""Spatial autocorrelation kernels: the autocovariate of neighbour occupancy, and Moran's I correlograms."""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from envelope.errors import InputError

__all__ = ["autocovariate", "morans_i", "correlogram", "distance_classes"]


def _points(coords, name: str) -> np.ndarray:
    pts = np.asarray(coords, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] not in (2, 3):
        raise InputError(f"{name}: found shape {pts.shape}; expected (n, 2) or (n, 3) coordinates in km")
    if not np.isfinite(pts).all():
        raise InputError(f"{name}: some coordinates are NaN or infinite; expected finite km")
    return pts


def autocovariate(targets, neighbours, occupied, radius_km: float) -> np.ndarray:
    """Distance-weighted share of occupied neighbours within ``radius_km`` of each target.

    A_i = sum_j w_ij y_j / sum_j w_ij over the neighbour cells j within the radius, with
    w_ij = 1 / d_ij and y_j = 1 for an occupied cell, else 0 (Augustin, Mugglestone &
    Buckland 1996, the weighted-average autocovariate with inverse-distance weights). A
    neighbour at distance 0 (the target cell itself) is left out, so a cell's own record does
    not explain it. Targets without any neighbour in the radius get 0.

    Parameters
    ----------
    targets : ndarray, shape (m, 2) or (m, 3)
        Points where the autocovariate is wanted, in km (planar, or Earth-centred 3-D: then
        distances are chords, within 0.01 % of the great-circle distance below 100 km).
    neighbours : ndarray, shape (n, 2) or (n, 3)
        The cells that count as neighbours (all cells of the study area), in km.
    occupied : ndarray of bool or 0/1, shape (n,)
    radius_km : float > 0

    Returns
    -------
    ndarray of float, shape (m,), in [0, 1].

    References
    ----------
    Augustin, N.H., Mugglestone, M.A. & Buckland, S.T. (1996) An autologistic model for the
    spatial distribution of wildlife. Journal of Applied Ecology 33: 339-347.
    """
    radius_km = float(radius_km)
    if not radius_km > 0:
        raise InputError(f"radius_km: found {radius_km!r}; expected a positive distance in km")
    t = _points(targets, "targets")
    nb = _points(neighbours, "neighbours")
    occ = np.asarray(occupied, dtype=np.float64).ravel()
    if occ.size != nb.shape[0]:
        raise InputError(f"occupied: {occ.size} values for {nb.shape[0]} neighbours; expected one each")
    if t.shape[0] == 0 or nb.shape[0] == 0:
        return np.zeros(t.shape[0])
    pairs = cKDTree(t).sparse_distance_matrix(cKDTree(nb), radius_km, output_type="coo_matrix")
    i, j, d = pairs.row, pairs.col, pairs.data
    keep = d > 0  # the target cell itself (distance 0) is no neighbour of itself
    i, j, d = i[keep], j[keep], d[keep]
    w = 1.0 / d
    num = np.bincount(i, weights=w * occ[j], minlength=t.shape[0])
    den = np.bincount(i, weights=w, minlength=t.shape[0])
    out = np.zeros(t.shape[0])
    np.divide(num, den, out=out, where=den > 0)
    return out


def morans_i(values, weights) -> float:
    """Moran's I of ``values`` under a dense spatial weight matrix ``weights`` (zero diagonal).

    I = (n / S0) * sum_ij w_ij z_i z_j / sum_i z_i^2, z = x - mean(x), S0 = sum_ij w_ij
    (Moran 1950; Cliff & Ord 1981, eq. 1.5). NaN when S0 = 0 or the values are constant.

    References
    ----------
    Moran, P.A.P. (1950) Notes on continuous stochastic phenomena. Biometrika 37: 17-23.
    Cliff, A.D. & Ord, J.K. (1981) Spatial Processes: Models and Applications. Pion, London.
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (x.size, x.size):
        raise InputError(f"weights: found shape {w.shape}; expected ({x.size}, {x.size})")
    z = x - x.mean()
    s0 = w.sum()
    # plain NumPy sums, not BLAS products: a multi-threaded BLAS adds in an order that varies
    # with its thread count, and the summary should not change in its last digit between
    # processes (a local run against a cluster worker)
    ss = float(np.sum(z * z))
    if s0 == 0 or ss == 0:
        return float("nan")
    cross = float(np.sum(np.sum(w * z[None, :], axis=1) * z))
    return float(x.size / s0 * cross / ss)


def distance_classes(max_km: float, n_classes: int = 10) -> np.ndarray:
    """Edges (km) of ``n_classes`` equal distance classes from 0 to ``max_km``."""
    if not max_km > 0 or int(n_classes) < 1:
        raise InputError(f"distance classes: found max {max_km!r} km, {n_classes!r} classes; "
                         "expected a positive distance and at least one class")
    return np.linspace(0.0, float(max_km), int(n_classes) + 1)


def correlogram(values, coords, edges) -> list[dict]:
    """Moran's I of ``values`` in each distance class (lower, upper] of ``edges`` (km).

    Binary weights: w_ij = 1 when lower < d_ij <= upper (i != j). Distances are Euclidean
    between the (n, 2) or (n, 3) km coordinates. The full distance matrix is formed, so keep
    n to a few thousand (the callers subsample).

    Returns
    -------
    list of dict: ``lower_km``, ``upper_km``, ``n_pairs`` (ordered pairs / 2), ``morans_i``.
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    pts = _points(coords, "coords")
    if pts.shape[0] != x.size:
        raise InputError(f"coords: {pts.shape[0]} points for {x.size} values; expected one each")
    d = cdist(pts, pts)
    np.fill_diagonal(d, -1.0)  # never in a class
    out = []
    for lower, upper in zip(edges[:-1], edges[1:]):
        w = ((d > lower) & (d <= upper)).astype(np.float64)
        out.append({"lower_km": float(lower), "upper_km": float(upper), "n_pairs": int(w.sum() // 2),
                    "morans_i": morans_i(x, w)})
    return out
