"""The reach pipeline: opened reach inputs in, reach-class, arrival-year, front and summary files out."""

from __future__ import annotations

import json

from envelope.io.atomic import atomic_outputs, check_writable
from envelope.io.writing import write_raster
from envelope.provenance import json_text
from envelope.reach import REACH_CLASSES, REACH_NODATA, ReachResult, simulate_reach

__all__ = ["run_reach", "write_reach_outputs"]


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


def write_reach_outputs(result: ReachResult, out, summary_path, *, front=None, arrival=None, tags=None,
                        overwrite=False) -> dict:
    """Write the reach-class raster, the summary JSON and optionally the front and arrival files.

    All files are checked before any is written; they appear together or not at all.
    """
    named = {"arrival": arrival, "front": front, "classes": out, "summary": summary_path}
    named = {k: p for k, p in named.items() if p}
    for p in named.values():
        check_writable(p, overwrite)
    meta = dict(tags or {})
    meta.update({"threshold": result.summary["threshold"], "kernel": result.summary["kernel"],
                 "mean_distance_km": result.summary["mean_distance_km"]})
    with atomic_outputs(list(named.values()), overwrite=overwrite) as tmps:
        tmp = dict(zip(named, tmps))
        if arrival:
            write_raster(result.arrival_year.rename("arrival_year"), tmp["arrival"], overwrite=True,
                         tags={**meta, "units": "year", "meaning": "first year with occupancy >= 0.5"})
        if front:
            tmp["front"].write_text(json.dumps(result.front))
        write_raster(result.classes.rename("reach_class"), tmp["classes"], overwrite=True, tags=meta,
                     categories=REACH_CLASSES, nodata=REACH_NODATA)
        tmp["summary"].write_text(json_text(result.summary))
    return {k: str(p) for k, p in named.items()}
