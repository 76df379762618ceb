"""Background (pseudo-absence) cells drawn at random from the valid cells of a grid."""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
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
) -> pd.DataFrame:
    """Draw ``n`` distinct background cells at random from the grid's valid cells.

    A cell is valid when every variable is finite there. Only 2-D layers (the valid mask,
    and the bias and mask layers when given) are held in memory; the stack itself is
    reduced chunk by chunk, and values are read at the drawn cells only.

    Parameters
    ----------
    grid : xarray.DataArray
        Climate stack (variable, y, x) or single layer (y, x), with a CRS.
    n : int, default=10_000
        Cells to draw. If fewer are available, all of them are taken and a warning logged.
    seed : int, default=0
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same cells.
    bias : xarray.DataArray or numpy.ndarray (y, x), optional
        Sampling effort, >= 0: cells are drawn with probability proportional to it
        (successive sampling without replacement). NaN or 0 cells are never drawn; a
        negative value is an InputError. Target-group background (Phillips et al. 2009).
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

    Returns
    -------
    pandas.DataFrame
        ``row``, ``col``, ``x``, ``y`` (cell centres, grid CRS), sorted by row then column.

    References
    ----------
    Phillips, S.J. et al. (2009) Sample selection bias and presence-only distribution
    models: implications for background and pseudo-absence data. Ecological Applications
    19: 181-197.
    VanDerWal, J. et al. (2009) Selecting pseudo-absence data for presence-only distribution
    modeling: how far should you stray from what you know? Ecological Modelling 220: 589-594.

    Examples
    --------
    >>> cells = sample_background(stack, 500, seed=1)        # doctest: +SKIP
    >>> cells.columns.tolist()                               # doctest: +SKIP
    ['row', 'col', 'x', 'y']
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"n: {n!r}; expected a positive whole number of background cells")
    grid = check_grid_dims(grid)
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    allowed = valid_cells(grid)
    counts = {"valid": int(allowed.sum())}

    weights = None
    if bias is not None:
        weights = check_same_shape(bias, grid, "bias")
        negative = weights < 0
        if negative.any():
            raise InputError(
                f"bias: {int(negative.sum())} cells are negative (lowest {np.nanmin(weights):g}); "
                "expected sampling effort >= 0 (NaN or 0 = never sampled)"
            )
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
    rng = np.random.default_rng(seed)
    if available <= n:
        log.warning("background: only %d cells can be drawn, fewer than the %d asked for; taking all of them",
                    available, n)
        flat = np.flatnonzero(allowed)
    elif weights is None:
        flat = _flat_from_ranks(allowed, rng.choice(available, size=n, replace=False))
    else:
        candidates = np.flatnonzero(allowed)
        p = weights.ravel()[candidates]
        flat = rng.choice(candidates, size=n, replace=False, p=p / p.sum())
    flat = np.sort(flat)
    rows, cols = np.divmod(flat, nx)
    x, y = cell_centres(grid, rows, cols)
    table = pd.DataFrame({"row": rows.astype(np.int64), "col": cols.astype(np.int64), "x": x, "y": y})
    if with_values:
        values = values_at(grid, rows, cols)
        names = [str(v) for v in grid["variable"].values] if "variable" in grid.dims else [str(grid.name or "value")]
        for k, name in enumerate(names):
            table[name] = values[:, k]
    return table


def _flat_from_ranks(allowed: np.ndarray, ranks: np.ndarray) -> np.ndarray:
    """Flat indices of the ``ranks``-th True cells of ``allowed`` (row-major), without listing all of them."""
    per_row = allowed.sum(axis=1)
    ends = np.cumsum(per_row)
    row_of = np.searchsorted(ends, ranks, side="right")
    within = ranks - (ends[row_of] - per_row[row_of])
    flat = np.empty(ranks.size, dtype=np.int64)
    nx = allowed.shape[1]
    for row in np.unique(row_of):
        pick = row_of == row
        flat[pick] = row * nx + np.flatnonzero(allowed[row])[within[pick]]
    return flat


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
