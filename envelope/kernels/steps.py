"""Exact step-function lookup for grid values: a uniform bucket per value, then one or two comparisons."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from envelope.errors import InputError

__all__ = ["MAX_BUCKETS", "Scratch", "StepIndex", "above", "at_least", "step_index"]

#: Cap on the buckets of one index: about 1 MiB of tables per variable. Measured on 19
#: continuous gamma-distributed variables of 10 000 reference values each: MESS at 6.2 ns
#: a cell and variable with 65 536 buckets (26 MiB of tables), 4.5 ns with 262 144 (100 MiB).
MAX_BUCKETS = 1 << 16

# Buckets per pivot to start with, and the most tried while more than _CROWDED_SHARE of the
# pivots share a bucket with another one (values in such a bucket are binary-searched).
_FIRST_BUCKETS_PER_PIVOT = 4
_MOST_BUCKETS_PER_PIVOT = 64
_CROWDED_SHARE = 0.01
# Shares of the pivots left out at each end of the bucketed range, tried in this order
# (the first of equally good ones is kept).
_TRIMS = (0.0, 0.005, 0.02, 0.1)


def above(values, dtype) -> np.ndarray:
    """Smallest value of ``dtype`` above each (float64) value: for every ``x`` of that dtype,
    ``x > v`` exactly when ``x >= above(v)``."""
    v = np.asarray(values, dtype=np.float64)
    dtype = np.dtype(dtype)
    with np.errstate(over="ignore"):
        f = v.astype(dtype)  # nearest; beyond the dtype's range: ±inf
    return np.where(f > v, f, np.nextafter(f, dtype.type(np.inf)))


def at_least(values, dtype) -> np.ndarray:
    """Smallest value of ``dtype`` at or above each (float64) value: ``x >= v`` exactly when
    ``x >= at_least(v)``."""
    v = np.asarray(values, dtype=np.float64)
    dtype = np.dtype(dtype)
    with np.errstate(over="ignore"):
        f = v.astype(dtype)
    return np.where(f >= v, f, np.nextafter(f, dtype.type(np.inf)))


@dataclass(frozen=True)
class StepIndex:
    """Where values of one float dtype fall among sorted pivots, in a fixed number of array passes.

    The event count of ``x`` is ``e(x) = #(pivots <= x)`` (``points=False``, ``0..q``) or
    ``#(pivots <= x) + #(pivots < x)`` (``points=True``, ``0..2q``; odd exactly on a
    pivot). A function of ``x`` that changes only at the pivots is a table over ``e``.

    Rather than a binary search per value, ``x`` is put in one of ``n_buckets`` uniform
    buckets, ``bucket(x) = trunc(clip(x * scale + offset, 1, n_buckets - 1))`` in the
    dtype's own arithmetic (bucket 0 holds NaN alone). Every operation there is monotone,
    and the pivots went through the very same operations, so a pivot in an earlier bucket
    is below ``x`` and one in a later bucket above it: only a pivot sharing ``x``'s bucket
    is compared. The few buckets holding several pivots are "crowded": their codes look up
    a marker, and the caller finds those values' event counts with :meth:`exact` (a binary
    search). The result is exact, not an approximation.

    Attributes
    ----------
    pivots : ndarray, sorted distinct values of the dtype
    points : bool
    scale, offset, top : scalars of the dtype (``top = n_buckets - 1``)
    first : ndarray, shape (n_buckets,)
        The pivot of each bucket that has exactly one, else NaN (never counted).
    start : ndarray of int32, shape (n_buckets,)
        Pivots in the buckets before ``b``.
    crowded : ndarray of bool, shape (n_buckets,)
        Buckets with two or more pivots.
    any_crowded : bool

    Codes are int32: ``width * bucket + (events of the bucket's pivot)``.
    """

    pivots: np.ndarray
    points: bool
    scale: np.generic
    offset: np.generic
    top: np.generic
    first: np.ndarray
    start: np.ndarray
    crowded: np.ndarray
    any_crowded: bool

    @property
    def dtype(self) -> np.dtype:
        return self.pivots.dtype

    @property
    def n_buckets(self) -> int:
        return int(self.start.size)

    @property
    def width(self) -> int:
        """Codes per bucket."""
        return 3 if self.points else 2

    @property
    def n_events(self) -> int:
        """Largest event count (``q`` or ``2q``)."""
        return (2 if self.points else 1) * self.pivots.size

    def expand(self, table, crowded) -> np.ndarray:
        """``table`` indexed by event count (length ``n_events + 1``) -> the same values
        indexed by code (length ``width * n_buckets``), for one ``numpy.take`` per value;
        the codes of crowded buckets get the marker ``crowded``."""
        table = np.asarray(table)
        if table.shape[:1] != (self.n_events + 1,):
            raise InputError(f"table: {table.shape[0]} entries; expected {self.n_events + 1} (one per event count)")
        per = 2 if self.points else 1
        events = per * self.start[:, None] + np.arange(self.width)
        out = table[np.minimum(events, self.n_events)]
        out[self.crowded] = crowded
        return out.ravel()

    def codes(self, x, scratch: "Scratch") -> np.ndarray:
        """Code of each ``x`` (a row of the dtype, at most ``scratch.width`` long), as an
        int32 view of ``scratch.code``. NaN gets code 0, event count 0. Values far beyond
        the pivots may overflow to ±inf on the way (harmless: they are clipped); callers
        silence that warning once around their loop (``numpy.errstate(over="ignore")``)."""
        m = x.shape[0]
        work, code, flag = scratch.work[:m], scratch.code[:m], scratch.flag[:m]
        np.multiply(x, self.scale, out=work)
        work += self.offset
        # against rows, not scalars: numpy vectorises these only for two arrays
        np.maximum(work, scratch.ones[:m], out=work)  # NaN stays NaN ...
        np.minimum(work, scratch.tops(self.top)[:m], out=work)
        np.fmax(work, scratch.zeros[:m], out=work)  # ... and only NaN goes to bucket 0
        np.copyto(code, work, casting="unsafe")  # truncation: the floor on [0, top]
        # "wrap": every index is in range, and unlike the default mode numpy does not
        # stage the result through a temporary
        np.take(self.first, code, out=work, mode="wrap")
        if self.points:
            code *= 3
        else:
            code += code
        np.less_equal(work, x, out=flag)
        code += flag
        if self.points:
            np.less(work, x, out=flag)
            code += flag
        return code

    def exact(self, x) -> np.ndarray:
        """Event counts of a few values by binary search (``numpy.searchsorted``)."""
        x = np.asarray(x, dtype=self.dtype)
        e = np.searchsorted(self.pivots, x, side="right")
        if self.points:
            e += np.searchsorted(self.pivots, x, side="left")
        e[np.isnan(x)] = 0
        return e

    def events(self, x) -> np.ndarray:
        """The event count of each ``x`` through the buckets (allocating; for checks)."""
        x = np.ascontiguousarray(np.ravel(x), dtype=self.dtype)
        with np.errstate(over="ignore"):
            code = self.codes(x, Scratch(x.size, self.dtype))
        e = self.expand(np.arange(self.n_events + 1), -1)[code]
        fix = np.flatnonzero(e < 0)
        e[fix] = self.exact(x[fix])
        return e


class Scratch:
    """Reusable rows for :meth:`StepIndex.codes` on pieces of up to ``width`` values of one
    dtype (one per thread: the rows are overwritten by every call)."""

    def __init__(self, width: int, dtype):
        dtype = np.dtype(dtype)
        self.width = int(width)
        self.work = np.empty(self.width, dtype)
        self.code = np.empty(self.width, np.int32)
        self.flag = np.empty(self.width, bool)
        self.zeros = np.zeros(self.width, dtype)
        self.ones = np.ones(self.width, dtype)
        self._tops = {}

    def tops(self, top) -> np.ndarray:
        """A row filled with ``top`` (one per distinct bucket count, made once)."""
        row = self._tops.get(top)
        if row is None:
            row = self._tops[top] = np.full(self.width, top, dtype=self.work.dtype)
        return row


def _affine(lo: float, hi: float, n_buckets: int, dtype: np.dtype) -> tuple:
    """scale, offset mapping [lo, hi] onto [1, n_buckets - 1]; a fixed map when that fails."""
    if hi > lo:
        with np.errstate(over="ignore"):
            scale = dtype.type((n_buckets - 2) / (hi - lo))
            offset = dtype.type(1.0 - lo * float(scale))
        if np.isfinite(scale) and scale > 0 and np.isfinite(offset):
            return scale, offset
    # no range to spread: everything in one bucket or two (pivots then searched)
    return dtype.type(1.0), dtype.type(1.0 - lo) if np.isfinite(lo) else dtype.type(1.0)


def step_index(pivots, dtype, *, points: bool = False, max_buckets: int = MAX_BUCKETS) -> StepIndex:
    """A :class:`StepIndex` for values of ``dtype`` (float32 or float64) among ``pivots``.

    ``pivots`` are converted to ``dtype`` (use :func:`above` / :func:`at_least` to turn
    float64 cut points into exact ones of a narrower dtype) and de-duplicated. Buckets start
    at about four per pivot and are doubled while more than 1 % of the pivots share a
    bucket, up to 64 per pivot or ``max_buckets``; they span the pivots' range or its
    central 99, 96 or 80 %, whichever crowds the fewest pivots.
    """
    dtype = np.dtype(dtype)
    if dtype.kind != "f":
        raise InputError(f"dtype: {dtype}; expected a floating-point dtype")
    p = np.unique(np.asarray(pivots, dtype=dtype))
    if np.isnan(p).any():
        raise InputError("pivots: NaN among the pivots; expected numbers")
    finite = p[np.isfinite(p)]
    n = max(4, 1 << int(np.ceil(np.log2(max(_FIRST_BUCKETS_PER_PIVOT * p.size, 1)))))
    ceiling = max(n, min(int(max_buckets), _MOST_BUCKETS_PER_PIVOT * p.size))
    # the buckets span the pivots' whole range, or their central part when a few far
    # pivots (a long tail, an outlier) would crowd the rest into a handful of buckets;
    # the trimmed tails then share the end buckets and are searched
    ranges = [(float(finite[int(t * (finite.size - 1))]), float(finite[int(round((1 - t) * (finite.size - 1)))]))
              for t in _TRIMS] if finite.size else [(0.0, 0.0)]
    while True:
        best = None
        for lo, hi in ranges:
            scale, offset = _affine(lo, hi, n, dtype)
            probe = StepIndex(p, bool(points), scale, offset, dtype.type(n - 1), np.full(n, np.nan, dtype),
                              np.zeros(n, np.int32), np.zeros(n, bool), False)
            with np.errstate(over="ignore"):
                bucket = probe.codes(p, Scratch(p.size, dtype)) // probe.width  # `first` is all NaN: no event
            counts = np.bincount(bucket, minlength=n)
            share = counts[counts > 1].sum() / max(p.size, 1)
            if best is None or share < best[0]:
                best = (share, scale, offset, counts)
        share, scale, offset, counts = best
        if share <= _CROWDED_SHARE or 2 * n > ceiling:
            break
        n *= 2
    start = np.r_[0, np.cumsum(counts)[:-1]].astype(np.int32)
    first = np.where(counts == 1, np.r_[p, np.zeros(1, dtype)][np.minimum(start, p.size)], np.nan).astype(dtype)
    return StepIndex(p, bool(points), scale, offset, dtype.type(n - 1), first, start, counts > 1,
                     bool((counts > 1).any()))
