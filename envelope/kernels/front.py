"""The expansion front on a grid: where occupancy crosses a level along each column, and how far it moved."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from envelope.errors import InputError

__all__ = ["FrontShift", "column_front_positions", "front_shift"]


class FrontShift(NamedTuple):
    """Result of :func:`front_shift`.

    Attributes
    ----------
    shift_km : float
        Median over the usable columns of (front position after - before), km, positive in
        the direction in which ``position_km`` grows; ``nan`` when no column is usable.
    n_columns : int
        Columns with a front at both times (the columns the median is taken over).
    n_columns_total : int
        Columns of the grid.
    shifts_km : ndarray, shape (nx,)
        Per-column shift, ``nan`` where a column has no front at one of the times.
    """

    shift_km: float
    n_columns: int
    n_columns_total: int
    shifts_km: np.ndarray


def _as_grid(name, arr, shape=None):
    a = np.asarray(arr)
    if a.dtype not in (np.float32, np.float64):  # float32 is kept: every comparison is made in float64
        a = a.astype(np.float64)
    if a.ndim != 2:
        raise InputError(f"{name} must be a 2-D (rows, columns) array, got shape {a.shape}")
    if shape is not None and a.shape != shape:
        raise InputError(f"{name} has shape {a.shape}, expected {shape}")
    return a


def column_front_positions(occupancy, position_km, *, level=0.5, valid=None):
    """Position of the front in each grid column: the farthest crossing of ``level``, interpolated.

    Along each column, cells are taken in the order of increasing ``position_km`` (the
    poleward coordinate, say). The front of a column lies between the farthest cell whose
    occupancy is ``>= level`` and the next cell beyond it, by linear interpolation of the
    occupancy between the two cell centres:

        x = x_k + (p_k - level) / (p_k - p_{k+1}) * (x_{k+1} - x_k).

    A 0/1 occupancy thus has its front on the boundary between the two cells (midway
    between their centres). A column has no front (``nan``) when no valid cell reaches
    ``level``, when the farthest such cell is the column's last cell (the front lies at or
    beyond the grid's edge), when the next cell beyond it is not valid (no data: the
    crossing is an edge of the data, not of the occupancy), or when ``position_km`` is not
    strictly monotone along the column.

    Parameters
    ----------
    occupancy : ndarray, shape (ny, nx)
        Occupancy or expected occupancy in [0, 1]; NaN counts as not valid.
    position_km : ndarray, shape (ny, nx)
        Coordinate of each cell centre along the direction of advance (km), e.g. the
        meridian arc from the equator, negated in the southern hemisphere.
    level : float, default=0.5
        Occupancy level of the front, in (0, 1].
    valid : ndarray of bool, shape (ny, nx), optional
        Cells with data; default every cell with finite occupancy and position.

    Returns
    -------
    ndarray, shape (nx,)
        Front position per column (km), ``nan`` where the column has no front.

    References
    ----------
    Common practice, no source: the front of a spreading population taken as a level set
    (here the 0.5 contour) of its density or expected occupancy, as in simulation studies
    of integrodifference models.

    Examples
    --------
    >>> import numpy as np
    >>> occ = np.array([[1.0], [0.75], [0.25], [0.0]])
    >>> pos = np.array([[0.0], [1.0], [2.0], [3.0]])
    >>> column_front_positions(occ, pos).tolist()
    [1.5]
    """
    occ = _as_grid("occupancy", occupancy)
    pos = _as_grid("position_km", position_km, occ.shape)
    level = float(level)
    if not (0.0 < level <= 1.0):
        raise InputError(f"level must lie in (0, 1], got {level!r}")
    ok = np.isfinite(occ) & np.isfinite(pos)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != occ.shape:
            raise InputError(f"valid has shape {v.shape}, expected {occ.shape}")
        ok &= v
    ny, nx = occ.shape
    out = np.full(nx, np.nan)
    if ny < 2:
        return out
    # Orient every column so that the position grows with the row index (a reversed view
    # when all columns run the same way, as on any grid whose rows are parallels).
    flip = pos[-1] < pos[0]
    if flip.all():
        occ, pos, ok = occ[::-1], pos[::-1], ok[::-1]
    elif flip.any():
        occ = np.where(flip, occ[::-1], occ)
        pos = np.where(flip, pos[::-1], pos)
        ok = np.where(flip, ok[::-1], ok)
    with np.errstate(invalid="ignore"):
        if pos.strides[1] == 0:  # one position per row (a broadcast view): every column alike
            monotone = np.broadcast_to(np.all(np.diff(pos[:, :1], axis=0) > 0, axis=0), (nx,))
        else:
            monotone = np.all(np.diff(pos, axis=0) > 0, axis=0)
    above = ok & np.greater_equal(occ, np.float64(level))  # in float64, whatever the occupancy's dtype
    has = above.any(axis=0)
    last = ny - 1 - np.argmax(above[::-1], axis=0)  # farthest cell at or above the level
    cols = np.arange(nx)
    nxt = np.minimum(last + 1, ny - 1)
    usable = has & monotone & (last < ny - 1) & ok[nxt, cols]
    k, c = last[usable], cols[usable]
    p0, p1 = occ[k, c].astype(np.float64), occ[k + 1, c].astype(np.float64)
    x0, x1 = pos[k, c], pos[k + 1, c]
    out[usable] = x0 + (p0 - level) / (p0 - p1) * (x1 - x0)
    return out


def front_shift(before, after, position_km, *, level=0.5, valid=None, valid_after=None):
    """Median over grid columns of the shift of the front between two occupancy grids.

    Each column's front is located with :func:`column_front_positions` at both times;
    columns with no front at either time are skipped, and the shift is the median over the
    remaining columns of (position after - position before).

    Parameters
    ----------
    before, after : ndarray, shape (ny, nx)
        Occupancy at the start and at the end.
    position_km : ndarray, shape (ny, nx)
        Coordinate along the direction of advance (km), see :func:`column_front_positions`.
    level : float, default=0.5
    valid : ndarray of bool, optional
        Cells with data at the start (and at the end unless ``valid_after`` is given).
    valid_after : ndarray of bool, optional
        Cells with data at the end.

    Returns
    -------
    FrontShift

    Examples
    --------
    >>> import numpy as np
    >>> pos = np.repeat(np.arange(6.0)[:, None], 2, axis=1)
    >>> a = (pos < 2).astype(float)
    >>> b = (pos < 4).astype(float)
    >>> front_shift(a, b, pos).shift_km
    2.0
    """
    x0 = column_front_positions(before, position_km, level=level, valid=valid)
    x1 = column_front_positions(after, position_km, level=level, valid=valid if valid_after is None else valid_after)
    shifts = x1 - x0
    used = np.isfinite(shifts)
    n = int(used.sum())
    shift = float(np.median(shifts[used])) if n else float("nan")
    return FrontShift(shift, n, int(shifts.size), shifts)
