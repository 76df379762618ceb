"""The reach pipeline: opened reach inputs in, reach-class, arrival-year, front and summary files out."""

from __future__ import annotations

import json

from envelope.io.atomic import atomic_output, check_writable
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
                        overwrite=False, polygons=None) -> dict:
    """Write the reach-class raster, the summary JSON and optionally the front, arrival and class-polygon files.

    All files are checked before any is written and each is written atomically.
    ``polygons`` (.gpkg or .geojson) gets one dissolved polygon per reach class.
    """
    targets = [p for p in (out, summary_path, front, arrival, polygons) if p]
    for p in targets:
        check_writable(p, overwrite)
    meta = dict(tags or {})
    meta.update({"threshold": result.summary["threshold"], "kernel": result.summary["kernel"],
                 "mean_distance_km": result.summary["mean_distance_km"]})
    written = {}
    if arrival:
        write_raster(result.arrival_year.rename("arrival_year"), arrival, overwrite=overwrite,
                     tags={**meta, "units": "year", "meaning": "first year with occupancy >= 0.5"})
        written["arrival"] = str(arrival)
    if front:
        with atomic_output(front, overwrite=overwrite) as tmp:
            tmp.write_text(json.dumps(result.front))
        written["front"] = str(front)
    if polygons:
        from envelope.pipelines.change import write_class_polygons

        written["polygons"] = str(write_class_polygons(result.classes, REACH_CLASSES, REACH_NODATA, polygons,
                                                       overwrite=overwrite))
    write_raster(result.classes.rename("reach_class"), out, overwrite=overwrite, tags=meta,
                 categories=REACH_CLASSES, nodata=REACH_NODATA)
    written["classes"] = str(out)
    with atomic_output(summary_path, overwrite=overwrite) as tmp:
        tmp.write_text(json_text(result.summary))
    written["summary"] = str(summary_path)
    return written
