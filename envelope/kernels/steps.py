"""Exact step-function lookup for grid values: a uniform bucket per value, then one or two comparisons."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from envelope.errors import InputError

__all__ = ["MAX_BUCKETS", "Scratch", "StepIndex", "above", "at_least", "step_index"]

#: Cap on the buckets of one index: its tables stay a few MiB at most.
MAX_BUCKETS = 1 << 18

# Buckets per pivot to start with, and the most tried while a bucket still holds several
# pivots (each extra pivot per bucket costs a gather and a comparison per value).
_FIRST_BUCKETS_PER_PIVOT = 4
_MOST_BUCKETS_PER_PIVOT = 64


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
    buckets, ``bucket(x) = trunc(clip(x * scale + offset, 0, n_buckets - 1))`` in the
    dtype's own arithmetic (NaN to bucket 0). Every operation there is monotone, and the
    pivots went through the very same operations, so a pivot in an earlier bucket is
    below ``x`` and one in a later bucket above it; only the (at most ``len(first)``)
    pivots sharing ``x``'s bucket are compared. The result is exact, not an approximation.

    Attributes
    ----------
    pivots : ndarray, sorted distinct values of the dtype
    points : bool
    scale, offset, top : scalars of the dtype (``top = n_buckets - 1``)
    first : tuple of ndarray, shape (n_buckets,)
        ``first[k][b]`` is the ``k``-th pivot of bucket ``b``, else a later bucket's pivot
        or NaN (never counted).
    start : ndarray of intp, shape (n_buckets,)
        Pivots in the buckets before ``b``.

    Codes are int32 (``width * n_buckets`` is at most a few million).
    """

    pivots: np.ndarray
    points: bool
    scale: np.generic
    offset: np.generic
    top: np.generic
    first: tuple
    start: np.ndarray

    @property
    def dtype(self) -> np.dtype:
        return self.pivots.dtype

    @property
    def n_buckets(self) -> int:
        return int(self.start.size)

    @property
    def width(self) -> int:
        """Codes per bucket: ``code = width * bucket + (events of the bucket's pivots)``."""
        return (2 if self.points else 1) * len(self.first) + 1

    @property
    def n_events(self) -> int:
        """Largest event count (``q`` or ``2q``)."""
        return (2 if self.points else 1) * self.pivots.size

    def expand(self, table) -> np.ndarray:
        """``table`` indexed by event count (length ``n_events + 1``) -> the same values
        indexed by code (length ``width * n_buckets``), for one ``numpy.take`` per value."""
        table = np.asarray(table)
        if table.shape[:1] != (self.n_events + 1,):
            raise InputError(f"table: {table.shape[0]} entries; expected {self.n_events + 1} (one per event count)")
        per = 2 if self.points else 1
        events = per * self.start[:, None] + np.arange(self.width)
        return table[np.minimum(events, self.n_events).ravel()]

    def codes(self, x, scratch: "Scratch") -> np.ndarray:
        """Code of each ``x`` (a row of the dtype, at most ``scratch.width`` long), as an
        int32 view of ``scratch.code``. The event count is ``expand(arange(n_events +
        1))[code]``; NaN falls in bucket 0 and counts no event. Values far beyond the pivots
        may overflow to ±inf on the way (harmless: they are clipped); callers silence that
        warning once around their loop (``numpy.errstate(over="ignore")``)."""
        m = x.shape[0]
        work, code, flag = scratch.work[:m], scratch.code[:m], scratch.flag[:m]
        np.multiply(x, self.scale, out=work)
        work += self.offset
        # against rows, not scalars: numpy vectorises fmax / fmin only for two arrays
        np.fmax(work, scratch.zeros[:m], out=work)  # NaN -> 0
        np.fmin(work, scratch.tops(self.top)[:m], out=work)
        np.copyto(code, work, casting="unsafe")  # truncation: the floor on [0, top]
        if len(self.first) == 1:
            # "wrap": every index is in range, and unlike the default mode numpy does not
            # stage the result through a temporary
            np.take(self.first[0], code, out=work, mode="wrap")
            if self.width == 2:
                code += code
            else:
                code *= self.width
            np.less_equal(work, x, out=flag)
            code += flag
            if self.points:
                np.less(work, x, out=flag)
                code += flag
        elif self.first:
            buckets = code.copy()
            code *= self.width
            for first in self.first:
                np.take(first, buckets, out=work, mode="wrap")
                np.less_equal(work, x, out=flag)
                code += flag
                if self.points:
                    np.less(work, x, out=flag)
                    code += flag
        return code

    def events(self, x) -> np.ndarray:
        """The event count of each ``x`` (allocating; for checks and small arrays)."""
        x = np.ascontiguousarray(np.ravel(x), dtype=self.dtype)
        with np.errstate(over="ignore"):
            code = self.codes(x, Scratch(x.size, self.dtype))
        return self.expand(np.arange(self.n_events + 1))[code]


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
        self._tops = {}

    def tops(self, top) -> np.ndarray:
        """A row filled with ``top`` (one per distinct bucket count, made once)."""
        row = self._tops.get(top)
        if row is None:
            row = self._tops[top] = np.full(self.width, top, dtype=self.work.dtype)
        return row


def _affine(finite: np.ndarray, n_buckets: int, dtype: np.dtype) -> tuple:
    """scale, offset mapping the finite pivots' range onto [0, n_buckets]; (1, 0) when there is none."""
    if finite.size >= 2 and finite[-1] > finite[0]:
        lo, hi = float(finite[0]), float(finite[-1])
        with np.errstate(over="ignore"):
            scale = dtype.type(n_buckets / (hi - lo))
            offset = dtype.type(-lo * float(scale))
        if np.isfinite(scale) and scale > 0 and np.isfinite(offset):
            return scale, offset
    return dtype.type(1.0), dtype.type(0.0) if finite.size == 0 else dtype.type(-float(finite[0]))


def step_index(pivots, dtype, *, points: bool = False, max_buckets: int = MAX_BUCKETS) -> StepIndex:
    """A :class:`StepIndex` for values of ``dtype`` (float32 or float64) among ``pivots``.

    ``pivots`` are converted to ``dtype`` (use :func:`above` / :func:`at_least` to turn
    float64 cut points into exact ones of a narrower dtype) and de-duplicated. Buckets start
    at about four per pivot and are multiplied while some bucket holds several pivots, up to
    64 per pivot or ``max_buckets``; crowded pivots then cost one more comparison each.
    """
    dtype = np.dtype(dtype)
    if dtype.kind != "f":
        raise InputError(f"dtype: {dtype}; expected a floating-point dtype")
    p = np.unique(np.asarray(pivots, dtype=dtype))
    if np.isnan(p).any():
        raise InputError("pivots: NaN among the pivots; expected numbers")
    finite = p[np.isfinite(p)]
    n = 1 if p.size == 0 else 1 << int(np.ceil(np.log2(_FIRST_BUCKETS_PER_PIVOT * p.size)))
    ceiling = max(n, min(int(max_buckets), _MOST_BUCKETS_PER_PIVOT * max(p.size, 1)))
    while True:
        scale, offset = _affine(finite, n, dtype)
        probe = StepIndex(p, bool(points), scale, offset, dtype.type(n - 1), (), np.zeros(n, np.intp))
        with np.errstate(over="ignore"):
            counts = np.bincount(probe.codes(p, Scratch(p.size, dtype)), minlength=n)
        most = int(counts.max()) if p.size else 0
        if most <= 1 or 2 * n > ceiling:
            break
        n *= 2
    start = np.r_[0, np.cumsum(counts)[:-1]].astype(np.intp)
    padded = np.r_[p, np.full(max(most, 1), np.nan, dtype=dtype)]
    first = tuple(padded[start + k] for k in range(most))
    return StepIndex(p, bool(points), scale, offset, dtype.type(n - 1), first, start)
