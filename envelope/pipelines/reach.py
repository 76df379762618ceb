"""The reach pipeline: opened reach inputs in, reach-class, arrival-year, front and summary files out."""

from __future__ import annotations

import json
from pathlib import Path
from dataclasses import replace

from envelope.io.atomic import atomic_output, atomic_outputs, check_writable
from envelope.io.writing import write_raster
from envelope.provenance import json_text
from envelope.reach import REACH_CLASSES, REACH_NODATA, ReachResult, simulate_reach

__all__ = ["PARTITION_FACTORS", "PARTITION_QUANTITIES", "as_run_set", "run_reach", "run_reach_set", "write_reach_outputs",
           "write_uncertainty_partition"]

#: Sources of the uncertainty partition: the labels of every reach run.
PARTITION_FACTORS = ("method", "climate_model", "pathway", "distance_km")
#: Quantities split by the uncertainty partition: name -> how it is computed from a run's areas (km²).
PARTITION_QUANTITIES = {
    "reachable_gain_km2": "gained_reached",
    "range_change_km2": "gained_reached + gained_unreached + gained_no_habitat - lost",
}


def run_reach(inputs, *, replicates: int = 0, seed: int = 0, progress=None, path=None) -> ReachResult:
    """Simulate one climate path of :class:`envelope.pipelines.inputs.ReachInputs` (its only one by default).

    The summary gets the start description and the inputs' names.
    """
    futures = inputs.single_path() if path is None else inputs.futures[path]
    result = simulate_reach(inputs.now, futures, inputs.habitat, inputs.start, threshold=inputs.threshold,
                            settings=inputs.settings, replicates=replicates, seed=seed, progress=progress,
                            **inputs.timing())
    result.summary["start"] = inputs.start_info
    result.summary["inputs"] = dict(inputs.inputs)
    return result


def as_run_set(result: ReachResult):
    """One reach result as a run set: summary keys as medians over its runs (replicates), with intervals."""
    from envelope.reach_runs import combine_reach_runs

    combined = combine_reach_runs([result], [{}])
    combined.summary.pop("runs_by", None)
    return combined


def run_reach_set(inputs_by_method: dict, *, pathway: str, distances_km, replicates: int = 0, seed: int = 0,
                  progress=None):
    """Reach on every climate path of one pathway, for each method and dispersal distance, combined.

    Parameters
    ----------
    inputs_by_method : dict
        Method -> :class:`envelope.pipelines.inputs.ReachInputs` whose ``futures`` are keyed
        by climate model (each that model's suitability maps by horizon, for this method).
    pathway : str
        The pathway's name (a label of every run).
    distances_km : list of float
        Mean dispersal distances per step; each climate path is run at each.
    replicates : int
        0: one deterministic run per setting; N: N stochastic replicates per setting, each
        counted as one run.
    seed : int
        Each setting gets its own seed stream (``seed + k`` for the k-th setting).
    progress : callable(str), optional
        Called with the name of each setting before it runs.

    Returns
    -------
    :class:`envelope.reach_runs.ReachRunSet` (its runs labelled ``method``, ``climate_model``,
    ``pathway``, ``distance_km``).
    """
    from envelope.reach_runs import ReachRunCombiner

    combiner = ReachRunCombiner()  # each result is combined as it comes, then dropped: no grid set per path
    k = 0
    for method, inputs in inputs_by_method.items():
        for climate_model, futures in inputs.futures.items():
            for d in distances_km:
                if progress is not None:
                    progress(f"{pathway} {method} {climate_model} {d:g} km")
                settings = replace(inputs.settings, mean_distance_km=float(d), mean_distance_range_km=None)
                result = simulate_reach(inputs.now, futures, inputs.habitat, inputs.start, threshold=inputs.threshold,
                                        settings=settings, replicates=replicates, seed=seed + k, **inputs.timing())
                combiner.add(result, {"method": method, "climate_model": climate_model, "pathway": pathway,
                                      "distance_km": float(d)})
                del result
                k += 1
    combined = combiner.result()
    first = next(iter(inputs_by_method.values()))
    combined.summary["start"] = first.start_info
    combined.summary["inputs"] = dict(first.inputs)
    combined.summary["mean_distance_km"] = float(sorted(distances_km)[len(distances_km) // 2])
    combined.summary["mean_distance_levels_km"] = [float(d) for d in distances_km]
    combined.summary["seed"] = seed
    return combined


def write_uncertainty_partition(runs_tables, out, *, overwrite=False):
    """Split the variance of each :data:`PARTITION_QUANTITIES` over the runs of all pathways; write the CSV.

    ``runs_tables`` are the ``runs`` tables of :func:`run_reach_set` (one per pathway).
    Returns the table (columns ``quantity``, ``source``, ``share``).
    """
    import pandas as pd

    from envelope.uncertainty import partition_table

    runs = pd.concat(list(runs_tables), ignore_index=True)
    runs["reachable_gain_km2"] = runs["gained_reached"]
    runs["range_change_km2"] = (runs["gained_reached"] + runs["gained_unreached"] + runs["gained_no_habitat"]
                                - runs["lost"])
    table = partition_table(runs, {q: q for q in PARTITION_QUANTITIES}, list(PARTITION_FACTORS))
    with atomic_output(out, overwrite=overwrite) as tmp:
        table.to_csv(tmp, index=False, float_format="%.6g")
    return table


def write_reach_outputs(result: ReachResult, out, summary_path, *, front=None, arrival=None, tags=None,
                        overwrite=False, probability=None, runs=None, polygons=None) -> dict:
    """Write the reach-class raster, the summary JSON and optionally the front, arrival, probability and runs files.

    ``result`` is a :class:`envelope.reach.ReachResult` or a combined
    :class:`envelope.reach_runs.ReachRunSet`; ``probability`` (the share of runs reaching
    each cell) and ``runs`` (a CSV, one row per run) need the latter. ``polygons`` (.gpkg or
    .geojson) gets one dissolved polygon per reach class. All files are checked before any
    is written; they appear together or not at all.
    """
    named = {"arrival": arrival, "front": front, "classes": out, "summary": summary_path,
             "probability": probability, "runs": runs, "polygons": polygons}
    named = {k: p for k, p in named.items() if p}
    for p in named.values():
        check_writable(p, overwrite)
    meta = dict(tags or {})
    meta.update({"threshold": result.summary["threshold"], "kernel": result.summary["kernel"],
                 "mean_distance_km": result.summary["mean_distance_km"]})
    with atomic_outputs(list(named.values()), overwrite=overwrite) as tmps:
        tmp = dict(zip(named, tmps))
        if probability:
            write_raster(result.probability.rename("reach_probability"), tmp["probability"], overwrite=True,
                         tags={**meta, "units": "1", "n_runs": result.summary["n_runs"],
                               "meaning": "share of runs in which the cell is occupied (>= 0.5) at the last horizon"})
        if runs:
            result.runs.to_csv(tmp["runs"], index=False)
        if arrival:
            write_raster(result.arrival_year.rename("arrival_year"), tmp["arrival"], overwrite=True,
                         tags={**meta, "units": "year", "meaning": "first year with occupancy >= 0.5"})
        if front:
            tmp["front"].write_text(json.dumps(result.front))
        if polygons:
            from envelope.pipelines.change import write_class_polygons

            write_class_polygons(result.classes, REACH_CLASSES, REACH_NODATA, tmp["polygons"], overwrite=True,
                                 layer=Path(polygons).stem)
        write_raster(result.classes.rename("reach_class"), tmp["classes"], overwrite=True, tags=meta,
                     categories=REACH_CLASSES, nodata=REACH_NODATA)
        tmp["summary"].write_text(json_text(result.summary))
    return {k: str(p) for k, p in named.items()}
