"""Multivariate environmental similarity surface (MESS) and most-dissimilar variable against a training reference."""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from envelope.errors import InputError
from envelope.kernels.steps import Scratch, StepIndex, above, step_index

__all__ = ["PERCENTILE_LEVELS", "MessLookup", "MessReference", "VariableSteps", "reference_from_training", "mess",
           "mess_cells", "mess_layers"]

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
        # the kept values always include the exact extremes (reference_from_training), and
        # mess relies on it: an extreme S is <= 0, an interior one > 0
        if not (np.array_equal(minimum, values.min(axis=0)) and np.array_equal(maximum, values.max(axis=0))):
            raise InputError("mess_reference: 'minimum' and 'maximum' are not the smallest and largest of "
                             "'values'; expected the reference as written by reference_from_training")
        pct = data.get("percentiles")
        return cls(values=np.sort(values, axis=0), minimum=minimum, maximum=maximum,
                   percentile_levels=tuple(data.get("percentile_levels", PERCENTILE_LEVELS)),
                   percentiles=None if pct is None else np.asarray(pct, dtype=np.float64).T,
                   n_source=int(data.get("n_source", values.shape[0])))

    @functools.cached_property
    def _lookups(self) -> dict:
        return {}

    def lookup(self, dtype=np.float64) -> "MessLookup":
        """The search tables of :func:`mess_cells` for values of ``dtype``, built once per dtype."""
        dtype = np.dtype(dtype)
        if dtype not in self._lookups:
            self._lookups[dtype] = _build_lookup(self, dtype)
        return self._lookups[dtype]


@dataclass(frozen=True)
class VariableSteps:
    """One variable's MESS as a table over the codes of its :class:`StepIndex`.

    ``index`` places a value ``p`` among the thresholds ``above(r)`` of the reference
    values ``r`` (``p >= above(r)`` exactly when ``r < p``), so its event count ``e``, the
    number of distinct thresholds at or below ``p``, fixes how many reference values are
    below ``p``: ``e = 0`` at or below the minimum and ``e = q`` above the maximum (the
    extremes), anything between is interior. ``keys`` holds, per code, the interior S as a
    key (see :class:`MessLookup`), -1 at the extremes, or :data:`CROWDED` in a crowded
    bucket, whose values take ``event_keys`` (the same keys by event count) after an exact
    search.
    """

    index: StepIndex
    keys: np.ndarray
    event_keys: np.ndarray


@dataclass(frozen=True)
class MessLookup:
    """Everything :func:`mess_cells` needs for values of one dtype, built once per reference.

    Between the extremes S depends only on the count ``c`` of reference values below ``p``
    (``f = 100 c / n``, ``S = min(2 f, 200 − 2 f)``, the same ``n`` for every variable), so
    the S of all variables are drawn from one short sorted list, ``levels``. A variable's
    interior S is stored as the integer key ``(rank of S in levels + 1) × n_variables +
    variable``: the smallest key over the variables is the smallest S, and among equal S the
    first variable (as in the formula's argmin), in one integer minimum per variable.
    """

    variables: tuple
    levels: np.ndarray        # float64, index 0 unused (NaN), then the sorted distinct interior S
    levels32: np.ndarray      # the same rounded to float32
    n_variables: int
    low_cut: np.ndarray       # per variable: p <= minimum exactly when p < low_cut (values' dtype)
    high_cut: np.ndarray      # per variable: p > maximum exactly when p >= high_cut


def _build_lookup(reference: MessReference, dtype: np.dtype) -> MessLookup:
    n = reference.values.shape[0]
    n_vars = reference.n_variables
    # S of every possible count, written exactly as the formula (f = 100 c / n; S = 2 f or
    # 2 (100 - f) = 200 - 2 f, doubling being exact), so ties between variables break as in it
    two_f = 2.0 * (100.0 * np.arange(n + 1) / n)
    levels = np.unique(np.minimum(two_f, 200.0 - two_f))
    key_type = np.int32 if (levels.size + 2) * n_vars < np.iinfo(np.int32).max else np.int64
    variables = []
    for i in range(n_vars):
        thresholds = above(reference.values[:, i], dtype)  # sorted with the values
        index = step_index(thresholds, dtype)
        q = index.pivots.size
        below = np.r_[0, np.searchsorted(thresholds, index.pivots, side="right")]
        two_f = 2.0 * (100.0 * below / n)
        similarity = np.minimum(two_f, 200.0 - two_f)
        keys = (np.searchsorted(levels, similarity) + 1) * n_vars + i
        keys[[0, q]] = -1  # the extremes: S needs the value itself, not only the count
        keys = keys.astype(key_type)
        variables.append(VariableSteps(index, index.expand(keys, CROWDED), keys))
    levels = np.r_[np.nan, levels]
    # edges as the step index sees them: at or below the smallest kept value, above the largest
    return MessLookup(tuple(variables), levels, levels.astype(np.float32), n_vars,
                      above(reference.values[0], dtype), above(reference.values[-1], dtype))


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


#: Key of a value in a crowded bucket of its variable's index (searched exactly instead).
CROWDED = -2

#: Cells evaluated together by :func:`mess_cells`: numpy's per-call overhead is spread over
#: enough cells, and two dask threads running two blocks do not spend their time waiting on
#: each other for Python's GIL between the many short NumPy calls: bench/bench_pieces.py
#: measured two 19 x 512 x 1024 windows on two threads in 177-187 ms in pieces of 16 384,
#: 116 ms in 32 768 and 65-68 ms in 131 072 (one window alone: 57-73, 60 and 34-50 ms).
BLOCK_CELLS = 131072


def mess_cells(X, reference: MessReference, *, block_cells: int = BLOCK_CELLS):
    """:func:`mess` for cells laid out variable-major: ``X`` of shape (n_variables, n_cells).

    This is the layout of a climate block (variables outermost), so a grid wrapper needs
    no transposed float64 copy; float32 input is searched as float32 (against the exact
    float32 thresholds of the reference, :func:`envelope.kernels.steps.above`). Cells are
    processed ``block_cells`` at a time, each variable's row in one pass of a few array
    operations: the :class:`~envelope.kernels.steps.StepIndex` of the reference values
    gives the count of values below ``p``, a table lookup its interior S as an integer key
    (:class:`MessLookup`), and one integer minimum keeps the smallest S and the first
    variable reaching it. Only cells with some variable at or beyond the reference extremes
    (or NaN) are evaluated again with the extreme formulas, variable by variable.

    Returns
    -------
    mess_values : ndarray of float64, shape (n_cells,)
    most_dissimilar_index : ndarray of int64, shape (n_cells,); −1 where a variable is NaN
    """
    X = _checked_cells(X, reference)
    values = np.empty(X.shape[1])
    index = np.empty(X.shape[1], dtype=np.int64)
    with np.errstate(over="ignore"):  # values far outside the reference overflow harmlessly while bucketed
        _mess_pieces(X, reference, values, index, block_cells, nodata_nonfinite=False)
    return values, index


def mess_layers(X, reference: MessReference, *, block_cells: int = BLOCK_CELLS) -> np.ndarray:
    """:func:`mess_cells` as the two float32 layers of a MESS raster, shape (2, n_cells).

    Layer 0 is the MESS value, layer 1 the most dissimilar variable's index; both are NaN
    where any variable is NaN or ±inf (nodata, as for suitability). Values equal
    ``mess_cells`` rounded to float32.
    """
    X = _checked_cells(X, reference)
    out = np.empty((2, X.shape[1]), dtype=np.float32)
    with np.errstate(over="ignore"):
        _mess_pieces(X, reference, out[0], out[1], block_cells, nodata_nonfinite=True)
    return out


def _checked_cells(X, reference) -> np.ndarray:
    if not isinstance(reference, MessReference):
        raise InputError(f"reference: got {type(reference).__name__}; expected a MessReference "
                         "(reference_from_training or MessReference.from_dict)")
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[0] != reference.n_variables:
        raise InputError(f"X: shape {X.shape}; expected ({reference.n_variables}, cells) with the "
                         "reference's variables as rows")
    if X.dtype not in (np.float32, np.float64):
        X = X.astype(np.float64)
    return X


def _mess_pieces(X, reference, values_out, index_out, block_cells, *, nodata_nonfinite):
    """Fill ``values_out`` / ``index_out`` (float64 and int64, or both float32 with NaN
    for a missing index) piece by piece."""
    lookup = reference.lookup(X.dtype)
    n_vars, n = X.shape
    levels = lookup.levels if values_out.dtype == np.float64 else lookup.levels32
    scratch = Scratch(min(block_cells, max(n, 1)), X.dtype)
    key_type = lookup.variables[0].keys.dtype
    key, best = np.empty(scratch.width, key_type), np.empty(scratch.width, key_type)
    rank, variable = np.empty(scratch.width, key_type), np.empty(scratch.width, key_type)
    for start in range(0, n, block_cells):
        stop = min(start + block_cells, n)
        m = stop - start
        b = best[:m]
        b.fill(np.iinfo(key_type).max)
        k = key[:m]
        for i, var in enumerate(lookup.variables):
            x = X[i, start:stop]
            code = var.index.codes(x, scratch)
            np.take(var.keys, code, out=k, mode="wrap")  # in range: "wrap" only avoids a staging copy
            if var.index.any_crowded:
                fix = np.flatnonzero(k == CROWDED)
                if fix.size:
                    k[fix] = var.event_keys[var.index.exact(x[fix])]
            np.minimum(b, k, out=b)
        np.divmod(b, n_vars, out=(rank[:m], variable[:m]))
        np.take(levels, rank[:m], out=values_out[start:stop], mode="wrap")  # rank -1: redone below
        np.copyto(index_out[start:stop], variable[:m], casting="unsafe")
        edge = np.flatnonzero(b < 0)
        if edge.size:
            # most cells of a novel piece: evaluate the whole piece rather than gather
            cells = X[:, start:stop] if 2 * edge.size > m else X[:, start + edge]
            s, i = _mess_extremes(cells, lookup, reference, nodata_nonfinite=nodata_nonfinite)
            if cells.shape[1] != edge.size:
                s, i = s[edge], i[edge]
            values_out[start + edge] = s
            index_out[start + edge] = np.where(i < 0, np.nan, i) if nodata_nonfinite else i


def _mess_extremes(X, lookup: MessLookup, reference: MessReference, *, nodata_nonfinite=False) -> tuple:
    """MESS of cells (n_variables, cells) that have a variable at or below the reference
    minimum or above its maximum, or a NaN.

    There S <= 0, while an interior S (0 < f < 100) is > 0, so the minimum and its first
    argmin come from the extreme variables alone, whose S needs the value itself. A NaN
    (with ``nodata_nonfinite``, also ±inf) makes the cell NaN with index -1.
    """
    n = X.shape[1]
    best = np.full(n, np.inf)
    index = np.zeros(n, dtype=np.int64)
    missing, flag = np.zeros(n, bool), np.empty(n, bool)
    for i, (low_cut, high_cut) in enumerate(zip(lookup.low_cut, lookup.high_cut)):
        p = X[i]
        below = p < low_cut  # p <= minimum, exactly, in the values' own dtype
        edge = np.flatnonzero(below | (p >= high_cut))  # ... or p > maximum; NaN is neither
        if edge.size:
            s = _extreme_similarity(p[edge].astype(np.float64), below[edge],
                                    float(reference.minimum[i]), float(reference.maximum[i]))
            current = best[edge]
            lower = s < current  # strict: the first variable wins ties
            index[edge[lower]] = i
            best[edge] = np.minimum(current, s)
        if nodata_nonfinite:
            np.isfinite(p, out=flag)
            np.logical_not(flag, out=flag)
        else:
            np.isnan(p, out=flag)
        missing |= flag
    best[missing] = np.nan
    index[missing] = -1
    return best, index


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
