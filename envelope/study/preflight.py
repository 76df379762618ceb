"""Checks before a study run does any work: the run folder's place, and every grid's identity and variables."""

from __future__ import annotations

import os
from pathlib import Path

from envelope.errors import GridMismatchError, InputError, LayerError

__all__ = ["check_run_folder", "check_study_grids", "study_inputs"]


def study_inputs(study) -> list[tuple[str, Path]]:
    """Every input file of a study as ``(study key, path)``, the study file first."""
    items = [("study file", Path(study.path)), ("records.path", study.records.path)]
    base = list(study.climate.baseline)
    items += [("climate.baseline" if len(base) == 1 else f"climate.baseline[{i}]", p)
              for i, p in enumerate(base, start=1)]
    if study.model.bias:
        items.append(("model.bias", study.model.bias))
    if study.scenario_set.table:
        items.append(("scenarios.table", study.scenario_set.table))
    items += [(_scenario_key(study, i, s), s.path) for i, s in enumerate(study.scenarios, start=1)]
    if study.habitat is not None:
        items.append(("habitat.path", study.habitat.path))
        if study.habitat.classes:
            items.append(("habitat.classes", study.habitat.classes))
    if study.dispersal is not None and study.dispersal.start:
        items.append(("dispersal.start", study.dispersal.start))
    return [(key, Path(p)) for key, p in items]


def _scenario_key(study, i: int, scenario) -> str:
    if study.scenario_set.table:
        return f"scenarios.table (scenario {scenario.name})"
    return f"scenarios.grid[{i}]"


def check_run_folder(study, run_dir) -> None:
    """Refuse a run folder that is, or contains, a folder holding the study's inputs.

    A run writes and cleans up inside its folder (stale temporary files are removed at
    start-up, outputs are replaced), so it must never share a folder with its inputs.
    """
    out = Path(os.path.realpath(run_dir))
    for key, path in study_inputs(study):
        holder = Path(os.path.realpath(path)).parent
        if holder == out or out in holder.parents:
            where = "is" if holder == out else "contains"
            raise InputError(f"--out {run_dir}: {where} the folder of {key} {path}; a run folder must not hold "
                             "the study's inputs (choose a new or empty folder elsewhere)")


def check_study_grids(study) -> None:
    """Open every grid of a study (metadata only) and check it fits the baseline, before any work.

    The baseline must hold ``climate.variables``; each scenario grid must be on the
    baseline's grid (CRS, resolution, shape, origin) and hold the variables used; the bias
    layer must be on the baseline's grid; the habitat layer too unless ``habitat.align``.
    Errors name the study file, the study key and the grid file.
    """
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_climate, open_layer

    where = study.path

    def fail(exc, key, path):
        message = " ".join(str(exc).split()).removeprefix(f"{path}: ")
        raise type(exc)(f"{where}: {key}: {path}: {message}") from None

    baseline_key = "climate.baseline"
    try:
        baseline = open_climate(list(study.climate.baseline))
    except LayerError as exc:  # a [climate.layers] entry's fault names its own key
        kind = GridMismatchError if isinstance(exc, GridMismatchError) else InputError
        fail(kind(exc.detail), f"climate.layers.{exc.layer.name}", exc.layer.path)
    except (InputError, GridMismatchError) as exc:
        fail(exc, baseline_key, ", ".join(map(str, study.climate.baseline)))
    have = [str(v) for v in baseline["variable"].values]
    wanted = list(study.climate.variables) if study.climate.variables else have
    missing = [v for v in wanted if v not in have]
    if missing:
        raise InputError(f"{where}: climate.variables: {missing[0]!r} is not in the baseline "
                         f"{', '.join(map(str, study.climate.baseline))} (it holds {', '.join(have)})")
    ref_name = f"the baseline {study.climate.baseline[0]}"
    for i, scenario in enumerate(study.scenarios, start=1):
        key = _scenario_key(study, i, scenario)
        try:
            grid = open_climate([scenario.path])
            check_same_grid(baseline, grid, ref_name=ref_name, other_name="grid")
        except (InputError, GridMismatchError) as exc:
            fail(exc, key, scenario.path)
        names = [str(v) for v in grid["variable"].values]
        absent = [v for v in wanted if v not in names]
        if absent:
            raise InputError(f"{where}: {key}: {scenario.path}: variable {absent[0]!r} used by the model is "
                             f"missing (the grid holds {', '.join(names)})")
    layers = [("model.bias", study.model.bias, False)]
    if study.habitat is not None and not study.habitat.align:
        layers.append(("habitat.path", study.habitat.path, bool(study.habitat.classes)))
    for key, path, categorical in layers:
        if not path:
            continue
        try:
            check_same_grid(baseline, open_layer(path, categorical=categorical), ref_name=ref_name,
                            other_name="grid")
        except (InputError, GridMismatchError) as exc:
            fail(exc, key, path)
