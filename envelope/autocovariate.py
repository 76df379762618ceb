"""The spatial autocovariate (Augustin et al. 1996) on grids, and Moran's I correlograms of fit residuals.

The autocovariate of a cell is the inverse-distance-weighted share of occupied cells among its
neighbours within a radius (the cell itself left out); it enters a fit as one more predictor
named :data:`AUTOCOVARIATE_VARIABLE`.

How the term is handled in projection: a projected climate has no neighbourhood of its own, so
the term must be supplied. ``"held"`` (the default) keeps today's neighbourhood: the layer made
from the fitted records (written beside the model file as ``<model>.autocovariate.tif``) is
used for every projection, so the term shifts suitability near today's records only.
``"occupancy"`` recomputes the layer from a projected occupancy (for example the reach
pipeline's occupied cells in a future year), so neighbours gained by colonisation raise the
term. :func:`autocovariate_for_projection` makes either layer.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.autocorrelation import autocovariate, correlogram, distance_classes

__all__ = ["AUTOCOVARIATE_VARIABLE", "PROJECTION_MODES", "earth_centred_km", "autocovariate_layer",
           "with_autocovariate", "autocovariate_for_projection", "residual_correlogram"]

#: Name of the autocovariate predictor in a stack, a model's variables and the raster beside the model.
AUTOCOVARIATE_VARIABLE = "autocovariate"
#: How the term is supplied in projection (see the module docstring).
PROJECTION_MODES = ("held", "occupancy")
#: Mean Earth radius R1 of WGS84 (km), as envelope.records.EARTH_RADIUS_M.
_EARTH_RADIUS_KM = 6371.0087714


def _lonlat(grid: xr.DataArray, x, y):
    from envelope.grids import grid_crs

    crs = grid_crs(grid)
    if crs.is_geographic:
        return np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    import pyproj

    lon, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(x, y)
    return np.asarray(lon), np.asarray(lat)


def earth_centred_km(grid: xr.DataArray, x, y) -> np.ndarray:
    """Points (x, y) in the grid's CRS as Earth-centred coordinates (km) on the mean-radius sphere.

    Chord distances between them are within 0.01 % of great-circle distances below 100 km
    (chord = 2R sin(d / 2R)); they cross the antimeridian without a seam.
    """
    lon, lat = _lonlat(grid, x, y)
    lam, phi = np.radians(lon), np.radians(lat)
    return _EARTH_RADIUS_KM * np.stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)], axis=-1)


def _valid_points(grid: xr.DataArray):
    from envelope.grids import valid_cells

    valid = valid_cells(grid)
    rows, cols = np.nonzero(valid)
    xs, ys = grid["x"].values[cols], grid["y"].values[rows]
    return valid, rows, cols, earth_centred_km(grid, xs, ys)


def autocovariate_layer(occupancy: xr.DataArray, radius_km: float, *, grid: xr.DataArray | None = None) -> xr.DataArray:
    """The autocovariate at every cell with data, as a (y, x) layer (NaN elsewhere).

    Parameters
    ----------
    occupancy : DataArray (y, x)
        1 where the species is recorded (or projected to be present), 0 elsewhere.
    radius_km : float
        Neighbourhood radius (km).
    grid : DataArray, optional
        The cells that count as neighbours: those with data in every variable of ``grid``
        (default: the cells where ``occupancy`` is not NaN).

    References
    ----------
    Augustin, N.H., Mugglestone, M.A. & Buckland, S.T. (1996) Journal of Applied Ecology 33: 339-347.
    """
    valid, rows, cols, pts = _valid_points(occupancy if grid is None else grid)
    occ = np.nan_to_num(np.asarray(occupancy.values, dtype=np.float64)[rows, cols]) > 0
    values = np.full(valid.shape, np.nan, dtype=np.float32)
    values[rows, cols] = autocovariate(pts, pts, occ, radius_km)
    out = xr.DataArray(values, dims=("y", "x"), coords={"y": occupancy["y"], "x": occupancy["x"]},
                       name=AUTOCOVARIATE_VARIABLE, attrs={"radius_km": float(radius_km), "units": "1"})
    crs = (occupancy if grid is None else grid).rio.crs
    return out.rio.write_crs(crs) if crs is not None else out


def with_autocovariate(stack: xr.DataArray, layer: xr.DataArray) -> xr.DataArray:
    """``stack`` (variable, y, x) with ``layer`` appended as the variable :data:`AUTOCOVARIATE_VARIABLE`."""
    if AUTOCOVARIATE_VARIABLE in [str(v) for v in stack["variable"].values]:
        raise InputError(f"climate: already holds a variable named {AUTOCOVARIATE_VARIABLE!r}; rename it")
    extra = layer.astype(stack.dtype).expand_dims(variable=[AUTOCOVARIATE_VARIABLE])
    extra = extra.assign_coords(y=stack["y"], x=stack["x"])
    if "units" in stack.coords:
        extra = extra.assign_coords(units=("variable", ["1"]))
    out = xr.concat([stack, extra.drop_vars([c for c in extra.coords if c not in ("variable", "y", "x", "units")])],
                    dim="variable")
    out.attrs = stack.attrs
    return out.rio.write_crs(stack.rio.crs) if stack.rio.crs is not None else out


def autocovariate_for_projection(today: xr.DataArray, *, mode: str = "held", occupancy: xr.DataArray | None = None,
                                 radius_km: float | None = None) -> xr.DataArray:
    """The autocovariate layer to project with: today's (``"held"``) or one from a projected occupancy.

    ``today`` is the layer of the fit (its ``radius_km`` attribute is the radius used again
    for ``"occupancy"``).
    """
    if mode not in PROJECTION_MODES:
        raise InputError(f"autocovariate projection: found {mode!r}; expected one of {', '.join(PROJECTION_MODES)}")
    if mode == "held":
        return today
    if occupancy is None:
        raise InputError("autocovariate projection 'occupancy': no occupancy layer given")
    radius = float(radius_km if radius_km is not None else today.attrs["radius_km"])
    return autocovariate_layer(occupancy, radius, grid=today)


def residual_correlogram(x, y, residuals, *, grid: xr.DataArray, n_classes: int = 10, max_points: int = 1500,
                         seed: int = 0) -> dict:
    """Moran's I correlogram of model residuals at points (x, y) in the grid's CRS.

    Distance classes are ``n_classes`` equal bands from 0 to half the diagonal of the points'
    bounding box, about half the largest distance between them (common practice: longer lags
    rest on few pairs); at most
    ``max_points`` points, drawn at random, enter the O(n²) computation.

    Returns
    -------
    dict: ``method``, ``n_points``, ``classes`` (list of ``lower_km``, ``upper_km``,
    ``n_pairs``, ``morans_i``).

    References
    ----------
    Moran (1950); Cliff & Ord (1981); Dormann, C.F. et al. (2007) Methods to account for
    spatial autocorrelation in the analysis of species distributional data: a review.
    Ecography 30: 609-628.
    """
    x, y, r = (np.asarray(v, dtype=np.float64).ravel() for v in (x, y, residuals))
    keep = np.flatnonzero(np.isfinite(x) & np.isfinite(y) & np.isfinite(r))
    if keep.size > max_points:
        keep = np.sort(np.random.default_rng(seed).choice(keep, max_points, replace=False))
    pts = earth_centred_km(grid, x[keep], y[keep])
    result = {"method": "Moran's I of residuals (presence 1 / background 0 minus fitted suitability), "
                        "binary weights per distance class", "n_points": int(keep.size), "classes": []}
    if keep.size < 3:
        return result
    span = np.linalg.norm(pts.max(axis=0) - pts.min(axis=0))
    if not span > 0:
        return result
    result["classes"] = correlogram(r[keep], pts, distance_classes(span / 2.0, n_classes))
    return result
