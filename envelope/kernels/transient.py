"""Stepping the spread model through a transient climate (pure NumPy; no I/O, no xarray)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from envelope.errors import InputError
from envelope.kernels.compact import PackedSnapshots
from envelope.kernels.rowblocks import row_blocks

__all__ = ["ClimatePath", "TransientResult", "run_transient", "step_years_list"]




@dataclass
class ClimatePath:
    """Suitability maps at known years, linearly interpolated in between.

    The assumption, stated in reports: between two given maps the suitability of each
    cell changes linearly with time (no interannual variability, no threshold-crossing
    dynamics of its own). Beyond the last map the climate is held at the last map.
    """

    years: list
    maps: list  # 2-D float arrays (NaN = no climate data)
    dtype: object = np.float64  # precision the maps are kept and interpolated in

    def __post_init__(self):
        if len(self.years) != len(self.maps) or len(self.years) == 0:
            raise InputError(f"a climate path needs one suitability map per year; got {len(self.years)} years "
                             f"and {len(self.maps)} maps")
        if not all(np.isfinite(float(y)) for y in self.years):
            raise InputError(f"climate path years must be finite numbers, got {list(self.years)}")
        order = np.argsort(self.years)
        years = [float(self.years[i]) for i in order]
        if any(b <= a for a, b in zip(years, years[1:])):
            raise InputError(f"climate path years must be distinct, got {sorted(self.years)}")
        self.years = years
        self.maps = [np.asarray(self.maps[i], dtype=self.dtype) for i in order]
        shapes = {m.shape for m in self.maps}
        if len(shapes) != 1:
            raise InputError(f"suitability maps differ in shape: {sorted(shapes)}")

    def at(self, year: float) -> np.ndarray:
        """Suitability at ``year`` (linear interpolation between the bracketing maps)."""
        ys = self.years
        if year <= ys[0]:
            return self.maps[0]
        if year >= ys[-1]:
            return self.maps[-1]
        k, w = self._bracket(year)
        return (1.0 - w) * self.maps[k] + w * self.maps[k + 1]

    def _bracket(self, year):
        ys = self.years
        k = int(np.searchsorted(ys, year, side="right")) - 1
        return k, (year - ys[k]) / (ys[k + 1] - ys[k])

    def suitable_at(self, year: float, threshold: float, dtype=None) -> np.ndarray:
        """``at(year) >= threshold`` as 0/1 in ``dtype`` (default the path's), NaN counted unsuitable.

        The same values as thresholding :meth:`at`, computed a block of rows at a time, so
        that no interpolated map of the whole grid is ever held.
        """
        dtype = np.dtype(self.dtype if dtype is None else dtype)
        ys = self.years
        if year <= ys[0] or year >= ys[-1]:
            return (self.maps[0 if year <= ys[0] else -1] >= threshold).astype(dtype)
        k, w = self._bracket(year)
        a, b = self.maps[k], self.maps[k + 1]
        out = np.empty(a.shape, dtype=dtype)
        for rows in row_blocks(a.shape):
            part = (1.0 - w) * a[rows] + w * b[rows]
            out[rows] = part >= threshold  # NaN compares False: no climate, not suitable
        return out


@dataclass
class TransientResult:
    """Expected occupancy (or replicate mean) at snapshot years, arrival years and the final state."""

    snapshots: PackedSnapshots  # year -> 2-D occupancy in [0, 1], kept packed (a new array per look-up)
    arrival_year: np.ndarray   # first year occupancy >= level (NaN = never; start cells = start year)
    final: np.ndarray          # occupancy at the last year
    years: list = field(default_factory=list)  # every simulated year
    replicate_final: np.ndarray | None = None  # (replicates, ny, nx) bool occupancy at the last year; None deterministic


def step_years_list(start_year: float, end_year: float, step_years: float) -> list:
    """The years at the end of each step: start + S, start + 2S, ..., ending exactly at end_year."""
    if not (step_years > 0):
        raise InputError(f"step_years must be > 0, got {step_years!r}")
    if not end_year > start_year:
        raise InputError(f"end_year {end_year:g} is not after start_year {start_year:g}")
    n = max(1, math.ceil((end_year - start_year) / step_years - 1e-9))
    return [start_year + min((i + 1) * step_years, end_year - start_year) for i in range(n)]


def run_transient(operators, start, habitat, climate: ClimatePath, *, threshold, start_year, end_year,
                  step_years=1.0, rate=1.0, persistence_steps=0, rngs=None, snapshot_years=(),
                  level=0.5, progress=None, dtype=None) -> TransientResult:
    """Run the habitat-gated spread model from ``start_year`` to ``end_year``.

    Each step of ``step_years`` years: the climate is taken at the END of the step
    (interpolated), a cell is suitable when its suitability >= ``threshold``, and one
    :meth:`SpreadOperator.step` disperses, colonises and loses.

    Parameters
    ----------
    operators : SpreadOperator or list of SpreadOperator
        One operator (deterministic mode, or stochastic replicates sharing one kernel), or
        one per replicate (replicates with their own mean dispersal distance).
    start : ndarray (ny, nx)
        Occupancy at ``start_year`` (0/1 or expected occupancy).
    habitat : ndarray (ny, nx)
        Habitat quality in [0, 1] (NaN must already be filled).
    climate : ClimatePath
    threshold : float
        Suitability threshold (``>=`` is suitable).
    rate : float
        Colonisation rate per step.
    persistence_steps : int
        Steps an occupied cell survives unsuitable climate (persistence lag).
    rngs : list of numpy.random.Generator, optional
        Given: stochastic mode with ``len(rngs)`` replicates; occupancy is then the share of
        replicates occupied. None: deterministic expected occupancy.
    snapshot_years : iterable of float
        Years at which the occupancy is recorded (the end year always is). Years that do
        not fall on a step end are recorded at the first step end at or after them. The
        snapshots are kept packed (:class:`envelope.kernels.compact.PackedSnapshots`): the
        exact 0 and 1 cells as bits, so that a large grid's snapshots take a fraction of
        the memory of full copies; each look-up gives back the recorded values exactly.
    level : float
        Occupancy level defining arrival (and the expansion front), default 0.5.
    progress : callable(step_index, n_steps), optional
    dtype : numpy dtype, optional
        Precision of the occupancy, habitat and snapshots (default: the operators' dtype).
        float32 halves the memory of a large grid (see :class:`SpreadOperator`).

    Returns
    -------
    TransientResult
    """
    if not 0 <= threshold <= 1:
        raise InputError(f"threshold must lie in [0, 1], got {threshold!r}")
    ops = operators if isinstance(operators, (list, tuple)) else [operators]
    dtype = np.dtype(ops[0].dtype if dtype is None else dtype)
    start = np.asarray(start, dtype=dtype)
    habitat = np.asarray(habitat, dtype=dtype)
    if start.shape != habitat.shape:
        raise InputError(f"start occupancy has shape {start.shape}, habitat {habitat.shape}")
    n_rep = len(rngs) if rngs is not None else 0
    if len(ops) > 1 and len(ops) != n_rep:
        raise InputError(f"operators: {len(ops)} spread operators for {n_rep} replicates (rngs); "
                         "expected one operator, or one per replicate")
    if persistence_steps < 0:
        raise InputError(f"persistence_steps must be >= 0, got {persistence_steps!r}")

    years = step_years_list(float(start_year), float(end_year), float(step_years))
    wanted = sorted({float(y) for y in snapshot_years} | {float(end_year)})
    snapshots = PackedSnapshots()
    # float32 holds step years exactly to ~1e-4 year: enough for arrival maps, half the memory
    arrival = np.full(start.shape, np.nan, dtype=np.float32 if dtype == np.float32 else np.float64)
    arrival[start >= level] = start_year
    if n_rep:
        occ = np.repeat((start >= 0.5)[None].astype(dtype), n_rep, axis=0)
    else:
        occ = start.copy()
    n_tracks = n_rep if n_rep else 1
    counters = ([np.zeros(start.shape, dtype=np.int32) for _ in range(n_tracks)]
                if persistence_steps > 0 else [None] * n_tracks)

    for i, year in enumerate(years):
        suitable = climate.suitable_at(year, threshold, dtype)  # NaN: no climate, not suitable
        if n_rep and (len(ops) > 1 or persistence_steps > 0):
            # replicates advanced one by one: each has its own kernel or its own lag counter
            for r in range(n_rep):
                op = ops[r] if len(ops) > 1 else ops[0]
                occ[r] = op.step(occ[r], habitat, suitable, rate, rngs[r], persistence_lag=persistence_steps,
                                 unsuitable_steps=counters[r], check=False)
        elif n_rep:
            occ = ops[0].step(occ, habitat, suitable, rate, rngs, check=False)
        else:
            occ = ops[0].step(occ, habitat, suitable, rate, None, persistence_lag=persistence_steps,
                              unsuitable_steps=counters[0], check=False)
        current = occ.mean(axis=0) if n_rep else occ
        newly = np.isnan(arrival) & (current >= level)
        arrival[newly] = year
        while wanted and wanted[0] <= year + 1e-9:
            snapshots.add(wanted.pop(0), current)
        if progress is not None:
            progress(i + 1, len(years))
    final = occ.mean(axis=0) if n_rep else occ
    return TransientResult(snapshots=snapshots, arrival_year=arrival, final=np.asarray(final, dtype=dtype),
                           years=years, replicate_final=(occ >= 0.5) if n_rep else None)
