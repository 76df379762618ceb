"""Multivariate environmental similarity surface (MESS) and most-dissimilar variable against a training reference."""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from envelope.errors import InputError

__all__ = ["PERCENTILE_LEVELS", "CountingTable", "MessReference", "count_below", "position_among",
           "reference_from_training", "mess", "mess_cells"]

#: Percentile levels kept per variable for the model file's description of the training climate.
PERCENTILE_LEVELS = (0.0, 1.0, 5.0, 10.0, 25.0, 50.0, 75.0, 90.0, 95.0, 99.0, 100.0)

#: Default cap on reference values kept per variable (see :func:`reference_from_training`).
MAX_REFERENCE_VALUES = 10_000


@dataclass(frozen=True)
class MessReference:
    """The training climate MESS compares against, small enough for a model file.

    Attributes
    ----------
    values : ndarray, shape (n_kept, n_variables)
        Each column sorted ascending: all reference values, or evenly spaced order
        statistics of them when there were more than the cap (first and last row are the
        exact minimum and maximum).
    minimum, maximum : ndarray, shape (n_variables,)
    percentile_levels : tuple of float
    percentiles : ndarray, shape (len(percentile_levels), n_variables)
        ``numpy.percentile`` (linear) of the full reference, for describing the model.
    n_source : int
        Number of complete reference rows (distinct cells when cell ids were given) before
        any thinning.
    """

    values: np.ndarray
    minimum: np.ndarray
    maximum: np.ndarray
    percentile_levels: tuple = field(default=PERCENTILE_LEVELS)
    percentiles: np.ndarray | None = None
    n_source: int = 0

    @property
    def n_variables(self) -> int:
        return int(self.values.shape[1])

    def to_dict(self) -> dict:
        """JSON-ready dict (lists of floats) for the model file's ``mess_reference``."""
        return {
            "kind": "sorted-reference",
            "n_source": int(self.n_source),
            "values": self.values.T.tolist(),  # one list per variable
            "minimum": self.minimum.tolist(),
            "maximum": self.maximum.tolist(),
            "percentile_levels": list(self.percentile_levels),
            "percentiles": None if self.percentiles is None else self.percentiles.T.tolist(),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "MessReference":
        """Inverse of :meth:`to_dict`; InputError naming the key when something is missing."""
        try:
            values = np.asarray(data["values"], dtype=np.float64).T
            minimum = np.asarray(data["minimum"], dtype=np.float64)
            maximum = np.asarray(data["maximum"], dtype=np.float64)
        except KeyError as exc:
            raise InputError(f"mess_reference: key {exc.args[0]!r} is missing; expected 'values', "
                             "'minimum' and 'maximum'") from None
        except (TypeError, ValueError):
            raise InputError("mess_reference['values']: expected one equally long list of numbers "
                             "per variable") from None
        if values.ndim != 2 or values.shape[0] == 0 or minimum.shape != (values.shape[1],) \
                or maximum.shape != minimum.shape:
            raise InputError(f"mess_reference: values of shape {values.shape[::-1]} (variables, values) "
                             f"and {minimum.size} minima / {maximum.size} maxima do not agree")
        pct = data.get("percentiles")
        return cls(values=np.sort(values, axis=0), minimum=minimum, maximum=maximum,
                   percentile_levels=tuple(data.get("percentile_levels", PERCENTILE_LEVELS)),
                   percentiles=None if pct is None else np.asarray(pct, dtype=np.float64).T,
                   n_source=int(data.get("n_source", values.shape[0])))

    @functools.cached_property
    def counting_tables(self) -> list:
        """Per variable a :class:`CountingTable` for :func:`count_below`, built once."""
        n = self.values.shape[0]
        tables = []
        for i in range(self.n_variables):
            unique, first = np.unique(self.values[:, i], return_index=True)
            below = np.r_[first, n]
            # interior similarity for each possible count, written exactly as the formula
            # (f = 100 c / n; S = 2 f or 2 (100 - f) = 200 - 2 f, doubling being exact),
            # so ties between variables break as in the formula
            two_f = 2.0 * (100.0 * below / n)
            tables.append(CountingTable(unique, np.r_[unique, np.inf], below, np.minimum(two_f, 200.0 - two_f),
                                        np.arange(unique.size, dtype=np.float64)))
        return tables


@dataclass(frozen=True)
class CountingTable:
    """One variable's sorted distinct reference values and what each position means.

    Position ``g`` (0..m) = number of distinct values below a point; ``below[g]`` = number
    of reference values below it; ``similarity[g]`` = the MESS similarity S there (valid
    between the extremes, 0 < g < m).
    """

    unique: np.ndarray
    padded: np.ndarray       # unique values, then +inf
    below: np.ndarray
    similarity: np.ndarray
    positions: np.ndarray    # 0.0 .. m-1


def reference_from_training(X_ref, *, max_values: int = MAX_REFERENCE_VALUES, cells=None) -> MessReference:
    """Summarise the training climate (background + presences) as a MESS reference.

    With ``cells`` (one id per row, e.g. the grid-cell index), rows sharing an id are
    counted once, the first of them kept: a presence cell that was also drawn as
    background is then not counted twice. Rows with any NaN are dropped.

    Design choice: MESS needs the share of reference values below a point (f below), so
    the model file keeps the sorted reference itself rather than a few quantiles. Up to
    ``max_values`` rows it keeps every value, so :func:`mess` is exact; above that it keeps
    ``max_values`` evenly spaced order statistics (ranks ``round(linspace(0, n − 1,
    max_values))``, including the exact minimum and maximum), and f is then off by at most
    about 100/``max_values`` percentage points.

    Parameters
    ----------
    X_ref : array_like, shape (n_records, n_variables)
    max_values : int, default=10 000
    cells : array_like of int, shape (n_records,), optional
        Cell id per row; duplicates after the first are dropped before anything else.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) The art of modelling range-shifting species.
    Methods Ecol. Evol. 1: 330–342 (MESS, supporting information).
    """
    X = np.asarray(X_ref, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise InputError(f"X_ref: array of {X.ndim} dimensions; expected (records, variables)")
    if cells is not None:
        cells = np.asarray(cells).ravel()
        if cells.shape[0] != X.shape[0]:
            raise InputError(f"cells: {cells.shape[0]} cell ids for {X.shape[0]} rows; expected one per row")
        X = X[np.sort(np.unique(cells, return_index=True)[1])]
    X = X[~np.isnan(X).any(axis=1)]
    if X.shape[0] == 0:
        raise InputError("X_ref: no complete rows (every record has a NaN); expected training "
                         "climate values")
    if not np.isfinite(X).all():
        raise InputError("X_ref: infinite values; expected finite climate values")
    max_values = int(max_values)
    if max_values < 2:
        raise InputError(f"max_values: {max_values}; expected at least 2")
    ordered = np.sort(X, axis=0)
    n = ordered.shape[0]
    kept = ordered if n <= max_values else ordered[np.round(np.linspace(0, n - 1, max_values)).astype(np.intp)]
    return MessReference(values=kept, minimum=ordered[0].copy(), maximum=ordered[-1].copy(),
                         percentile_levels=PERCENTILE_LEVELS,
                         percentiles=np.percentile(X, PERCENTILE_LEVELS, axis=0), n_source=n)


def mess(X, reference: MessReference):
    """MESS value and most-dissimilar variable for each row of ``X``.

    For variable i with reference values r, f_i = 100 × #(r < p_i)/n and
    S_i = 100 (p_i − min)/(max − min) if f_i = 0; 2 f_i if 0 < f_i ≤ 50;
    2 (100 − f_i) if 50 < f_i < 100; 100 (max − p_i)/(max − min) if f_i = 100.
    MESS = min_i S_i (negative: at least one variable outside the reference range) and the
    most dissimilar variable is the argmin (first on ties). Because f counts values
    strictly below p, a point at the reference maximum gets 2 (100 − f) > 0, not 0: S jumps
    from that value to ≤ 0 just above the maximum. A zero-range reference variable gives
    S = 0 at its value and −100 elsewhere (a convention of this library).

    Parameters
    ----------
    X : array_like, shape (n_cells, n_variables)
        Climate values, columns in the reference's variable order. Memory O(n_cells):
        the loop runs over variables, vectorised over cells.
    reference : MessReference

    Returns
    -------
    mess_values : ndarray of float64, shape (n_cells,)
        NaN where any variable is NaN.
    most_dissimilar_index : ndarray of int64, shape (n_cells,)
        Column index of the most dissimilar variable; −1 where the row has a NaN.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) The art of modelling range-shifting species.
    Methods Ecol. Evol. 1: 330–342 (Appendix S3).

    Examples
    --------
    >>> ref = reference_from_training(np.arange(1.0, 11.0))
    >>> mess(np.array([[3.5], [12.0]]), ref)[0].round(4).tolist()
    [60.0, -22.2222]
    """
    if not isinstance(reference, MessReference):
        raise InputError(f"reference: got {type(reference).__name__}; expected a MessReference "
                         "(reference_from_training or MessReference.from_dict)")
    X = np.asarray(X)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[1] != reference.n_variables:
        raise InputError(f"X: shape {X.shape}; expected (cells, {reference.n_variables}) with the "
                         "reference's variables as columns")
    values, index = mess_cells(X.T, reference)
    return values, index


#: Cells evaluated together by :func:`mess_cells` (one float64 row is 128 KiB).
BLOCK_CELLS = 16384


def mess_cells(X, reference: MessReference, *, block_cells: int = BLOCK_CELLS):
    """:func:`mess` for cells laid out variable-major: ``X`` of shape (n_variables, n_cells).

    This is the layout of a climate block (variables outermost), so a grid wrapper needs
    no transposed float64 copy; float32 input is fine. Cells are processed
    ``block_cells`` at a time. Between the reference extremes the similarity depends on
    the count ``c`` of reference values below ``p`` only: with ``n`` reference values,
    ``f = 100 c / n`` and ``S = min(2 f, 200 − 2 f)``; the two extreme formulas are
    applied only to the cells with ``c = 0`` or ``c = n``.

    Returns
    -------
    mess_values : ndarray of float64, shape (n_cells,)
    most_dissimilar_index : ndarray of int64, shape (n_cells,); −1 where a variable is NaN
    """
    if not isinstance(reference, MessReference):
        raise InputError(f"reference: got {type(reference).__name__}; expected a MessReference "
                         "(reference_from_training or MessReference.from_dict)")
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[0] != reference.n_variables:
        raise InputError(f"X: shape {X.shape}; expected ({reference.n_variables}, cells) with the "
                         "reference's variables as rows")
    tables = reference.counting_tables
    n = X.shape[1]
    best_all = np.empty(n)
    index_all = np.zeros(n, dtype=np.int64)
    for start in range(0, n, block_cells):
        stop = min(start + block_cells, n)
        best = best_all[start:stop]
        best.fill(np.inf)
        index = index_all[start:stop]
        for i, table in enumerate(tables):
            p = X[i, start:stop]
            g = position_among(table, p)  # distinct reference values below p; NaN -> all
            s = table.similarity[g]
            # at or below the minimum (g = 0) or above the maximum (g = m, NaN included)
            g -= 1
            edge = np.flatnonzero(g.view(np.uintp) >= table.unique.size - 1)
            if edge.size:
                s[edge] = _extreme_similarity(p[edge].astype(np.float64), g[edge] < 0,
                                              float(reference.minimum[i]), float(reference.maximum[i]))
            lower = s < best  # strict: the first variable wins ties; NaN never lower
            np.copyto(index, i, where=lower)
            np.minimum(best, s, out=best)  # NaN propagates: a missing variable makes the cell NaN
        index[np.isnan(best)] = -1
    return best_all, index_all


def position_among(table: CountingTable, p) -> np.ndarray:
    """Number of distinct reference values strictly below each ``p`` (NaN: all of them).

    Climate grids are smooth, so neighbouring cells fall near each other in the reference,
    and ``numpy.interp`` (whose search starts from the previous cell's answer) finds the
    fractional position ``t`` among the distinct values about twice as fast as a fresh
    binary search. ``ceil(t)`` is the count or one less (when rounding puts ``t`` on an
    integer just above a value); one comparison fixes that, so the result is exact.
    """
    t = np.interp(p, table.unique, table.positions)
    np.fmin(t, table.unique.size, out=t)  # NaN -> m (fmin ignores NaN)
    np.ceil(t, out=t)
    g = t.astype(np.intp)
    g += table.padded[g] < p
    return g


def count_below(table: CountingTable, p) -> np.ndarray:
    """Reference values strictly below each ``p``: ``searchsorted(reference, p, "left")``."""
    return table.below[position_among(table, p)]


def _extreme_similarity(p, below, lo: float, hi: float) -> np.ndarray:
    """S at or below the reference minimum (``below``) or above its maximum (Elith et al. 2010)."""
    span = hi - lo
    if span > 0:
        s = np.where(below, p - lo, hi - p) * (100.0 / span)
    else:
        # a constant reference variable: similar only at that value, otherwise fully novel
        s = np.where(p == lo, 0.0, -100.0)
    s[np.isnan(p)] = np.nan
    return s
