"""The targeting pipeline's outputs: the priority-rank raster, the patch table and the summary."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from envelope.errors import InputError
from envelope.grids import check_same_grid
from envelope.io.atomic import atomic_outputs, check_writable
from envelope.io.rasters import open_layer
from envelope.io.tables import suitability_paths
from envelope.io.writing import write_raster
from envelope.pipelines.inputs import build_reach_inputs
from envelope.provenance import json_text
from envelope.reach import DispersalSettings
from envelope.reachable_gain import candidates_from_classes
from envelope.targeting import RANK_NODATA, TargetResult, target_restoration

__all__ = ["choose_patches", "reach_model_from_options", "write_target_outputs"]


def _quality(text, grid, grid_name):
    """--quality: a number in (0, 1], or a raster on the grid (checked per candidate cell later)."""
    try:
        value = float(text)
    except ValueError:
        if not Path(text).is_file():
            raise InputError(f"--quality {text!r}: expected a number in (0, 1] or a quality raster, "
                             "and there is no such file") from None
        return check_same_grid(grid, open_layer(text), ref_name=grid_name, other_name=f"--quality {text}")
    if not (0 < value <= 1):
        raise InputError(f"--quality must lie in (0, 1], got {text}")
    return value


def choose_patches(model, candidates, *, candidate_classes=None, cost=None, quality="1", budget_km2,
                   budget_cost=None, objective="mean", random_draws=10, seed=0, max_evaluations=None,
                   max_patch_km2=None) -> TargetResult:
    """Rank the candidate patches of the raster ``candidates`` for the reach model ``model``.

    ``model`` is :class:`envelope.pipelines.inputs.ReachInputs`; ``candidates`` a raster of
    candidate cells (> 0), or with ``candidate_classes`` a land-cover raster whose listed
    codes are restorable; ``cost`` an optional cost raster; ``quality`` a number in (0, 1]
    or a raster. See :func:`envelope.targeting.target_restoration` for the rest.
    """
    grid, grid_name = model.now, model.now_name
    if candidate_classes is None:
        cand = open_layer(candidates)
    else:
        codes = open_layer(candidates, categorical=True)
        cand = codes.copy(data=candidates_from_classes(codes, candidate_classes,
                                                       name=f"--candidates {candidates}").astype(np.float32))
    cand = check_same_grid(grid, cand, ref_name=grid_name, other_name=f"--candidates {candidates}")
    cost_layer = None
    if cost:
        cost_layer = check_same_grid(grid, open_layer(cost), ref_name=grid_name, other_name=f"--cost {cost}")
    quality_value = _quality(quality, grid, grid_name)
    t0 = time.perf_counter()
    futures = model.futures.get(None, model.futures)  # one --future path, or {path name: horizons}
    result = target_restoration(grid, futures, model.habitat, model.start, cand, budget_km2=budget_km2,
                                threshold=model.threshold, settings=model.settings, cost=cost_layer,
                                budget_cost=budget_cost, quality=quality_value, objective=objective,
                                random_draws=random_draws, seed=seed, max_evaluations=max_evaluations,
                                max_patch_km2=max_patch_km2, **model.timing())
    result.summary["seconds"] = round(time.perf_counter() - t0, 3)
    result.summary["start"] = model.start_info
    result.summary["inputs"] = {**model.inputs, "candidates": candidates, "candidate_classes": candidate_classes,
                                "cost": cost, "quality": None if isinstance(quality_value, float) else quality}
    return result


def reach_model_from_options(now, futures, years, scenario_table, habitat, classes, align_habitat, start, kernel,
                  mean_distance_km, shape, threshold, now_year, step_years, rate, persistence_years, *, species=None):
    """The reach model of `envelope target` from its options: one climate path (--future/--years) or a suitability table.

    ``species`` picks one taxon of a records ``start`` holding several (:func:`envelope.records.select_taxon`)."""
    for flag, value in (("--now", now), ("--habitat", habitat), ("--start", start),
                        ("--mean-distance-km", mean_distance_km)):
        if value is None:
            raise InputError(f"{flag} is required (or give --study and --run-dir)")
    if scenario_table and (futures or years):
        raise InputError("--scenarios replaces --future/--years; give one or the other")
    if scenario_table:
        paths = suitability_paths(scenario_table)
    elif futures:
        years = years or []
        if len(years) != len(futures):
            raise InputError(f"--years gives {len(years)} year(s) for {len(futures)} --future map(s); "
                             "give one per map")
        paths = {None: list(zip(years, futures))}
    else:
        raise InputError("give the future climate: --future with --years, --scenarios, or --study with --run-dir")
    mean_km, mean_range = mean_distance_km
    if mean_range is not None:
        raise InputError("--mean-distance-km: target runs the deterministic model; give one distance, not LOW:HIGH")
    settings = DispersalSettings(kernel=kernel, mean_distance_km=mean_km, shape=shape)
    model = build_reach_inputs(
        now, paths, habitat, start, settings=settings, classes=classes, align_habitat=align_habitat,
        threshold=threshold, now_year=now_year, step_years=step_years, rate=rate,
        persistence_years=persistence_years, start_options=None if species is None else {"species": species},
        path_names=lambda name, p: f"--future {p}" if name is None else f"--scenarios {scenario_table}: {p}")
    model.inputs["scenarios"] = scenario_table
    return model


def write_target_outputs(result: TargetResult, out, table_path, summary_path, *, overwrite=False, tags=None) -> dict:
    """Write the rank raster, the patch table (CSV) and the summary JSON; all checked first, all or nothing."""
    for p in (out, table_path, summary_path):
        check_writable(p, overwrite)
    with atomic_outputs([out, table_path, summary_path], overwrite=overwrite) as (rank_tmp, table_tmp, summary_tmp):
        write_raster(result.rank, rank_tmp, overwrite=True, nodata=RANK_NODATA,
                     tags={**(tags or {}), "meaning": "restoration priority rank (1 = first); 0 = not chosen"})
        result.table.to_csv(table_tmp, index=False)
        summary_tmp.write_text(json_text(result.summary))
    return {"priority": str(out), "table": str(table_path), "summary": str(summary_path)}
