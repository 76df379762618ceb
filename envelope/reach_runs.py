"""Reach over many runs (climate models × pathways × methods × dispersal distances × replicates): probability of reach, medians and intervals."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.compact import CodedGrid, PackedSnapshots, code_grid
from envelope.kernels.rowblocks import row_blocks
from envelope.reach import REACH_CLASSES, REACH_NODATA, ReachResult, front_geojson

__all__ = ["AREA_KEYS", "INTERVAL_PERCENTILES", "ReachRunCombiner", "ReachRunSet", "combine_reach_runs", "distance_levels",
           "percentile_interval"]

#: The percentiles of every interval: the 5 %, 50 % and 95 % values across runs.
INTERVAL_PERCENTILES = (5, 50, 95)
#: The ``area_km2`` keys of a reach summary (reach classes 1-5), in summary order.
AREA_KEYS = ("gained_reached", "gained_unreached", "gained_no_habitat", "lost", "stable")
#: Integer type of the per-cell counts of climate paths holding a cell (one grid per snapshot
#: year); promoted to int64 when the paths outnumber its range.
COUNT_DTYPE = np.uint16
#: How the intervals are computed, stated in every combined summary.
INTERVAL_METHOD = ("5th, 50th and 95th percentiles over the runs, linear interpolation between order statistics "
                   "(numpy's default; Hyndman & Fan 1996 definition 7)")


def distance_levels(low: float, high: float, n: int = 3) -> list:
    """``n`` mean dispersal distances evenly spaced from ``low`` to ``high`` (one when they are equal).

    Evenly spaced levels, not random draws, so that dispersal distance is a factor of a
    balanced design (:func:`envelope.uncertainty.variance_partition`).
    """
    if not (0 < low <= high):
        raise InputError(f"dispersal distance range must be 0 < low <= high, got {low}:{high}")
    if low == high or n <= 1:
        return [float(low)]
    return [float(v) for v in np.linspace(low, high, n)]


def percentile_interval(values) -> dict:
    """``{"p05", "p50", "p95"}`` of the finite ``values`` (None each when there is none)."""
    v = np.asarray([np.nan if x is None else x for x in values], dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {f"p{p:02d}": None for p in INTERVAL_PERCENTILES}
    q = np.percentile(v, INTERVAL_PERCENTILES)
    return {f"p{p:02d}": float(x) for p, x in zip(INTERVAL_PERCENTILES, q)}


@dataclass
class ReachRunSet:
    """Reach runs of one pathway combined (:func:`combine_reach_runs`)."""

    classes: xr.DataArray          # uint8: per cell the reach class most runs give
    probability: xr.DataArray      # float32: share of runs occupying the cell (>= 0.5) at the last horizon
    arrival_year: xr.DataArray     # float32: median over runs of the arrival year (never = later than any)
    summary: dict                  # today's keys as medians over runs, plus ``intervals``
    front: dict                    # GeoJSON: per snapshot year, where half of the runs are occupied
    runs: pd.DataFrame             # one row per run: its labels and values


def _median_or_none(values):
    v = np.asarray([np.nan if x is None else x for x in values], dtype=np.float64)
    v = v[np.isfinite(v)]
    return float(np.median(v)) if v.size else None


def _mode_classes(grids: list) -> np.ndarray:
    """Per cell the most frequent class code across runs (ties: the lower code); nodata stays nodata.

    ``grids`` are the runs' class grids; a block of rows is stacked at a time.
    """
    codes = sorted(REACH_CLASSES)
    out = np.empty(grids[0].shape, dtype=np.uint8)
    for rows in row_blocks(out.shape):
        stack = np.stack([g[rows] for g in grids])
        counts = np.stack([(stack == c).sum(axis=0) for c in codes])
        block = np.asarray(codes, dtype=np.uint8)[np.argmax(counts, axis=0)]
        block[(stack == REACH_NODATA).all(axis=0)] = REACH_NODATA
        out[rows] = block
    return out


def _median_arrival(grids: list, valid: np.ndarray) -> np.ndarray:
    """Per cell the median arrival year over runs (never = later than any), float32, NaN if never or not valid.

    ``grids`` are arrays or :class:`envelope.kernels.compact.CodedGrid` (decoded a block of rows at a time).
    """
    out = np.empty(valid.shape, dtype=np.float32)
    for rows in row_blocks(out.shape):
        years = np.stack([g.values(rows, nan=np.inf) if isinstance(g, CodedGrid)
                          else np.where(np.isfinite(g[rows]), g[rows], np.inf) for g in grids])
        med = np.median(years, axis=0)
        out[rows] = np.where(valid[rows] & np.isfinite(med), med, np.nan)
    return out


class _FirstOf:
    """What the combination keeps of its first result once there are more: the summary and grid templates."""

    def __init__(self, result: ReachResult):
        self.summary, self.classes, self.reached_share = result.summary, result.classes, result.reached_share


class ReachRunCombiner:
    """:func:`combine_reach_runs` one result at a time, keeping of each only what the combination needs.

    :meth:`add` takes a result's runs, adds its reached share and, per snapshot year, its
    occupied cells to running counts, and keeps its class grid (1 byte a cell) and its
    arrival years as codes (:func:`envelope.kernels.compact.code_grid`, 1 or 2 bytes); the
    result itself can then be dropped. A set of many climate paths on a large grid so holds
    about 2-3 bytes a cell per path instead of every path's grids (:meth:`result` gives
    the same combination as :func:`combine_reach_runs` of the list).
    """

    def __init__(self):
        self.rows, self.labels, self._classes, self._arrivals = [], [], [], []
        self._weights, self._horizon_km2, self._edges = [], [], []
        self._share = self._first = None
        self._held = {}  # year -> [count of paths holding each cell, number of paths with that year]

    def add(self, result: ReachResult, label: dict) -> None:
        """Take one reach result (see :func:`combine_reach_runs`) labelled ``label``."""
        if not isinstance(result, ReachResult) or not result.runs:
            raise InputError(f"combine_reach_runs: run {label}: expected a ReachResult with its runs")
        if self._first is not None and result.classes.shape != self._first.classes.shape:
            raise InputError(f"combine_reach_runs: run {label}: grid of {result.classes.shape} cells, the first "
                             f"run's is {self._first.classes.shape}; expected every run on the same grid")
        for k, run in enumerate(result.runs):
            self.rows.append({**label, "replicate": k if result.summary["replicates"] else None, **run["area_km2"],
                              "reached_share_of_gain": run["reached_share_of_gain"],
                              "front_advance_km": run["front_advance_km"]})
        self.labels.append(label)
        # each run weighs the same: a path's reached share is the mean of its runs' 0/1 states
        w = float(len(result.runs))
        self._weights.append(w)
        term = np.array(result.reached_share.values, dtype=np.float64)  # the weighted sum in place
        np.nan_to_num(term, copy=False)
        term *= w
        self._share = term if self._share is None else np.add(self._share, term, out=self._share)
        del term
        self._horizon_km2.append(result.summary["occupied_km2"]["horizon"])
        self._edges.append(result.summary["leading_edge_shift_km"])
        if self._first is None:
            # while it is the only one, the first result's own classes, arrival and front stand for the set
            self._first = result
            return
        if isinstance(self._first, ReachResult):  # the second result: the first's grids are needed now
            self._keep(self._first)
            self._first = _FirstOf(self._first)
        self._keep(result)

    def _keep(self, result: ReachResult) -> None:
        self._classes.append(np.asarray(result.classes.values))
        arrival = np.asarray(result.arrival_year.values)
        self._arrivals.append(code_grid(arrival) or arrival)
        # per snapshot year, how many climate paths hold the cell (occupancy >= 0.5; NaN compares False)
        for yr in result.occupancy:
            counts = self._held.get(yr)
            if counts is None:
                counts = self._held[yr] = [np.zeros(result.classes.shape, dtype=COUNT_DTYPE), 0]
            if counts[1] == np.iinfo(counts[0].dtype).max:
                counts[0] = counts[0].astype(np.int64)
            counts[0] += result.occupancy[yr].values >= 0.5
            counts[1] += 1

    def result(self) -> ReachRunSet:
        """The combination of every result added (:func:`combine_reach_runs`); once (its grids are handed over)."""
        if self._first is not None and self._share is None:
            raise RuntimeError("ReachRunCombiner.result() was already called; make a new combiner for another set")
        if self._first is None:
            raise InputError("combine_reach_runs: 0 results and 0 label rows; expected at least one result and one "
                             "label row each")
        first, labels, n = self._first, self.labels, len(self.labels)
        runs = pd.DataFrame(self.rows)
        weights = np.asarray(self._weights, dtype=np.float64)
        share = self._share
        share /= weights.sum()
        valid = np.isfinite(np.asarray(first.reached_share.values))
        like = first.reached_share
        probability = share.astype(np.float32)
        self._share = share = None
        probability[~valid] = np.nan
        probability = like.copy(data=probability)
        if n == 1:
            classes, arrival, front = first.classes, first.arrival_year, first.front
        else:
            classes = first.classes.copy(data=_mode_classes(self._classes))
            arrival = like.copy(data=_median_arrival(self._arrivals, valid))
            # the front where half of the climate paths hold the cell at each snapshot year
            # (the years every path has); the shares are packed like the runs' own snapshots
            halves = PackedSnapshots()
            for yr in sorted(self._held):
                counts, seen = self._held[yr]
                if seen == n:
                    halves.add(yr, (counts / n).astype(np.float32))
            front = front_geojson(like, halves.mapped(lambda values: like.copy(data=values)), level=0.5)
        self._held, self._classes, self._arrivals = {}, [], []

        summary = dict(first.summary)
        summary["area_km2"] = {k: _median_or_none(runs[k]) for k in AREA_KEYS}
        summary["reached_share_of_gain"] = _median_or_none(runs["reached_share_of_gain"])
        summary["front_advance_km"] = _median_or_none(runs["front_advance_km"])
        duration = summary["horizon_years"][-1] - summary["start_year"]
        fa = summary["front_advance_km"]
        summary["spread_rate_km_per_decade"] = fa / duration * 10.0 if fa is not None else None
        summary["occupied_km2"] = {"start": first.summary["occupied_km2"]["start"],
                                   "horizon": _median_or_none(self._horizon_km2)}
        summary["leading_edge_shift_km"] = _median_or_none(self._edges)
        summary["intervals"] = {
            "area_km2": {k: percentile_interval(runs[k]) for k in AREA_KEYS},
            "front_advance_km": percentile_interval(runs["front_advance_km"]),
            "reached_share_of_gain": percentile_interval(runs["reached_share_of_gain"]),
            "method": INTERVAL_METHOD,
        }
        summary["n_runs"] = int(len(runs))
        summary["runs_by"] = {k: sorted({lab[k] for lab in labels}, key=str) for k in labels[0]}
        summary["combination"] = ("medians and intervals over every run (each stochastic replicate of each climate "
                                  "path counts once); classes: the class most runs give a cell; arrival year: the "
                                  "median over climate paths; front: where half of the climate paths are occupied")
        return ReachRunSet(classes=classes, probability=probability, arrival_year=arrival, summary=summary,
                           front=front, runs=runs)


def combine_reach_runs(results: list, labels: list) -> ReachRunSet:
    """Combine reach runs of one pathway into a probability of reach, medians and 5-95 % intervals.

    Parameters
    ----------
    results : list of :class:`envelope.reach.ReachResult`
        One per climate path (method × climate model × dispersal distance), each with its
        ``runs`` (one per stochastic replicate, or the one deterministic run).
    labels : list of dict
        One per result: what set it apart (e.g. ``method``, ``climate_model``,
        ``pathway``, ``distance_km``); copied into every run's row of ``runs``.

    Every interval comes from the runs themselves: each replicate of each climate path is
    one run. The probability of reach is the share of runs in which a cell is occupied at
    the last horizon (each run weighs the same). The summary keeps the keys of a single
    reach summary, with ``area_km2``, ``reached_share_of_gain``, ``front_advance_km`` and
    ``spread_rate_km_per_decade`` the medians over runs, ``occupied_km2`` and
    ``leading_edge_shift_km`` the medians over the climate paths, and adds ``intervals``
    (``area_km2.<class>``, ``front_advance_km``, ``reached_share_of_gain``: p05/p50/p95),
    ``n_runs`` and ``runs_by`` (the levels of each label). :class:`ReachRunCombiner` makes
    the same combination from results handed over one at a time.
    """
    if not results or len(results) != len(labels):
        raise InputError(f"combine_reach_runs: {len(results)} results and {len(labels)} label rows; "
                         "expected at least one result and one label row each")
    combiner = ReachRunCombiner()
    for result, label in zip(results, labels):
        combiner.add(result, label)
    return combiner.result()
