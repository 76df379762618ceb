"""Where habitat restoration adds the most reachable range: lazy-greedy selection of candidate patches."""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.fragmentation import label_patches
from envelope.kernels.transient import ClimatePath, run_transient
from envelope.reach import DispersalSettings, cell_lonlat, occupied_start, build_operator

__all__ = ["CandidatePatches", "ReachGain", "TargetResult", "candidate_patches", "greedy_selection",
           "random_baseline", "nearest_baseline", "target_restoration", "write_target_outputs",
           "TABLE_COLUMNS"]

TABLE_COLUMNS = ["rank", "patch_id", "area_km2", "cost", "added_reachable_km2", "added_per_km2",
                 "centroid_lon", "centroid_lat"]
RANK_NODATA = 0


@dataclass
class CandidatePatches:
    """Candidate cells grouped into 4-connected patches (ids 1..n)."""

    labels: np.ndarray       # (ny, nx) int, 0 = not a candidate
    n: int
    area_km2: np.ndarray     # (n,) true patch area
    cost: np.ndarray         # (n,) summed cost (= area when no cost raster)
    centroid_lon: np.ndarray
    centroid_lat: np.ndarray
    cells: list              # per patch: flat indices of its cells


def candidate_patches(candidates, cell_area, lon, lat, *, cost=None, name="--candidates",
                      cost_name="--cost") -> CandidatePatches:
    """Group nonzero candidate cells into 4-connected patches with area, cost and centroid.

    References
    ----------
    SciPy ``scipy.ndimage.label`` via :func:`envelope.kernels.fragmentation.label_patches`.
    """
    cand = np.asarray(candidates, dtype=np.float64)
    mask = np.isfinite(cand) & (cand != 0)
    if not mask.any():
        raise InputError(f"{name}: no candidate cell (no nonzero value); expected cells that could become habitat")
    labels, n = label_patches(mask, connectivity=4)
    areas = np.asarray(cell_area, dtype=np.float64)
    flat = labels.ravel()
    area_km2 = np.bincount(flat, weights=areas.ravel(), minlength=n + 1)[1:]
    if cost is None:
        costs = area_km2.copy()
    else:
        c = np.asarray(cost, dtype=np.float64)
        bad = mask & ~(np.isfinite(c) & (c >= 0))
        if bad.any():
            raise InputError(f"{cost_name}: {int(bad.sum())} candidate cell(s) have no cost or a negative one; "
                             "expected a finite cost >= 0 in every candidate cell")
        costs = np.bincount(flat, weights=np.where(mask, c, 0.0).ravel(), minlength=n + 1)[1:]
    # area-weighted centroid of cell centres (adequate for patches much smaller than a hemisphere)
    w = areas.ravel()
    clon = np.bincount(flat, weights=(w * np.asarray(lon).ravel()), minlength=n + 1)[1:] / area_km2
    clat = np.bincount(flat, weights=(w * np.asarray(lat).ravel()), minlength=n + 1)[1:] / area_km2
    order = np.argsort(flat, kind="stable")
    bounds = np.searchsorted(flat[order], np.arange(n + 2))
    cells = [order[bounds[i]:bounds[i + 1]] for i in range(1, n + 1)]
    return CandidatePatches(labels, n, area_km2, costs, clon, clat, cells)


class ReachGain:
    """Deterministic reach model with one spread operator, evaluated for restored patch sets.

    ``gained_reached(patches)`` is exactly :func:`envelope.reach.simulate_reach`'s
    ``summary["area_km2"]["gained_reached"]`` (deterministic mode) with habitat raised to
    ``max(current, quality)`` in the given patches; the kernel is discretised once.
    """

    def __init__(self, now: xr.DataArray, futures: list, habitat: xr.DataArray, start, patches: CandidatePatches,
                 *, threshold: float, settings: DispersalSettings, quality: float = 1.0, now_year: float = 2020,
                 step_years: float = 1.0, rate: float = 1.0, persistence_years: float = 0.0, cell_area_km2=None):
        from envelope.grids import cell_area_km2 as _areas, is_geographic

        if not (0 < quality <= 1):
            raise InputError(f"--quality must lie in (0, 1], got {quality!r}")
        futures = sorted(futures, key=lambda t: float(t[0]))
        self.years = [float(y) for y, _ in futures]
        now_arr = np.asarray(now.values, dtype=np.float64)
        maps = [now_arr] + [np.asarray(f.values, dtype=np.float64) for _, f in futures]
        hab = np.asarray(habitat.values, dtype=np.float64)
        self.habitat = np.where(np.isfinite(hab), hab, 0.0)
        self.start = occupied_start(start, now)
        valid = np.isfinite(now_arr)
        for m in maps[1:]:
            valid &= np.isfinite(m)
        self.areas = np.asarray(_areas(now).values if cell_area_km2 is None else cell_area_km2, dtype=np.float64)
        # the gain cells of simulate_reach's class 3, before the habitat and reached conditions
        self.gain_cells = valid & ~(now_arr >= threshold) & (maps[-1] >= threshold)
        self.operator = build_operator(now, settings, None, is_geographic(now))
        self.climate = ClimatePath([now_year] + self.years, maps)
        self.kw = dict(threshold=threshold, start_year=now_year, end_year=self.years[-1], step_years=step_years,
                       rate=rate, persistence_steps=(int(math.ceil(persistence_years / step_years - 1e-9))
                                                     if persistence_years > 0 else 0))
        self.patches, self.quality = patches, float(quality)
        self.n_evaluations = 0

    def restored_habitat(self, chosen) -> np.ndarray:
        hab = self.habitat.copy().ravel()
        for pid in chosen:
            idx = self.patches.cells[pid - 1]
            hab[idx] = np.maximum(hab[idx], self.quality)
        return hab.reshape(self.habitat.shape)

    def gained_reached(self, chosen=()) -> float:
        """Area (km²) newly suitable, with habitat, and occupied (>= 0.5) at the horizon."""
        hab = self.restored_habitat(chosen)
        result = run_transient(self.operator, self.start, hab, self.climate, snapshot_years=(), **self.kw)
        self.n_evaluations += 1
        cells = self.gain_cells & (hab > 0) & (result.final >= 0.5)
        return float(self.areas[cells].sum())


def _fits(pid, patches, used_area, used_cost, budget_km2, budget_cost):
    i = pid - 1
    if used_area + patches.area_km2[i] > budget_km2 * (1 + 1e-9):
        return False
    return budget_cost is None or used_cost + patches.cost[i] <= budget_cost * (1 + 1e-9)


def _lazy_greedy(model: ReachGain, budget_km2, budget_cost, per_cost: bool, max_evaluations: int, base: float):
    """One CELF pass: pop the best stale bound, re-evaluate, accept if still on top."""
    patches = model.patches
    chosen, steps, current = [], [], base
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
        if model.n_evaluations - first >= max_evaluations:
            capped = True
            break
        gain = model.gained_reached(chosen + [pid]) - current
        score = gain / max(patches.cost[pid - 1], 1e-12) if per_cost else gain
        heapq.heappush(heap, (-score, pid, len(chosen), gain))
    return chosen, steps, current, capped


def greedy_selection(model: ReachGain, *, budget_km2: float, budget_cost: float | None = None,
                     max_evaluations: int = 2000, base: float | None = None) -> dict:
    """Cost-effective lazy greedy (CELF) selection of patches within the budget.

    Runs the lazy greedy twice -- by marginal gain per unit cost and by plain marginal gain --
    and keeps the better set, as Leskovec et al. (2007) do for their budgeted guarantee.
    Trailing patches whose marginal gain is <= 0 are dropped (budget spent for nothing).
    ``max_evaluations`` caps the reach runs of each pass; a capped pass stops early.

    References
    ----------
    Leskovec, J., Krause, A., Guestrin, C., Faloutsos, C., VanBriesen, J., Glance, N. (2007)
    Cost-effective outbreak detection in networks. Proc. 13th ACM SIGKDD, 420-429.
    Minoux, M. (1978) Accelerated greedy algorithms for maximizing submodular set functions.
    """
    if not budget_km2 > 0:
        raise InputError(f"--budget-km2 must be > 0, got {budget_km2!r}")
    base = model.gained_reached(()) if base is None else base
    best = None
    for per_cost in (True, False):
        chosen, steps, total, capped = _lazy_greedy(model, budget_km2, budget_cost, per_cost, max_evaluations, base)
        if best is None or total > best["total"] + 1e-9:
            best = {"chosen": chosen, "steps": steps, "total": total, "capped": capped,
                    "rule": "gain per unit cost" if per_cost else "gain"}
        else:
            best["capped"] = best["capped"] or capped
    # drop trailing patches that add nothing: restoring them is budget spent for no gain
    while best["steps"] and best["steps"][-1] <= 1e-9:
        best["steps"].pop()
        best["chosen"].pop()
    best["base"] = base
    return best


def _fill_in_order(order, patches, budget_km2, budget_cost):
    chosen, used_area, used_cost = [], 0.0, 0.0
    for pid in order:
        if _fits(pid, patches, used_area, used_cost, budget_km2, budget_cost):
            chosen.append(int(pid))
            used_area += patches.area_km2[pid - 1]
            used_cost += patches.cost[pid - 1]
    return chosen


def random_baseline(model: ReachGain, *, budget_km2, budget_cost=None, draws: int = 10, seed: int = 0,
                    base: float | None = None) -> float:
    """Mean gain over seeded random orders of the patches, each filled up to the budget."""
    rng = np.random.default_rng(seed)
    base = model.gained_reached(()) if base is None else base
    gains = []
    for _ in range(draws):
        order = rng.permutation(np.arange(1, model.patches.n + 1))
        gains.append(model.gained_reached(_fill_in_order(order, model.patches, budget_km2, budget_cost)) - base)
    return float(np.mean(gains))


def _lonlat_xyz(lon, lat):
    lam, phi = np.radians(lon), np.radians(lat)
    return np.column_stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])


def nearest_baseline(model: ReachGain, lon, lat, *, budget_km2, budget_cost=None,
                     base: float | None = None) -> tuple:
    """Gain of patches taken nearest the occupied start cells first (great-circle distance).

    Distances are chord lengths on the unit sphere (monotone in great-circle distance)
    found with a k-d tree (``scipy.spatial.cKDTree``). Returns (gain, chosen ids).
    """
    from scipy.spatial import cKDTree

    occupied = (model.start >= 0.5).ravel()
    lon, lat = np.asarray(lon).ravel(), np.asarray(lat).ravel()
    tree = cKDTree(_lonlat_xyz(lon[occupied], lat[occupied]))
    dist = [tree.query(_lonlat_xyz(lon[c], lat[c]))[0].min() for c in model.patches.cells]
    order = np.argsort(dist, kind="stable") + 1
    chosen = _fill_in_order(order, model.patches, budget_km2, budget_cost)
    base = model.gained_reached(()) if base is None else base
    return model.gained_reached(chosen) - base, chosen


@dataclass
class TargetResult:
    rank: xr.DataArray
    table: pd.DataFrame
    summary: dict


def target_restoration(now, futures, habitat, start, candidates, *, budget_km2: float, threshold: float,
                       settings: DispersalSettings, cost=None, budget_cost=None, quality: float = 1.0,
                       now_year: float = 2020, step_years: float = 1.0, rate: float = 1.0,
                       persistence_years: float = 0.0, random_draws: int = 10, seed: int = 0,
                       max_evaluations: int = 2000) -> TargetResult:
    """Rank candidate restoration patches by the reachable range (km²) they add by the horizon.

    Parameters
    ----------
    now, futures, habitat, start, threshold, settings, now_year, step_years, rate, persistence_years
        As for :func:`envelope.reach.simulate_reach` (deterministic mode).
    candidates : DataArray (y, x)
        Nonzero where a cell could become habitat.
    budget_km2 : float
        Total true area of restored patches allowed (always binding).
    cost : DataArray (y, x), optional
        Cost per cell; the greedy ranks by gain per unit of it (default: per km²).
    budget_cost : float, optional
        Total cost allowed, in addition to the area budget.
    quality : float
        Habitat quality a restored cell reaches: habitat becomes max(current, quality).

    Returns
    -------
    TargetResult
        ``rank`` (int, 1 = chosen first, 0 = nodata), ``table`` (:data:`TABLE_COLUMNS`), ``summary``.

    References
    ----------
    Leskovec et al. (2007), Cost-effective outbreak detection in networks, KDD (CELF).
    """
    if not (budget_km2 is not None and budget_km2 > 0 and math.isfinite(budget_km2)):
        raise InputError(f"--budget-km2 must be a number > 0, got {budget_km2!r}")
    if budget_cost is not None and not budget_cost > 0:
        raise InputError(f"--budget-cost must be > 0, got {budget_cost!r}")
    if not futures:
        raise InputError("target needs at least one future suitability map (--future)")
    from envelope.grids import cell_area_km2

    areas = np.asarray(cell_area_km2(now).values, dtype=np.float64)
    lat, lon = cell_lonlat(now)
    patches = candidate_patches(np.asarray(candidates.values), areas, lon, lat,
                                cost=None if cost is None else np.asarray(cost.values))
    model = ReachGain(now, futures, habitat, start, patches, threshold=threshold, settings=settings,
                      quality=quality, now_year=now_year, step_years=step_years, rate=rate,
                      persistence_years=persistence_years, cell_area_km2=areas)
    base = model.gained_reached(())
    best = greedy_selection(model, budget_km2=budget_km2, budget_cost=budget_cost,
                            max_evaluations=max_evaluations, base=base)
    random_gain = random_baseline(model, budget_km2=budget_km2, budget_cost=budget_cost, draws=random_draws,
                                  seed=seed, base=base)
    nearest_gain, _ = nearest_baseline(model, lon, lat, budget_km2=budget_km2, budget_cost=budget_cost, base=base)

    rows, rank = [], np.zeros(patches.labels.shape, dtype=np.int32)
    for r, (pid, gain) in enumerate(zip(best["chosen"], best["steps"]), start=1):
        i = pid - 1
        rank[patches.labels == pid] = r
        rows.append({"rank": r, "patch_id": pid, "area_km2": patches.area_km2[i], "cost": patches.cost[i],
                     "added_reachable_km2": gain, "added_per_km2": gain / patches.area_km2[i],
                     "centroid_lon": patches.centroid_lon[i], "centroid_lat": patches.centroid_lat[i]})
    table = pd.DataFrame(rows, columns=TABLE_COLUMNS)
    dtype = np.uint16 if len(rows) < 65535 else np.int32
    rank_da = now.copy(data=rank.astype(dtype)).rename("priority_rank")
    summary = {
        "reachable_gain_km2": best["total"] - base,
        "random_baseline_gain_km2": random_gain,
        "nearest_baseline_gain_km2": nearest_gain,
        "budget_km2": float(budget_km2),
        "budget_cost": budget_cost,
        "n_candidate_patches": patches.n,
        "n_chosen": len(rows),
        "baseline_gained_reached_km2": base,
        "chosen_area_km2": float(table["area_km2"].sum()) if rows else 0.0,
        "chosen_cost": float(table["cost"].sum()) if rows else 0.0,
        "cost_source": "raster" if cost is not None else "area (km²)",
        "greedy_rule": best["rule"],
        "n_evaluations": model.n_evaluations,
        "evaluations_capped": best["capped"],
        "random_draws": random_draws,
        "seed": seed,
        "quality": quality,
        "threshold": threshold,
        "kernel": settings.kernel,
        "mean_distance_km": settings.mean_distance_km,
        "horizon_years": model.years,
        "method": "lazy greedy (CELF, Leskovec et al. 2007) on deterministic reach runs",
    }
    return TargetResult(rank=rank_da, table=table, summary=summary)


def write_target_outputs(result: TargetResult, out, table_path, summary_path, *, overwrite=False, tags=None) -> dict:
    """Write the rank raster, the patch table (CSV) and the summary JSON; all checked first, each atomic."""
    import json

    from envelope.io.atomic import atomic_output, check_writable
    from envelope.io.rasters import write_raster

    for p in (out, table_path, summary_path):
        check_writable(p, overwrite)
    write_raster(result.rank, out, overwrite=overwrite, nodata=RANK_NODATA,
                 tags={**(tags or {}), "meaning": "restoration priority rank (1 = first); 0 = not chosen"})
    with atomic_output(table_path, overwrite=overwrite) as tmp:
        result.table.to_csv(tmp, index=False)
    with atomic_output(summary_path, overwrite=overwrite) as tmp:
        tmp.write_text(json.dumps(result.summary, indent=2))
    return {"priority": str(out), "table": str(table_path), "summary": str(summary_path)}
