"""Background points: an area-weighted quadrature of the study area, and the sampling-bias corrections."""

from __future__ import annotations

import dataclasses
import logging

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.models import BIAS_METHODS, COVARIATE_METHODS
from envelope.records import EARTH_RADIUS_M, NeighbourSearch, Records, cell_centres, values_at
from envelope.grids import check_grid_dims, check_same_shape, grid_crs, valid_cells

log = logging.getLogger(__name__)

# Cells per batch when measuring distances to records, to bound memory on large grids.
_BATCH = 1_000_000


def sample_background(
    grid: xr.DataArray,
    n: int = 10_000,
    *,
    seed: int = 0,
    bias=None,
    mask=None,
    buffer_km: float | None = None,
    records=None,
    exclude_cells=None,
    with_values: bool = False,
    per_area: bool = True,
) -> pd.DataFrame:
    """Draw ``n`` background points from the grid's valid cells: a quadrature of the study area.

    The background of a point-process model stands for the integral of the intensity over
    the study area (Warton & Shepherd 2010; Fithian & Hastie 2013), so a cell is drawn with
    probability proportional to its true area on the ground
    (:func:`envelope.grids.cell_area_km2`), times the bias layer when one is given. Points
    are drawn **with replacement** and each distinct cell is returned once, its number of
    draws in ``weight`` (frequency weights: pass them to the model as ``sample_weight``).
    Drawing with replacement keeps the realised density proportional to area x bias
    however large a share of the cells is drawn (without replacement, the most probable
    cells saturate at one draw each). When no more cells can be drawn than ``n``, every
    one is taken once with ``weight`` proportional to its area x bias (mean 1): the exact
    quadrature of the grid.

    A cell is valid when every variable is finite. Only 2-D layers (the valid mask, and the
    bias and mask layers when given) are held in memory; the stack itself is reduced chunk
    by chunk, cell areas are computed a band of rows at a time, and values are read at the
    drawn cells only.

    Parameters
    ----------
    grid : xarray.DataArray
        Climate stack (variable, y, x) or single layer (y, x), with a CRS.
    n : int, default=10_000
        Background points to draw. If no more cells than that are available, all of them
        are taken (weighted) and a warning logged.
    seed : int, default=0
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same cells.
    bias : xarray.DataArray or numpy.ndarray (y, x), optional
        Sampling effort, >= 0: the draw probability is multiplied by it (the
        "weighted-background" bias correction; target-group background, Phillips et al.
        2009). NaN or 0 cells are never drawn; a negative value is an InputError.
    mask : xarray.DataArray or numpy.ndarray (y, x), optional
        Cells where the mask is nonzero (and not NaN) may be drawn.
    buffer_km : float, optional
        Only cells whose centre lies within ``buffer_km`` of a record's cell centre
        (haversine on a sphere of radius :data:`envelope.records.EARTH_RADIUS_M` on
        geographic grids, Euclidean in projected CRSs). Needs ``records``.
    records : Records or pandas.DataFrame, optional
        Records on this grid (``x``/``y`` in the grid CRS), for ``buffer_km``.
    exclude_cells : Records, pandas.DataFrame with ``row``/``col``, or array (k, 2), optional
        Cells never drawn, e.g. the presence cells.
    with_values : bool, default=False
        Add one column per variable with the grid values at the drawn cells.
    per_area : bool, default=True
        Draw in proportion to true cell area. ``False`` draws every valid cell with the
        same probability (per cell), which on a geographic grid over-represents the small
        poleward cells; kept for comparison only.

    Returns
    -------
    pandas.DataFrame
        ``row``, ``col``, ``x``, ``y`` (cell centres, grid CRS), ``weight`` (float: draws
        of the cell, or area x bias relative to the mean when every cell is taken), one
        row per distinct cell, sorted by row then column.

    References
    ----------
    Warton, D.I. & Shepherd, L.C. (2010) Poisson point process models solve the
    "pseudo-absence problem" for presence-only data in ecology. Annals of Applied
    Statistics 4: 1383-1402.
    Fithian, W. & Hastie, T. (2013) Finite-sample equivalence in statistical models for
    presence-only data. Annals of Applied Statistics 7: 1917-1939.
    Phillips, S.J. et al. (2009) Sample selection bias and presence-only distribution
    models: implications for background and pseudo-absence data. Ecological Applications
    19: 181-197.
    VanDerWal, J. et al. (2009) Selecting pseudo-absence data for presence-only distribution
    modeling: how far should you stray from what you know? Ecological Modelling 220: 589-594.

    Examples
    --------
    >>> cells = sample_background(stack, 500, seed=1)        # doctest: +SKIP
    >>> cells.columns.tolist()                               # doctest: +SKIP
    ['row', 'col', 'x', 'y', 'weight']
    """
    table, _ = _sample(grid, n, seed=seed, bias=bias, mask=mask, buffer_km=buffer_km, records=records,
                       exclude_cells=exclude_cells, with_values=with_values, per_area=per_area)
    return table


# The summary's ``bias_correction`` value for each resolved method (None = no bias layer).
BIAS_CORRECTIONS = {"covariate": "covariate", "weighted": "weighted-background", None: "none"}


def resolve_bias_method(requested: str, method: str, has_bias: bool) -> str | None:
    """The bias correction a fit uses: ``"covariate"``, ``"weighted"`` or None (no bias layer).

    ``"auto"`` (the default) is ``"covariate"`` for the point-process model and
    ``"weighted"`` for the other model families. The covariate correction (Warton, Renner &
    Ramp 2013; Fithian et al. 2015) is preferred where it exists: it estimates how strongly
    records follow effort instead of assuming that they are exactly proportional to the
    layer, and it keeps the background a plain area quadrature. Only a model with a linear
    predictor can hold effort at a common value for prediction, so the tree models and the
    envelope get the bias-weighted background.
    """
    if requested not in BIAS_METHODS:
        raise InputError(f"bias_method: {requested!r}; expected one of {', '.join(BIAS_METHODS)}")
    if not has_bias:
        if requested != "auto":
            raise InputError(f"bias_method: {requested!r} needs a bias (recording-effort) layer; none was given")
        return None
    if requested == "auto":
        return "covariate" if method in COVARIATE_METHODS else "weighted"
    if requested == "covariate" and method not in COVARIATE_METHODS:
        raise InputError(f"bias_method: 'covariate' works with the point-process model only (method {method!r}); "
                         "expected 'weighted' or 'auto' for this method")
    return requested


@dataclasses.dataclass
class BackgroundSample:
    """The background of one fit and how it was drawn.

    Attributes
    ----------
    table : pandas.DataFrame
        ``row``, ``col``, ``x``, ``y``, ``weight`` (see :func:`sample_background`).
    bias_correction : str
        ``"covariate"``, ``"weighted-background"`` or ``"none"``.
    effort : numpy.ndarray or None
        Recording effort at the background cells (covariate correction only).
    info : dict
        How the background was drawn (per area, bias method, draws, distinct cells, weights),
        for the fit summary.
    effort_layer : numpy.ndarray or None
        The (y, x) effort layer, to read effort at the presence cells.
    """

    table: pd.DataFrame
    bias_correction: str
    effort: np.ndarray | None
    info: dict
    effort_layer: np.ndarray | None = dataclasses.field(default=None, repr=False)

    def effort_at(self, rows, cols) -> np.ndarray:
        """Recording effort at cells ``(rows[i], cols[i])`` (covariate correction only)."""
        if self.effort_layer is None:
            raise InputError("effort_at: this background was drawn without the covariate bias correction")
        return self.effort_layer[np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)]

    def describe(self, estimator, X_background, names, *, collinear_r: float = 0.7) -> tuple[dict, list]:
        """``(info, notes)``: :attr:`info` plus, for the covariate correction, the fitted effort term.

        ``info["effort"]`` holds ``coef`` (slope of log effort), ``reference`` (the effort
        predictions are made at), ``reference_rule`` and ``correlation`` (Pearson r of log
        effort with each variable over the background cells). A note is returned for each
        variable with ``|r| > collinear_r``: effort and climate are then hard to tell apart.
        """
        info, notes = dict(self.info), []
        if self.effort is None:
            return info, notes
        log_e = np.log(self.effort)
        X = np.asarray(X_background, dtype=np.float64)
        correlation = {}
        for j, name in enumerate(names):
            col = X[:, j]
            r = float(np.corrcoef(log_e, col)[0, 1]) if np.ptp(col) > 0 and np.ptp(log_e) > 0 else float("nan")
            correlation[str(name)] = round(r, 4) if np.isfinite(r) else None
            if np.isfinite(r) and abs(r) > collinear_r:
                notes.append(f"log recording effort and {name} are correlated (r = {r:.2f}) over the background: "
                             "the covariate bias correction cannot tell them apart well")
        coef = getattr(estimator, "effort_coef_", None)
        reference = getattr(estimator, "effort_reference_", None)
        info["effort"] = {"coef": None if coef is None else float(coef),
                          "reference": None if reference is None else float(reference),
                          "reference_rule": str(getattr(estimator, "effort_reference", "max")),
                          "correlation": correlation}
        return info, notes


def draw_background(grid: xr.DataArray, n: int = 10_000, *, seed: int = 0, bias=None,
                    bias_method: str | None = None, mask=None, buffer_km: float | None = None,
                    records=None, per_area: bool = True) -> BackgroundSample:
    """The background of a fit, drawn per unit area, with the chosen bias correction.

    Parameters
    ----------
    grid, n, seed, mask, buffer_km, records, per_area
        As in :func:`sample_background`.
    bias : xarray.DataArray or numpy.ndarray (y, x), optional
        Recording-effort layer (>= 0; NaN or 0 = never recorded).
    bias_method : {"covariate", "weighted"} or None
        As resolved by :func:`resolve_bias_method` (None without a bias layer).

        - ``"covariate"``: the background is drawn per area over the cells with effort > 0,
          and the effort there is returned so that the model can take log effort as a
          covariate (``PointProcessModel.fit(..., effort=...)``).
        - ``"weighted"``: the background is drawn with probability proportional to
          area x effort, with replacement, repeats counted as weights.

    Returns
    -------
    BackgroundSample

    References
    ----------
    Warton, D.I., Renner, I.W. & Ramp, D. (2013) Model-based control of observer bias for
    the analysis of presence-only data in ecology. PLoS ONE 8: e79168.
    Phillips, S.J. et al. (2009) Ecological Applications 19: 181-197 (target-group background).
    """
    common = dict(seed=seed, buffer_km=buffer_km, records=records, exclude_cells=None, with_values=False,
                  per_area=per_area)
    layer = None
    if bias is None:
        if bias_method is not None:
            raise InputError(f"bias_method: {bias_method!r} needs a bias (recording-effort) layer; none was given")
        table, info = _sample(grid, n, bias=None, mask=mask, **common)
    elif bias_method == "weighted":
        table, info = _sample(grid, n, bias=bias, mask=mask, **common)
    elif bias_method == "covariate":
        layer = _check_bias(bias, check_grid_dims(grid))
        surveyed = np.isfinite(layer) & (layer > 0)
        if mask is not None:
            extra = check_same_shape(mask, grid, "mask")
            surveyed &= np.isfinite(extra) & (extra != 0)
        table, info = _sample(grid, n, bias=None, mask=surveyed, **common)
        info["probability"] += " (cells with bias > 0)"
        info["draw"] += "; only cells with bias > 0"
    else:
        raise InputError(f"bias_method: {bias_method!r}; expected 'covariate' or 'weighted' with a bias layer")
    correction = BIAS_CORRECTIONS[bias_method]
    info = {"bias_correction": correction, **info}
    effort = None if layer is None else layer[table["row"].to_numpy(), table["col"].to_numpy()]
    return BackgroundSample(table=table, bias_correction=correction, effort=effort, info=info, effort_layer=layer)


def drop_unrecorded(records: Records, bias, grid) -> tuple[Records, int]:
    """Records without the ones in cells of no recording effort (bias NaN or 0).

    The covariate correction takes log effort at every record, which does not exist where
    the effort is 0 or unknown. The count lands in ``dropped["no_effort"]``.
    """
    layer = _check_bias(bias, check_grid_dims(grid))
    table = records.table
    e = layer[table["row"].to_numpy(dtype=np.int64), table["col"].to_numpy(dtype=np.int64)]
    keep = np.isfinite(e) & (e > 0)
    dropped = dict(records.dropped)
    dropped["no_effort"] = int((~keep).sum())
    out = dataclasses.replace(records, table=table[keep].reset_index(drop=True), dropped=type(records.dropped)(dropped))
    return out, int((~keep).sum())


def _check_bias(bias, grid) -> np.ndarray:
    weights = check_same_shape(bias, grid, "bias")
    negative = weights < 0
    if negative.any():
        raise InputError(
            f"bias: {int(negative.sum())} cells are negative (lowest {np.nanmin(weights):g}); "
            "expected sampling effort >= 0 (NaN or 0 = never sampled)"
        )
    return weights


def _sample(grid, n, *, seed, bias, mask, buffer_km, records, exclude_cells, with_values, per_area):
    """:func:`sample_background` plus a dict describing the draw (for the fit summary)."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"n: {n!r}; expected a positive whole number of background cells")
    grid = check_grid_dims(grid)
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    allowed = valid_cells(grid)
    counts = {"valid": int(allowed.sum())}

    weights = None
    if bias is not None:
        weights = _check_bias(bias, grid)
        allowed &= np.isfinite(weights) & (weights > 0)
        counts["with bias > 0"] = int(allowed.sum())
    if mask is not None:
        layer = check_same_shape(mask, grid, "mask")
        allowed &= np.isfinite(layer) & (layer != 0)
        counts["inside mask"] = int(allowed.sum())
    if buffer_km is not None:
        if records is None:
            raise InputError("buffer_km: given without records; pass the records the buffer is drawn around")
        if not buffer_km > 0:
            raise InputError(f"buffer_km: {buffer_km!r}; expected a positive distance in km")
        allowed &= _within_buffer(grid, allowed, records, float(buffer_km))
        counts[f"within {buffer_km:g} km"] = int(allowed.sum())
    if exclude_cells is not None:
        rows, cols = _cells_of(exclude_cells)
        ok = (rows >= 0) & (rows < ny) & (cols >= 0) & (cols < nx)
        allowed[rows[ok], cols[ok]] = False
        counts["not excluded"] = int(allowed.sum())

    available = int(allowed.sum())
    if available == 0:
        steps = ", ".join(f"{k} {v}" for k, v in counts.items())
        raise InputError(f"background: no cell can be drawn ({steps} of {ny * nx} cells)")
    area = None
    if per_area:
        from envelope.grids import cell_area_km2

        area = cell_area_km2(grid)
    probability = " x ".join((["true cell area"] if per_area else ["1 per cell"]) + (["bias"] if bias is not None else []))
    if available <= n:
        log.warning("background: only %d cells can be drawn, fewer than the %d asked for; taking all of them, "
                    "weighted by %s", available, n, probability)
        flat, weight = _all_cells(allowed, area, weights)
        draw = "every drawable cell once, weighted by " + probability
        n_draws = None
    else:
        flat, weight = _draw_with_replacement(allowed, area, weights, n, np.random.default_rng(seed))
        draw = f"{n} draws with replacement, probability proportional to {probability}; repeats counted as weights"
        n_draws = int(n)
    rows, cols = np.divmod(flat, nx)
    x, y = cell_centres(grid, rows, cols)
    table = pd.DataFrame({"row": rows.astype(np.int64), "col": cols.astype(np.int64), "x": x, "y": y,
                          "weight": weight.astype(np.float64)})
    if with_values:
        values = values_at(grid, rows, cols)
        names = [str(v) for v in grid["variable"].values] if "variable" in grid.dims else [str(grid.name or "value")]
        for k, name in enumerate(names):
            table[name] = values[:, k]
    info = {"per_area": bool(per_area), "probability": probability, "draw": draw, "n_requested": int(n),
            "n_draws": n_draws, "n_drawable_cells": available, "n_cells": int(len(table)),
            "weight_sum": float(table["weight"].sum()), "weight_max": float(table["weight"].max())}
    return table, info


# Cells per band of rows when computing draw weights (cell area x bias), to bound memory.
_WEIGHT_BAND_CELLS = 1_000_000


def _weight_rows(allowed, area, bias, r0, r1) -> np.ndarray:
    """Draw weights (area x bias, 0 where not allowed) of rows r0..r1, float64 (rows, x)."""
    w = allowed[r0:r1].astype(np.float64)
    if area is not None:
        w *= np.asarray(area.isel(y=slice(r0, r1)).values, dtype=np.float64)
    if bias is not None:
        w *= np.where(allowed[r0:r1], bias[r0:r1], 0.0)
    return w


def _bands(ny, nx):
    step = max(1, _WEIGHT_BAND_CELLS // max(nx, 1))
    return [(r0, min(r0 + step, ny)) for r0 in range(0, ny, step)]


def _all_cells(allowed, area, bias):
    """Every allowed cell (flat indices, row-major) with weight area x bias / mean."""
    ny, nx = allowed.shape
    flats, weights = [], []
    for r0, r1 in _bands(ny, nx):
        w = _weight_rows(allowed, area, bias, r0, r1)
        keep = np.flatnonzero(allowed[r0:r1])
        flats.append(keep + r0 * nx)
        weights.append(w.ravel()[keep])
    flat, weight = np.concatenate(flats), np.concatenate(weights)
    return flat, weight / weight.mean()


def _draw_with_replacement(allowed, area, bias, n, rng):
    """``n`` draws with probability proportional to area x bias over the allowed cells.

    Two stages, one band of rows in memory at a time: the number of draws per row is
    multinomial with the rows' total weights, then each row's draws fall on its cells in
    proportion to their weights. Returns the distinct flat indices (row-major) and their
    draw counts.
    """
    ny, nx = allowed.shape
    bands = _bands(ny, nx)
    row_total = np.zeros(ny)
    for r0, r1 in bands:
        row_total[r0:r1] = _weight_rows(allowed, area, bias, r0, r1).sum(axis=1)
    total = row_total.sum()
    if not (np.isfinite(total) and total > 0):
        raise InputError(f"background: the draw weights (cell area x bias) sum to {total:g}; expected a "
                         "positive finite total")
    per_row = rng.multinomial(n, row_total / total)
    flats, counts = [], []
    for r0, r1 in bands:
        busy = np.flatnonzero(per_row[r0:r1])
        if busy.size == 0:
            continue
        w = _weight_rows(allowed, area, bias, r0, r1)
        for i in busy:
            p = w[i] / w[i].sum()
            cols, k = np.unique(rng.choice(nx, size=int(per_row[r0 + i]), p=p), return_counts=True)
            flats.append((r0 + i) * nx + cols)
            counts.append(k)
    return np.concatenate(flats), np.concatenate(counts).astype(np.float64)


def _cells_of(cells):
    if isinstance(cells, Records):
        cells = cells.table
    if isinstance(cells, pd.DataFrame):
        if "row" not in cells.columns or "col" not in cells.columns:
            raise InputError(f"exclude_cells: columns {list(cells.columns)}; expected 'row' and 'col'")
        return cells["row"].to_numpy(dtype=np.int64), cells["col"].to_numpy(dtype=np.int64)
    array = np.asarray(cells, dtype=np.int64)
    if array.ndim != 2 or array.shape[1] != 2:
        raise InputError(f"exclude_cells: shape {array.shape}; expected (k, 2) rows and columns")
    return array[:, 0], array[:, 1]


def _record_points(records):
    if isinstance(records, Records):
        records = records.table
    if isinstance(records, pd.DataFrame):
        if "x" not in records.columns or "y" not in records.columns:
            raise InputError(f"records: columns {list(records.columns)}; expected 'x' and 'y' in the grid CRS")
        x, y = records["x"].to_numpy(dtype=np.float64), records["y"].to_numpy(dtype=np.float64)
    else:
        array = np.asarray(records, dtype=np.float64)
        if array.ndim != 2 or array.shape[1] != 2:
            raise InputError(f"records: shape {array.shape}; expected (k, 2) x and y in the grid CRS")
        x, y = array[:, 0], array[:, 1]
    ok = np.isfinite(x) & np.isfinite(y)
    if not ok.any():
        raise InputError("records: no record with finite x and y to draw a buffer around")
    return x[ok], y[ok]


def _within_buffer(grid, allowed, records, buffer_km) -> np.ndarray:
    """2-D mask of allowed cells whose centre is within ``buffer_km`` of the nearest record."""
    crs = grid_crs(grid)
    rx, ry = _record_points(records)
    search = NeighbourSearch(rx, ry, crs)
    candidate_rows = np.arange(allowed.shape[0])
    if crs.is_geographic:
        # A great circle is never shorter than the difference in latitude (R * dlat), so rows
        # farther in latitude than the buffer from every record cannot qualify.
        band = np.degrees(buffer_km * 1000.0 / EARTH_RADIUS_M)
        lat = np.asarray(grid["y"].values, dtype=np.float64)
        candidate_rows = np.flatnonzero((lat >= ry.min() - band) & (lat <= ry.max() + band))
    inside = np.zeros_like(allowed)
    nx = allowed.shape[1]
    sub = allowed[candidate_rows]
    flat = np.flatnonzero(sub)
    for start in range(0, flat.size, _BATCH):
        chunk = flat[start:start + _BATCH]
        rows = candidate_rows[chunk // nx]
        cols = chunk % nx
        x, y = cell_centres(grid, rows, cols)
        near = search.nearest_km(x, y, upper_km=buffer_km) <= buffer_km
        inside[rows[near], cols[near]] = True
    return inside
