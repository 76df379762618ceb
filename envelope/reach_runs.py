"""Reach over many runs (climate models × pathways × methods × dispersal distances × replicates): probability of reach, medians and intervals."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.compact import PackedSnapshots
from envelope.kernels.rowblocks import row_blocks
from envelope.reach import REACH_CLASSES, REACH_NODATA, ReachResult, front_geojson

__all__ = ["AREA_KEYS", "INTERVAL_PERCENTILES", "ReachRunSet", "combine_reach_runs", "distance_levels",
           "percentile_interval"]

#: The percentiles of every interval: the 5 %, 50 % and 95 % values across runs.
INTERVAL_PERCENTILES = (5, 50, 95)
#: The ``area_km2`` keys of a reach summary (reach classes 1-5), in summary order.
AREA_KEYS = ("gained_reached", "gained_unreached", "gained_no_habitat", "lost", "stable")
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
    """Per cell the median arrival year over runs (never = later than any), float32, NaN if never or not valid."""
    out = np.empty(valid.shape, dtype=np.float32)
    for rows in row_blocks(out.shape):
        years = np.stack([np.where(np.isfinite(g[rows]), g[rows], np.inf) for g in grids])
        med = np.median(years, axis=0)
        out[rows] = np.where(valid[rows] & np.isfinite(med), med, np.nan)
    return out


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
    ``n_runs`` and ``runs_by`` (the levels of each label).
    """
    if not results or len(results) != len(labels):
        raise InputError(f"combine_reach_runs: {len(results)} results and {len(labels)} label rows; "
                         "expected at least one result and one label row each")
    rows = []
    for result, label in zip(results, labels):
        if not isinstance(result, ReachResult) or not result.runs:
            raise InputError(f"combine_reach_runs: run {label}: expected a ReachResult with its runs")
        for k, run in enumerate(result.runs):
            rows.append({**label, "replicate": k if result.summary["replicates"] else None, **run["area_km2"],
                         "reached_share_of_gain": run["reached_share_of_gain"],
                         "front_advance_km": run["front_advance_km"]})
    runs = pd.DataFrame(rows)
    first = results[0]
    # each run weighs the same: a path's reached share is the mean of its runs' 0/1 states
    weights = np.asarray([len(r.runs) for r in results], dtype=np.float64)
    share = None
    for w, r in zip(weights, results):  # the weighted sum in place: no grid per term
        term = np.array(r.reached_share.values, dtype=np.float64)
        np.nan_to_num(term, copy=False)
        term *= w
        share = term if share is None else np.add(share, term, out=share)
        del term
    share /= weights.sum()
    valid = np.isfinite(np.asarray(first.reached_share.values))
    like = first.reached_share
    probability = share.astype(np.float32)
    del share
    probability[~valid] = np.nan
    probability = like.copy(data=probability)
    if len(results) == 1:
        classes, arrival, front = first.classes, first.arrival_year, first.front
    else:
        classes = first.classes.copy(data=_mode_classes([np.asarray(r.classes.values) for r in results]))
        arrival = like.copy(data=_median_arrival([np.asarray(r.arrival_year.values) for r in results], valid))
        # the front where half of the climate paths hold the cell (occupancy >= 0.5) at each
        # snapshot; the shares are packed like the runs' own snapshots, one layer unpacked at a time
        snap_years = sorted(set.intersection(*(set(r.occupancy) for r in results)))
        halves = PackedSnapshots()
        for yr in snap_years:
            held = np.zeros(like.shape, dtype=np.int64)
            for r in results:
                held += r.occupancy[yr].values >= 0.5  # NaN compares False, as 0 would
            halves.add(yr, (held / len(results)).astype(np.float32))
            del held
        front = front_geojson(like, halves.mapped(lambda values: like.copy(data=values)), level=0.5)

    summary = dict(first.summary)
    summary["area_km2"] = {k: _median_or_none(runs[k]) for k in AREA_KEYS}
    summary["reached_share_of_gain"] = _median_or_none(runs["reached_share_of_gain"])
    summary["front_advance_km"] = _median_or_none(runs["front_advance_km"])
    duration = summary["horizon_years"][-1] - summary["start_year"]
    fa = summary["front_advance_km"]
    summary["spread_rate_km_per_decade"] = fa / duration * 10.0 if fa is not None else None
    summary["occupied_km2"] = {"start": first.summary["occupied_km2"]["start"],
                               "horizon": _median_or_none([r.summary["occupied_km2"]["horizon"] for r in results])}
    summary["leading_edge_shift_km"] = _median_or_none([r.summary["leading_edge_shift_km"] for r in results])
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
