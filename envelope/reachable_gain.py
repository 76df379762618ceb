"""The targeting objective: reachable range gained when candidate patches are restored, over one or more climate paths."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.change import normal_vector_sums, position_from_vector
from envelope.kernels.fragmentation import label_patches, split_patches
from envelope.kernels.transient import ClimatePath, run_transient
from envelope.reach import DispersalSettings, build_operator, habitat_array, occupied_start

__all__ = ["CandidatePatches", "ReachGain", "candidate_patches", "candidates_from_classes", "restoration_quality",
           "OBJECTIVES", "SINGLE_PATH_NAME"]

#: How the gains under several climate paths are combined into one objective.
OBJECTIVES = ("mean", "worst")
#: Name of the climate path when only one (a list of horizons) is given.
SINGLE_PATH_NAME = "future"


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


def candidates_from_classes(codes, classes, *, name="--candidates") -> np.ndarray:
    """Candidate mask (bool) from a land-cover raster: the cells whose code is in ``classes``.

    ``codes`` is the raster's values (integer codes; NaN or nodata never match). An error
    names the codes the raster holds when none of ``classes`` is found.
    """
    values = np.asarray(getattr(codes, "values", codes))
    wanted = [int(c) for c in classes]
    if not wanted:
        raise InputError(f"{name}: no land-cover class given; expected restorable class codes, e.g. 4,5")
    if values.dtype.kind == "f":
        finite = values[np.isfinite(values)]
        if finite.size and not np.array_equal(finite, np.round(finite)):
            raise InputError(f"{name}: holds non-integer values (e.g. {finite[finite != np.round(finite)][0]:g}); "
                             "with class codes expected a land-cover raster of integer codes")
    mask = np.isin(values, wanted)
    if not mask.any():
        present = np.unique(values[np.isfinite(values)] if values.dtype.kind == "f" else values)
        shown = ", ".join(f"{v:g}" for v in present[:20]) + (" ..." if present.size > 20 else "")
        raise InputError(f"{name}: no cell of class {', '.join(map(str, wanted))} (the raster holds codes {shown})")
    return mask


def candidate_patches(candidates, cell_area, lon, lat, *, cost=None, name="--candidates",
                      cost_name="--cost", max_patch_km2=None, periodic_x=False) -> CandidatePatches:
    """Group nonzero candidate cells into 4-connected patches with area, cost and centroid.

    With ``max_patch_km2`` a large connected area is cut into pieces along a square block
    grid whose blocks hold at most that area (sized on the largest cell, so on geographic
    grids the pieces of smaller, poleward cells are smaller still), so each patch is a site
    of a size one project can restore (:func:`envelope.kernels.fragmentation.split_patches`).

    The centroid is the area-weighted mean of the cells' surface normals (n-vectors),
    turned back into longitude and latitude, so patches across the antimeridian or near a
    pole get their true middle (:func:`envelope.kernels.change.normal_vector_sums`, the
    same method as the range centroid of `envelope change`). With ``periodic_x`` (a grid that
    circles the globe) cells touching across the east-west seam are one patch.

    References
    ----------
    SciPy ``scipy.ndimage.label`` via :func:`envelope.kernels.fragmentation.label_patches`.
    Gade, K. (2010) A non-singular horizontal position representation. Journal of Navigation 63: 395-417.
    """
    cand = np.asarray(candidates, dtype=np.float64)
    mask = np.isfinite(cand) & (cand != 0)
    if not mask.any():
        raise InputError(f"{name}: no candidate cell (no nonzero value); expected cells that could become habitat")
    if max_patch_km2 is None:
        labels, n = label_patches(mask, connectivity=4, periodic_x=periodic_x)
    else:
        largest = float(np.nanmax(np.asarray(cell_area, dtype=np.float64)[mask]))
        if not (max_patch_km2 > 0 and math.isfinite(max_patch_km2)):
            raise InputError(f"--max-patch-km2 must be a number > 0, got {max_patch_km2!r}")
        if max_patch_km2 < largest:
            raise InputError(f"--max-patch-km2 {max_patch_km2:g} is smaller than one candidate cell "
                             f"({largest:.4g} km²); expected at least one cell's area")
        side = int(math.floor(math.sqrt(max_patch_km2 / largest)))
        labels, n = split_patches(mask, side, side, connectivity=4)
    areas = np.asarray(cell_area, dtype=np.float64).ravel()
    flat = labels.ravel()
    area_km2 = np.bincount(flat, weights=areas, minlength=n + 1)[1:]
    if cost is None:
        costs = area_km2.copy()
    else:
        c = np.asarray(cost, dtype=np.float64)
        bad = mask & ~(np.isfinite(c) & (c >= 0))
        if bad.any():
            raise InputError(f"{cost_name}: {int(bad.sum())} candidate cell(s) have no cost or a negative one; "
                             "expected a finite cost >= 0 in every candidate cell")
        costs = np.bincount(flat, weights=np.where(mask, c, 0.0).ravel(), minlength=n + 1)[1:]
    order = np.argsort(flat, kind="stable")
    bounds = np.searchsorted(flat[order], np.arange(n + 2))
    cells = [order[bounds[i]:bounds[i + 1]] for i in range(1, n + 1)]
    lon, lat = np.asarray(lon, dtype=np.float64).ravel(), np.asarray(lat, dtype=np.float64).ravel()
    centroids = np.array([position_from_vector(normal_vector_sums(lon[c], lat[c], areas[c])) for c in cells])
    return CandidatePatches(labels, n, area_km2, costs, centroids[:, 0], centroids[:, 1], cells)


def restoration_quality(quality, candidates_mask, *, name="--quality"):
    """The habitat quality restored cells reach: a number in (0, 1], or a per-cell array.

    A per-cell array must hold a value in (0, 1] in every candidate cell (other cells are
    not used). Returns a float or a float64 array.
    """
    if np.ndim(quality) == 0:
        q = float(quality)
        if not (0 < q <= 1):
            raise InputError(f"{name} must lie in (0, 1], got {quality!r}")
        return q
    q = np.asarray(getattr(quality, "values", quality), dtype=np.float64)
    mask = np.asarray(candidates_mask, dtype=bool)
    if q.shape != mask.shape:
        raise InputError(f"{name}: quality raster has shape {q.shape}, the candidates {mask.shape}")
    inside = q[mask]
    bad = ~(np.isfinite(inside) & (inside > 0) & (inside <= 1))
    if bad.any():
        found = inside[np.isfinite(inside)]
        shown = f"found {found.min():g}..{found.max():g}" if found.size else "found no value"
        raise InputError(f"{name}: {int(bad.sum())} candidate cell(s) have no quality or one outside (0, 1] "
                         f"({shown}); expected the habitat quality 0 < Q <= 1 each candidate cell would reach")
    return q


def _climate_paths(futures) -> dict:
    """{name: [(year, DataArray), ...]} from one list of horizons or a mapping of named paths."""
    paths = dict(futures) if isinstance(futures, dict) else {SINGLE_PATH_NAME: list(futures)}
    if not paths or not all(paths.values()):
        raise InputError("target needs at least one future suitability map (--future, --scenarios or --study)")
    return {name: sorted(horizons, key=lambda t: float(t[0])) for name, horizons in paths.items()}


class ReachGain:
    """Deterministic reach model with one spread operator, evaluated for restored patch sets.

    For each climate path s (a list of (year, suitability) horizons), ``f_s(S)`` is exactly
    :func:`envelope.reach.simulate_reach`'s ``summary["area_km2"]["gained_reached"]``
    (deterministic mode) with habitat raised to ``max(current, quality)`` in the patches S.
    The gain of S under path s is ``f_s(S) - f_s(∅)``; the objective :meth:`value` is their
    mean over paths (``objective="mean"``) or their minimum (``"worst"``). The kernel is
    discretised once; results are cached by patch set (restoration is a union, so the
    order of patches does not matter), so a set is run once however often it is asked for.

    Attributes
    ----------
    n_evaluations : int
        Patch sets actually run (each one reach run per climate path).
    n_reach_runs : int
        Reach runs (``n_evaluations`` x number of paths).
    n_cache_hits : int
        Requests answered from the cache.
    """

    def __init__(self, now: xr.DataArray, futures, habitat: xr.DataArray, start, patches: CandidatePatches,
                 *, threshold: float, settings: DispersalSettings, quality=1.0, objective: str = "mean",
                 now_year: float = 2020, step_years: float = 1.0, rate: float = 1.0,
                 persistence_years: float = 0.0, cell_area_km2=None, cache: bool = True):
        from envelope.grids import cell_area_km2 as _areas, is_geographic

        if objective not in OBJECTIVES:
            raise InputError(f"--objective must be one of {', '.join(OBJECTIVES)}, got {objective!r}")
        if not step_years > 0:
            raise InputError(f"--step-years must be > 0, got {step_years!r}")
        if not rate > 0:
            raise InputError(f"--rate must be > 0, got {rate!r}")
        paths = _climate_paths(futures)
        self.quality = restoration_quality(quality, patches.labels > 0)
        now_arr = np.asarray(now.values, dtype=np.float64)
        self.habitat = habitat_array(habitat)
        self.start = occupied_start(start, now)
        self.areas = np.asarray(_areas(now).values if cell_area_km2 is None else cell_area_km2, dtype=np.float64)
        self.operator = build_operator(now, settings, None, is_geographic(now))
        persistence_steps = int(math.ceil(persistence_years / step_years - 1e-9)) if persistence_years > 0 else 0
        self.names, self.horizons, self._paths = [], {}, []
        for name, horizons in paths.items():
            years = [float(y) for y, _ in horizons]
            if years[0] <= now_year:
                raise InputError(f"climate path {name!r}: horizon year {years[0]:g} is not after the start year "
                                 f"{now_year:g}")
            maps = [now_arr] + [np.asarray(f.values, dtype=np.float64) for _, f in horizons]
            valid = np.all([np.isfinite(m) for m in maps], axis=0)
            # the gain cells of simulate_reach's class 3, before the habitat and reached conditions
            gain_cells = valid & ~(now_arr >= threshold) & (maps[-1] >= threshold)
            kw = dict(threshold=threshold, start_year=now_year, end_year=years[-1], step_years=step_years,
                      rate=rate, persistence_steps=persistence_steps)
            self.names.append(str(name))
            self.horizons[str(name)] = years
            self._paths.append((ClimatePath([now_year] + years, maps), gain_cells, kw))
        self.patches, self.objective, self.cache = patches, objective, cache
        self._cache, self._base = {}, None
        self.n_evaluations = self.n_reach_runs = self.n_cache_hits = 0

    def restored_habitat(self, chosen) -> np.ndarray:
        hab = self.habitat.copy().ravel()
        per_cell = np.ndim(self.quality) > 0
        quality = self.quality.ravel() if per_cell else self.quality
        for pid in chosen:
            idx = self.patches.cells[pid - 1]
            hab[idx] = np.maximum(hab[idx], quality[idx] if per_cell else quality)
        return hab.reshape(self.habitat.shape)

    def path_areas(self, chosen=()) -> np.ndarray:
        """f_s(S): area (km²) newly suitable, with habitat and occupied (>= 0.5) at the horizon, per path."""
        key = frozenset(int(p) for p in chosen)
        if key in self._cache:
            self.n_cache_hits += 1
            return self._cache[key]
        hab = self.restored_habitat(sorted(key))
        out = np.empty(len(self._paths))
        for i, (climate, gain_cells, kw) in enumerate(self._paths):
            result = run_transient(self.operator, self.start, hab, climate, snapshot_years=(), **kw)
            out[i] = float(self.areas[gain_cells & (hab > 0) & (result.final >= 0.5)].sum())
        self.n_evaluations += 1
        self.n_reach_runs += len(self._paths)
        if self.cache or not key:
            self._cache[key] = out
        return out

    def gained_reached(self, chosen=()) -> float:
        """Mean over climate paths of f_s(S) (with one path: simulate_reach's gained_reached)."""
        return float(np.mean(self.path_areas(chosen)))

    def path_gains(self, chosen) -> np.ndarray:
        """f_s(S) - f_s(∅) per climate path: what restoring S adds under each."""
        if self._base is None:
            self._base = self.path_areas(())
        return self.path_areas(chosen) - self._base

    def value(self, chosen) -> float:
        """The objective: mean (or minimum, ``objective="worst"``) over paths of the added area."""
        gains = self.path_gains(chosen)
        return float(np.min(gains) if self.objective == "worst" else np.mean(gains))
