"""A study's run folder read back: where `envelope run` keeps each result, and the reach model's inputs from them."""

from __future__ import annotations

import json
from pathlib import Path

from envelope.errors import InputError

__all__ = ["run_paths", "pathway_futures", "study_dispersal", "study_habitat", "study_start", "reach_inputs_from_run"]


def run_paths(study, run_dir) -> dict:
    """Paths of a run's results: today's suitability, the scenario projections and their table, the fit summary."""
    run_dir = Path(run_dir)
    ext = "." + study.outputs.format
    proj_dir = run_dir / "projection" / "scenarios"
    return {"now": run_dir / "projection" / f"now_suitability{ext}", "proj_dir": proj_dir,
            "suit_table": proj_dir / "suitability_table.csv",
            "fit_summary": run_dir / "models" / f"{study.model.methods[0]}.fit.json", "ext": ext}


def pathway_futures(suit_rows, proj_dir, ext) -> dict:
    """Per pathway, its horizons' ensemble-mean suitability maps: {pathway: [(year, path), ...]}."""
    horizons = sorted({int(h) for h in suit_rows["horizon"]})
    return {pathway: [(h, Path(proj_dir) / f"ensemble_{pathway}_{h}_mean{ext}") for h in horizons]
            for pathway in sorted(set(suit_rows["pathway"]))}


def study_dispersal(study, *, stochastic: bool = True):
    """The study's dispersal assumption; a distance range only when replicates are drawn."""
    from envelope.reach import DispersalSettings

    d = study.dispersal
    use_range = stochastic and d.replicates
    return DispersalSettings(kernel=d.kernel, mean_distance_km=d.mean_distance_km, shape=d.shape,
                             mean_distance_range_km=d.mean_distance_range_km if use_range else None)


def study_habitat(study, grid):
    """The study's habitat on ``grid`` (:func:`envelope.habitat.load_habitat`)."""
    from envelope.habitat import load_habitat

    return load_habitat(study.habitat.path, grid, classes=study.habitat.classes, align=study.habitat.align)


def study_start(study, grid):
    """Occupied cells today: the dispersal start file, or the records cleaned by the study's own rules.

    A raster start ignores the record filters. Returns (occupancy array, description).
    """
    from envelope.reach import load_start

    r = study.records
    start_path = study.dispersal.start or r.path
    return load_start(start_path, grid, x_column=r.x_column, y_column=r.y_column,
                      max_uncertainty_m=r.max_uncertainty_m, years=r.years, crs=r.crs)


def reach_inputs_from_run(study, run_dir) -> dict:
    """Everything a deterministic reach run of a finished study needs, read from its run folder.

    Returns a dict with ``now`` (layer), ``futures`` ({pathway: [(year, layer), ...]}, the
    ensemble means of the climate models), ``habitat``, ``start`` and ``start_info``,
    ``threshold`` (the fitted model's), ``settings`` (deterministic DispersalSettings),
    ``now_year``, ``step_years``, ``rate``, ``persistence_years`` and ``paths``.

    Raises
    ------
    InputError
        The study has no habitat or dispersal section, or the run folder lacks a result
        (the message names the file and says to run `envelope run` first).
    """
    import pandas as pd

    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_layer

    if study.habitat is None or study.dispersal is None:
        missing = "[habitat]" if study.habitat is None else "[dispersal]"
        raise InputError(f"--study: the study file has no {missing} section; the reach model needs it")
    paths = run_paths(study, run_dir)
    for key in ("now", "suit_table", "fit_summary"):
        if not paths[key].is_file():
            raise InputError(f"--run-dir {run_dir}: {paths[key]} not found; expected a finished run of this study "
                             f"(envelope run STUDY --out {run_dir})")
    futures = pathway_futures(pd.read_csv(paths["suit_table"]), paths["proj_dir"], paths["ext"])
    now = open_layer(paths["now"])
    layers = {}
    for pathway, horizons in futures.items():
        layers[pathway] = []
        for year, p in horizons:
            if not p.is_file():
                raise InputError(f"--run-dir {run_dir}: ensemble mean {p} not found; expected a finished run "
                                 f"with ensembles (outputs.ensemble = true)")
            layer = open_layer(p)
            check_same_grid(now, layer, ref_name=str(paths["now"]), other_name=str(p))
            layers[pathway].append((year, layer))
    threshold = json.loads(paths["fit_summary"].read_text())["threshold"]["value"]
    start, start_info = study_start(study, now)
    d = study.dispersal
    return {"now": now, "futures": layers, "habitat": study_habitat(study, now), "start": start,
            "start_info": start_info, "threshold": threshold, "settings": study_dispersal(study, stochastic=False),
            "now_year": study.climate.now_year, "step_years": d.step_years, "rate": d.rate,
            "persistence_years": d.persistence_years, "paths": paths}
