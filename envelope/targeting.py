"""Where habitat restoration adds the most reachable range: lazy-greedy selection of candidate patches."""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.change import normal_vectors
from envelope.reach import DispersalSettings, cell_lonlat
from envelope.reachable_gain import OBJECTIVES, CandidatePatches, ReachGain, candidate_patches

__all__ = ["CandidatePatches", "ReachGain", "TargetResult", "candidate_patches", "greedy_selection",
           "random_baseline", "nearest_baseline", "target_restoration",
           "TABLE_COLUMNS", "OBJECTIVES"]

TABLE_COLUMNS = ["rank", "patch_id", "area_km2", "cost", "added_reachable_km2", "added_per_km2",
                 "centroid_lon", "centroid_lat"]
RANK_NODATA = 0


def _fits(pid, patches, used_area, used_cost, budget_km2, budget_cost):
    i = pid - 1
    if used_area + patches.area_km2[i] > budget_km2 * (1 + 1e-9):
        return False
    return budget_cost is None or used_cost + patches.cost[i] <= budget_cost * (1 + 1e-9)


def _lazy_greedy(model: ReachGain, budget_km2, budget_cost, per_cost: bool, max_evaluations: int):
    """One CELF pass: pop the best stale bound, re-evaluate, accept if still on top."""
    patches = model.patches
    chosen, steps, current = [], [], 0.0
    used_area = used_cost = 0.0
    # initial bounds are +inf so every patch is evaluated once, lazily, when it reaches the top
    heap = [(-math.inf, pid, -1, 0.0) for pid in range(1, patches.n + 1)]
    heapq.heapify(heap)
    capped, first = False, model.n_evaluations
    while heap:
        _, pid, stamp, gain = heapq.heappop(heap)
        if not _fits(pid, patches, used_area, used_cost, budget_km2, budget_cost):
            continue  # does not fit what is left of the budget; never will (budgets only shrink)
        if stamp == len(chosen):
            chosen.append(pid)
            used_area += patches.area_km2[pid - 1]
            used_cost += patches.cost[pid - 1]
            current += gain
            steps.append(gain)
            continue
        # only fresh reach runs count towards the cap; cached patch sets are free
        if model.n_evaluations - first >= max_evaluations:
            capped = True
            break
        gain = model.value(chosen + [pid]) - current
        score = gain / max(patches.cost[pid - 1], 1e-12) if per_cost else gain
        heapq.heappush(heap, (-score, pid, len(chosen), gain))
    return chosen, steps, current, capped


def greedy_selection(model: ReachGain, *, budget_km2: float, budget_cost: float | None = None,
                     max_evaluations: int = 2000) -> dict:
    """Cost-effective lazy greedy (CELF) selection of patches within the budget.

    Runs the lazy greedy twice -- by marginal gain per unit cost and by plain marginal gain --
    and keeps the better set, as Leskovec et al. (2007) do for their budgeted guarantee.
    The gain is ``model.value``: the added reachable area (mean or worst case over climate
    paths). Both passes start by evaluating every single patch; the model caches patch sets,
    so the second pass gets those (and any later set both passes share) without a reach run.
    Trailing patches whose marginal gain is <= 0 are dropped (budget spent for nothing).
    ``max_evaluations`` caps the fresh patch-set evaluations of each pass; a capped pass stops early.

    Returns
    -------
    dict
        ``chosen`` (patch ids in order), ``steps`` (marginal gain of each), ``total``
        (``model.value(chosen)``), ``capped``, ``rule``.

    References
    ----------
    Leskovec, J., Krause, A., Guestrin, C., Faloutsos, C., VanBriesen, J., Glance, N. (2007)
    Cost-effective outbreak detection in networks. Proc. 13th ACM SIGKDD, 420-429.
    Minoux, M. (1978) Accelerated greedy algorithms for maximizing submodular set functions.
    """
    if not budget_km2 > 0:
        raise InputError(f"--budget-km2 must be > 0, got {budget_km2!r}")
    best = None
    for per_cost in (True, False):
        chosen, steps, total, capped = _lazy_greedy(model, budget_km2, budget_cost, per_cost, max_evaluations)
        if best is None or total > best["total"] + 1e-9:
            best = {"chosen": chosen, "steps": steps, "total": total, "capped": capped,
                    "rule": "gain per unit cost" if per_cost else "gain"}
        else:
            best["capped"] = best["capped"] or capped
    # drop trailing patches that add nothing: restoring them is budget spent for no gain
    while best["steps"] and best["steps"][-1] <= 1e-9:
        best["total"] -= best["steps"].pop()
        best["chosen"].pop()
    return best


def _fill_in_order(order, patches, budget_km2, budget_cost):
    chosen, used_area, used_cost = [], 0.0, 0.0
    for pid in order:
        if _fits(pid, patches, used_area, used_cost, budget_km2, budget_cost):
            chosen.append(int(pid))
            used_area += patches.area_km2[pid - 1]
            used_cost += patches.cost[pid - 1]
    return chosen


def random_baseline(model: ReachGain, *, budget_km2, budget_cost=None, draws: int = 10, seed: int = 0) -> float:
    """Mean objective over seeded random orders of the patches, each filled up to the budget."""
    rng = np.random.default_rng(seed)
    gains = []
    for _ in range(draws):
        order = rng.permutation(np.arange(1, model.patches.n + 1))
        gains.append(model.value(_fill_in_order(order, model.patches, budget_km2, budget_cost)))
    return float(np.mean(gains))


def nearest_baseline(model: ReachGain, lon, lat, *, budget_km2, budget_cost=None) -> tuple:
    """Objective of the patches taken nearest the occupied start cells first (great-circle distance).

    Distances are chord lengths between unit surface normals (monotone in great-circle
    distance) found with a k-d tree (``scipy.spatial.cKDTree``). Returns (gain, chosen ids).
    """
    from scipy.spatial import cKDTree

    occupied = (model.start >= 0.5).ravel()
    lon, lat = np.asarray(lon).ravel(), np.asarray(lat).ravel()
    tree = cKDTree(normal_vectors(lon[occupied], lat[occupied]))
    dist = [tree.query(normal_vectors(lon[c], lat[c]))[0].min() for c in model.patches.cells]
    order = np.argsort(dist, kind="stable") + 1
    chosen = _fill_in_order(order, model.patches, budget_km2, budget_cost)
    return model.value(chosen), chosen


@dataclass
class TargetResult:
    rank: xr.DataArray
    table: pd.DataFrame
    summary: dict


def _per_path_steps(model: ReachGain, chosen) -> np.ndarray:
    """Added area per climate path of each chosen patch in turn, shape (len(chosen), n_paths)."""
    totals = [model.path_gains(chosen[:k]) for k in range(len(chosen) + 1)]
    return np.diff(np.array(totals).reshape(len(chosen) + 1, -1), axis=0)


def _check_some_patch_fits(patches, budget_km2, budget_cost) -> None:
    """Refuse a budget no candidate patch fits in: choosing nothing would look like a finding."""
    area = np.asarray(patches.area_km2, dtype=np.float64)
    cost = np.asarray(patches.cost, dtype=np.float64)
    fits = area <= budget_km2 * (1 + 1e-9)
    if budget_cost is not None:
        fits &= cost <= budget_cost * (1 + 1e-9)
    if fits.any():
        return
    i = int(np.argmin(area))
    if budget_cost is not None and area[i] <= budget_km2 * (1 + 1e-9):
        j = int(np.argmin(cost))
        raise InputError(f"--budget-cost {budget_cost:g}: no candidate patch fits both budgets; the cheapest "
                         f"patch (id {j + 1}) costs {cost[j]:.4g} and covers {area[j]:.4g} km²")
    raise InputError(f"--budget-km2 {budget_km2:g}: no candidate patch fits; the smallest (patch id {i + 1}) "
                     f"covers {area[i]:.4g} km² (raise the budget, or cut patches with --max-patch-km2)")


def target_restoration(now, futures, habitat, start, candidates, *, budget_km2: float, threshold: float,
                       settings: DispersalSettings, cost=None, budget_cost=None, quality=1.0,
                       objective: str = "mean", now_year: float = 2020, step_years: float = 1.0,
                       rate: float = 1.0, persistence_years: float = 0.0, random_draws: int = 10, seed: int = 0,
                       max_evaluations: int = 2000, cache: bool = True, max_patch_km2=None) -> TargetResult:
    """Rank candidate restoration patches by the reachable range (km²) they add by the horizon.

    Parameters
    ----------
    now, habitat, start, threshold, settings, now_year, step_years, rate, persistence_years
        As for :func:`envelope.reach.simulate_reach` (deterministic mode).
    futures : list of (year, DataArray), or dict of name -> list of (year, DataArray)
        One climate path (suitability at each horizon), or several named paths (e.g.
        pathway × climate model); the objective then combines their gains.
    candidates : DataArray or ndarray (y, x)
        Nonzero where a cell could become habitat (see
        :func:`envelope.reachable_gain.candidates_from_classes` for land-cover codes).
    max_patch_km2 : float, optional
        Cut connected candidate areas larger than this into pieces of at most this area
        (:func:`envelope.reachable_gain.candidate_patches`); default: whole components.
    budget_km2 : float
        Total true area of restored patches allowed (always binding).
    cost : DataArray (y, x), optional
        Cost per cell; the greedy ranks by gain per unit of it (default: per km²).
    budget_cost : float, optional
        Total cost allowed, in addition to the area budget.
    quality : float or DataArray (y, x)
        Habitat quality a restored cell reaches, in (0, 1] (one number, or per cell):
        habitat becomes max(current, quality).
    objective : {"mean", "worst"}
        With several climate paths: the mean of the added reachable area over paths, or
        its minimum (the gain every path gets at least).
    cache : bool, default=True
        Reuse the reach runs of patch sets already evaluated (:class:`ReachGain`); off only
        to measure what the cache saves (bench/bench_target.py).

    Returns
    -------
    TargetResult
        ``rank`` (int, 1 = chosen first, 0 = nodata), ``table`` (:data:`TABLE_COLUMNS`, plus
        ``added_reachable_km2.<path>`` per climate path when there are several), ``summary``.

    References
    ----------
    Leskovec et al. (2007), Cost-effective outbreak detection in networks, KDD (CELF).
    """
    if not (budget_km2 is not None and budget_km2 > 0 and math.isfinite(budget_km2)):
        raise InputError(f"--budget-km2 must be a number > 0, got {budget_km2!r}")
    if budget_cost is not None and not budget_cost > 0:
        raise InputError(f"--budget-cost must be > 0, got {budget_cost!r}")
    from envelope.grids import cell_area_km2, spans_globe

    areas = np.asarray(cell_area_km2(now).values, dtype=np.float64)
    lat, lon = cell_lonlat(now)
    patches = candidate_patches(np.asarray(getattr(candidates, "values", candidates)), areas, lon, lat,
                                cost=None if cost is None else np.asarray(getattr(cost, "values", cost)),
                                max_patch_km2=max_patch_km2, periodic_x=spans_globe(now))
    _check_some_patch_fits(patches, budget_km2, budget_cost)
    model = ReachGain(now, futures, habitat, start, patches, threshold=threshold, settings=settings,
                      quality=quality, objective=objective, now_year=now_year, step_years=step_years, rate=rate,
                      persistence_years=persistence_years, cell_area_km2=areas, cache=cache)
    base = model.path_areas(())
    best = greedy_selection(model, budget_km2=budget_km2, budget_cost=budget_cost, max_evaluations=max_evaluations)
    random_gain = random_baseline(model, budget_km2=budget_km2, budget_cost=budget_cost, draws=random_draws,
                                  seed=seed)
    nearest_gain, _ = nearest_baseline(model, lon, lat, budget_km2=budget_km2, budget_cost=budget_cost)

    several = len(model.names) > 1
    per_path = _per_path_steps(model, best["chosen"])
    columns = TABLE_COLUMNS + ([f"added_reachable_km2.{n}" for n in model.names] if several else [])
    rows, rank = [], np.zeros(patches.labels.shape, dtype=np.int32)
    for r, (pid, gain) in enumerate(zip(best["chosen"], best["steps"]), start=1):
        i = pid - 1
        rank[patches.labels == pid] = r
        row = {"rank": r, "patch_id": pid, "area_km2": patches.area_km2[i], "cost": patches.cost[i],
               "added_reachable_km2": gain, "added_per_km2": gain / patches.area_km2[i],
               "centroid_lon": patches.centroid_lon[i], "centroid_lat": patches.centroid_lat[i]}
        if several:
            row.update({f"added_reachable_km2.{n}": float(v) for n, v in zip(model.names, per_path[r - 1])})
        rows.append(row)
    table = pd.DataFrame(rows, columns=columns)
    dtype = np.uint16 if len(rows) < 65535 else np.int32
    rank_da = now.copy(data=rank.astype(dtype)).rename("priority_rank")
    chosen_gains = model.path_gains(best["chosen"])
    summary = {
        "reachable_gain_km2": best["total"],
        "random_baseline_gain_km2": random_gain,
        "nearest_baseline_gain_km2": nearest_gain,
        "objective": objective,
        "budget_km2": float(budget_km2),
        "max_patch_km2": None if max_patch_km2 is None else float(max_patch_km2),
        "budget_cost": budget_cost,
        "n_candidate_patches": patches.n,
        "n_chosen": len(rows),
        "baseline_gained_reached_km2": float(np.mean(base)),
        "climate_paths": [{"name": n, "horizon_years": model.horizons[n],
                           "baseline_gained_reached_km2": float(b), "reachable_gain_km2": float(g)}
                          for n, b, g in zip(model.names, base, chosen_gains)],
        "chosen_area_km2": float(table["area_km2"].sum()) if rows else 0.0,
        "chosen_cost": float(table["cost"].sum()) if rows else 0.0,
        "cost_source": "raster" if cost is not None else "area (km²)",
        "greedy_rule": best["rule"],
        "n_evaluations": model.n_evaluations,
        "n_reach_runs": model.n_reach_runs,
        "n_cache_hits": model.n_cache_hits,
        "evaluations_capped": best["capped"],
        "random_draws": random_draws,
        "seed": seed,
        "quality": quality if np.ndim(quality) == 0 else "raster",
        "threshold": threshold,
        "kernel": settings.kernel,
        "mean_distance_km": settings.mean_distance_km,
        "horizon_years": sorted({y for n in model.names for y in model.horizons[n]}),
        "method": "lazy greedy (CELF, Leskovec et al. 2007) on deterministic reach runs",
    }
    return TargetResult(rank=rank_da, table=table, summary=summary)
