"""Fast exact percentile-envelope suitability of grid cells: per variable, its score tabulated between the values where it changes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from envelope.errors import InputError
from envelope.kernels.steps import Scratch, above, at_least, step_index

__all__ = ["BLOCK_CELLS", "PercentileTable", "compile_percentile", "percentile_suitability"]

#: Cells evaluated together: numpy's per-call overhead is spread over enough cells, and two
#: dask threads running two blocks do not wait on each other for Python's GIL between NumPy
#: calls: bench/bench_pieces.py measured two 19 x 512 x 1024 windows on two threads in
#: 227-246 ms in pieces of 16 384, 151 ms in 32 768 and 76-82 ms in 131 072 (one window
#: alone: 69-92, 76 and 65 ms).
BLOCK_CELLS = 131072


@dataclass(frozen=True)
class PercentileTable:
    """A minimum of per-variable step functions, compiled for inputs of one dtype.

    Attributes
    ----------
    indexes : tuple of :class:`~envelope.kernels.steps.StepIndex`
        Per variable, its pivots (``points=True``): every value of the dtype at which the
        variable's score may change.
    levels : ndarray of float64
        Every score any variable can take, and 1, sorted and distinct.
    ranks : tuple of ndarray of int16 or int32
        Per variable, the rank in ``levels`` of its score for each code of its index (-1
        in a crowded bucket). Ranks order as the scores do, so the minimum is taken over
        small integers and turned into a score once per cell.
    event_ranks : tuple of ndarray
        Per variable, the rank for each event count (for the values of crowded buckets).
    """

    indexes: tuple
    levels: np.ndarray
    ranks: tuple
    event_ranks: tuple

    @property
    def dtype(self) -> np.dtype:
        return self.indexes[0].dtype

    @property
    def n_vars(self) -> int:
        return len(self.indexes)


def compile_percentile(variable_score, presence_values, *, lower=None, upper=None,
                       dtype=np.float32) -> PercentileTable:
    """Tabulate a percentile envelope for inputs of ``dtype``, clamping included.

    A percentile envelope's score of variable ``j`` depends on its value only through how
    it compares with the presence values (below, equal, above each), and clamping into
    ``[lower_j, upper_j]`` only through whether it is above ``lower_j`` and below
    ``upper_j``. So between consecutive pivots -- the smallest values of ``dtype`` at or
    above each presence value and at or above the upper bound, and the smallest above the
    lower bound -- and on each pivot the clamped score is constant, and one representative
    value per piece, clamped in float64 and scored by ``variable_score`` itself, gives the
    score of every value there: the table reproduces the estimator exactly, clamping and
    all, with no per-cell clamp.

    Parameters
    ----------
    variable_score : callable ``(j, x) -> scores``
        The estimator's own score of variable ``j`` at float64 values ``x``
        (:meth:`envelope.models.percentile.PercentileEnvelope.variable_score`); suitability
        is the minimum over the variables, starting from 1.
    presence_values : sequence of 1-D arrays
        Per variable, the values where its score changes (the distinct presence values).
    lower, upper : array-like of shape (n_vars,), optional
        Clamping bounds (the training range), applied as ``numpy.clip`` in float64.
    dtype : float32 or float64, default=float32
        The dtype of the climate values to be looked up.

    Returns
    -------
    PercentileTable
    """
    dtype = np.dtype(dtype)
    if dtype not in (np.float32, np.float64):
        raise InputError(f"dtype: {dtype}; expected float32 or float64")
    lo = None if lower is None else np.asarray(lower, dtype=np.float64)
    hi = None if upper is None else np.asarray(upper, dtype=np.float64)
    indexes, event_scores = [], []
    for j, values in enumerate(presence_values):
        pivots = [at_least(np.ravel(values), dtype)]
        if lo is not None:
            pivots.append(above(lo[j:j + 1], dtype))
        if hi is not None:
            pivots.append(at_least(hi[j:j + 1], dtype))
        index = step_index(np.concatenate(pivots), dtype, points=True)
        x = _representatives(index.pivots).astype(np.float64)
        if lo is not None or hi is not None:
            np.clip(x, None if lo is None else lo[j], None if hi is None else hi[j], out=x)
        indexes.append(index)
        event_scores.append(np.asarray(variable_score(j, x), dtype=np.float64))
    if not indexes:
        raise InputError("presence_values: no variables; expected one array of values per variable")
    levels = np.unique(np.concatenate(event_scores + [np.ones(1)]))
    rank_type = np.int16 if levels.size < np.iinfo(np.int16).max else np.int32
    event_ranks = [np.searchsorted(levels, score).astype(rank_type) for score in event_scores]
    ranks = [index.expand(rank, -1) for index, rank in zip(indexes, event_ranks)]  # -1: a crowded bucket
    return PercentileTable(tuple(indexes), levels, tuple(ranks), tuple(event_ranks))


def _representatives(pivots: np.ndarray) -> np.ndarray:
    """One value per event count 0..2q: below the first pivot, on each pivot, and just
    above each (an empty gap's value is never looked up)."""
    up = np.nextafter(pivots, pivots.dtype.type(np.inf))
    out = np.empty(2 * pivots.size + 1, dtype=pivots.dtype)
    out[0] = np.nextafter(pivots[0], pivots.dtype.type(-np.inf)) if pivots.size else 0
    out[1::2] = pivots
    out[2::2] = up
    return out


def percentile_suitability(table: PercentileTable, X, *, block_cells: int = BLOCK_CELLS) -> np.ndarray:
    """Suitability (float64) of the cells ``X`` (n_vars, n_cells); NaN where any variable
    is NaN or ±inf.

    Each variable's row is looked up ``block_cells`` at a time in a few array passes
    (:meth:`~envelope.kernels.steps.StepIndex.codes`, one gather of the score's rank), and
    the running minimum over the variables starts from 1, as in the estimator. ``X`` must have
    the table's dtype, or any dtype when the table is float64 (converted piece by piece).
    """
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[0] != table.n_vars:
        raise InputError(f"X: shape {X.shape}; expected ({table.n_vars}, cells) with the model's variables as rows")
    convert = X.dtype != table.dtype
    if convert and table.dtype != np.float64:
        raise InputError(f"X: {X.dtype} values; the table was compiled for {table.dtype}")
    n = X.shape[1]
    out = np.empty(n, dtype=np.float64)
    scratch = Scratch(min(block_cells, max(n, 1)), table.dtype)
    row = np.empty(scratch.width, table.dtype) if convert else None
    rank_type = table.ranks[0].dtype
    rank, best = np.empty(scratch.width, rank_type), np.empty(scratch.width, rank_type)
    with np.errstate(over="ignore"):  # values far outside the pivots overflow harmlessly while bucketed
        for start in range(0, n, block_cells):
            _envelope_piece(table, X, start, min(start + block_cells, n), out, scratch, row, rank, best)
    return out


def _envelope_piece(table, X, start, stop, out, scratch, row, rank, best):
    m = stop - start
    r, b = rank[:m], best[:m]
    b.fill(table.levels.size - 1)  # the rank of 1, the estimator's starting value
    for j, (index, ranks) in enumerate(zip(table.indexes, table.ranks)):
        x = X[j, start:stop]
        if row is not None:
            x = row[:m]
            np.copyto(x, X[j, start:stop], casting="unsafe")
        code = index.codes(x, scratch)
        # "wrap": every code is in range; the default mode stages `out` through a copy
        np.take(ranks, code, out=r, mode="wrap")
        if index.any_crowded:
            fix = np.flatnonzero(r < 0)
            if fix.size:
                r[fix] = table.event_ranks[j][index.exact(x[fix])]
        np.minimum(b, r, out=b)
    suitability = out[start:stop]
    np.take(table.levels, b, out=suitability, mode="wrap")
    suitability[~np.isfinite(X[:, start:stop]).all(axis=0)] = np.nan
