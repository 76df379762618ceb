"""Inputs several pipelines share: climate layers by name, the suitability threshold from raster tags, the reach inputs."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.change import check_threshold

__all__ = ["ReachInputs", "build_reach_inputs", "climate_sources", "load_habitat", "load_start", "resolve_threshold"]


def climate_sources(climate=(), layers=None) -> list:
    """The climate grid inputs of a command: ``--climate`` values and a ``--layers`` table, as one list.

    Each ``--climate`` value is a path (the file names its variables) or ``NAME=PATH[:BAND]``
    (:func:`envelope.io.layers.parse_layer`); the table's rows
    (:func:`envelope.io.layers.read_layer_table`) follow. The list is what
    :func:`envelope.io.rasters.open_climate` opens.
    """
    from envelope.io.layers import parse_layer, read_layer_table

    sources = [parse_layer(value) for value in (climate or ())]
    if layers:
        sources += read_layer_table(layers)
    return sources


def _tag_threshold(tags: dict, name: str):
    raw = tags.get("threshold")
    if raw is None:
        return None
    if isinstance(raw, str):
        try:
            raw = json.loads(raw)
        except json.JSONDecodeError:
            raise InputError(f"{name}: tag 'threshold' holds {raw!r}; expected a number between 0 and 1") from None
    return check_threshold(raw, source=f"{name}: tag 'threshold'")


def resolve_threshold(tags_by_name: dict, given=None) -> tuple[float, str | None]:
    """The suitability threshold and its rule: ``given`` if set, else the one the inputs' tags hold.

    ``tags_by_name`` maps each input's name (its path) to its raster tags, the reference
    input (today's suitability) first. A given threshold wins (rule ``"given"``). Otherwise
    every input that has a ``threshold`` tag (a number, or JSON text of one) must hold the
    same value (within 1e-12); inputs without the tag are allowed as long as one has it.
    The rule is the ``threshold_rule`` tag of the first input holding the threshold.

    Returns ``(threshold, rule)``.
    """
    if given is not None:
        return check_threshold(given, source="--threshold"), "given"
    found = {}
    for name, tags in tags_by_name.items():
        value = _tag_threshold(tags, name)
        if value is not None:
            found[name] = (value, tags.get("threshold_rule"))
    if not found:
        first = next(iter(tags_by_name), "the suitability raster")
        raise InputError(f"{first} has no 'threshold' tag; pass --threshold")
    values = [v for v, _ in found.values()]
    if any(not math.isclose(v, values[0], rel_tol=0, abs_tol=1e-12) for v in values):
        shown = ", ".join(f"{n}: {v:g}" for n, (v, _) in found.items())
        raise InputError(f"the inputs' threshold tags disagree ({shown}); pass --threshold to choose one")
    return next(iter(found.values()))


# --------------------------------------------------------------------------- habitat and start


def load_habitat(source, grid, *, classes=None, align=False, nodata_as=0.0):
    """Habitat availability on the climate grid from a raster file (or an open layer).

    ``source`` is a habitat-fraction raster, or with ``classes`` (a class-table CSV, or a
    ``{code: quality}`` dict) a land-cover raster; ``grid`` is the climate stack, a layer or
    a raster path. Opens the files and hands them to :func:`envelope.habitat.habitat_on_grid`
    (see there for aggregation from finer grids, alignment and nodata).
    """
    from envelope.habitat import habitat_on_grid
    from envelope.io.rasters import open_layer
    from envelope.io.tables import read_class_table

    if not isinstance(grid, xr.DataArray):
        grid = open_layer(grid)
    name = None
    if not isinstance(source, xr.DataArray):
        if not Path(source).exists():
            raise InputError(f"{source}: habitat raster not found")
        name = str(source)
        source = open_layer(source)
    table_name = None
    if classes is not None and not isinstance(classes, dict):
        table_name = str(classes)
        classes = read_class_table(classes)
    return habitat_on_grid(source, grid, classes=classes, align=align, nodata_as=nodata_as, name=name,
                           class_table_name=table_name)


def load_start(path, grid: xr.DataArray, *, name: str = "--start", grid_name: str = "--now", **clean_options):
    """Occupied cells today from a records table (CSV/TSV) or a raster (occupied where > 0.5).

    Records are cleaned against ``grid`` with ``clean_options`` (those of
    :func:`envelope.records.clean_occurrences`, plus ``x_column``/``y_column`` for the reader).
    Returns (occupancy array, description dict).
    """
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_layer
    from envelope.io.records import read_occurrences
    from envelope.records import clean_occurrences

    p = Path(path)
    if p.suffix.lower() in (".csv", ".tsv", ".txt", ".tab"):
        table = read_occurrences(p, x_column=clean_options.pop("x_column", None),
                                 y_column=clean_options.pop("y_column", None), crs=clean_options.get("crs"))
        records = clean_occurrences(table, grid, **clean_options)
        occ = records.occupancy(grid).values
        return occ, {"source": str(p), "kind": "records", "n_read": int(records.n_read),
                     "n_cells": int(occ.sum()), "dropped": dict(records.dropped)}
    if clean_options.get("species"):
        raise InputError(f"{name} {p}: a species ({clean_options['species']!r}) is given, but this start is a "
                         "raster, not records; leave the species out or give a records table")
    layer = open_layer(p)
    check_same_grid(grid, layer, ref_name=grid_name, other_name=f"{name} {p}")
    arr = np.asarray(layer.values, dtype=np.float64)
    occ = (np.where(np.isfinite(arr), arr, 0.0) > 0.5).astype(np.float64)
    if not occ.any():
        raise InputError(f"{name} {p}: no occupied cell (no value > 0.5)")
    return occ, {"source": str(p), "kind": "raster", "n_cells": int(occ.sum())}


# --------------------------------------------------------------------------- reach inputs


@dataclass
class ReachInputs:
    """Everything one reach model needs, opened and checked: the one builder is :func:`build_reach_inputs`.

    ``futures`` maps a climate path's name to its horizons ``[(year, layer), ...]``; a
    command-line run with ``--future`` has one path, named None.
    """

    now: xr.DataArray
    now_name: str
    futures: dict
    habitat: xr.DataArray
    start: np.ndarray
    start_info: dict
    threshold: float
    threshold_rule: str | None
    settings: object                 # envelope.reach.DispersalSettings
    now_year: float = 2020.0
    step_years: float = 1.0
    rate: float = 1.0
    persistence_years: float = 0.0
    inputs: dict = field(default_factory=dict)

    def timing(self) -> dict:
        """The keyword arguments of the time loop (``simulate_reach``, ``target_restoration``)."""
        return {"now_year": self.now_year, "step_years": self.step_years, "rate": self.rate,
                "persistence_years": self.persistence_years}

    def single_path(self) -> list:
        """The horizons of the one climate path; an error when there are several."""
        if len(self.futures) != 1:
            raise InputError(f"expected one climate path, got {len(self.futures)} ({', '.join(map(str, self.futures))})")
        return next(iter(self.futures.values()))


def build_reach_inputs(now, paths: dict, habitat, start, *, settings, classes=None, align_habitat=False,
                       threshold=None, now_year=2020.0, step_years=1.0, rate=1.0, persistence_years=0.0,
                       start_options=None, now_name=None, path_names=None, now_layer=None, region=None) -> ReachInputs:
    """Open and check the reach model's inputs.

    Parameters
    ----------
    now : path of today's suitability raster
    paths : dict
        Climate path name -> ``[(year, suitability raster path), ...]``.
    habitat, classes, align_habitat : see :func:`load_habitat`
    start : path of a records table or an occupancy raster (:func:`load_start`)
    settings : envelope.reach.DispersalSettings, or a dict of its fields
    threshold : float, optional
        Overrides the rasters' ``threshold`` tags (:func:`resolve_threshold`).
    start_options : dict, optional
        Record-cleaning options for a records start (a study's own record filters).
    now_name : str, optional
        How messages name ``now`` (default ``--now PATH``).
    path_names : callable(name, path) -> str, optional
        How messages name a future raster (default ``--future PATH``).
    now_layer : DataArray, optional
        ``now`` already open.
    region : path of a vector file, optional
        Study region (:func:`envelope.io.vectors.region_mask`): habitat is set to 0 outside
        it, so the spread colonises cells inside the region only.
    """
    from envelope.change import check_suitability_values
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_layer, read_tags

    from envelope.reach import DispersalSettings, check_timing

    check_timing(now_year, [year for horizons in paths.values() for year, _ in horizons], step_years, rate,
                 persistence_years)
    if isinstance(settings, dict):
        settings = DispersalSettings(**settings)
    now_name = now_name or f"--now {now}"
    label = path_names or (lambda _name, p: f"--future {p}")
    now_layer = open_layer(now) if now_layer is None else now_layer
    check_suitability_values(now_layer, now_name)
    layers, tags = {}, {str(now): read_tags(now)}
    for name, horizons in paths.items():
        if not horizons:
            raise InputError(f"climate path {name}: no future suitability map; give at least one")
        layers[name] = []
        for year, p in horizons:
            layer = check_same_grid(now_layer, open_layer(p), ref_name=now_name, other_name=label(name, p))
            check_suitability_values(layer, label(name, p))
            layers[name].append((float(year), layer))
            tags[str(p)] = read_tags(p)
    value, rule = resolve_threshold(tags, threshold)
    hab = load_habitat(habitat, now_layer, classes=classes, align=align_habitat)
    if region is not None:
        from envelope.io.vectors import region_mask

        inside = region_mask(region, now_layer).values > 0
        hab = hab.copy(data=np.where(inside, np.asarray(hab.values), 0).astype(hab.dtype))
    start_arr, start_info = load_start(start, now_layer, grid_name=now_name, **(start_options or {}))
    inputs = {"now": str(now), "futures": [str(p) for h in paths.values() for _, p in h],
              "habitat": str(habitat), "classes": None if classes is None else str(classes),
              **({} if region is None else {"region": str(region)})}
    return ReachInputs(now=now_layer, now_name=now_name, futures=layers, habitat=hab, start=start_arr,
                       start_info=start_info, threshold=value, threshold_rule=rule, settings=settings,
                       now_year=float(now_year), step_years=float(step_years), rate=float(rate),
                       persistence_years=float(persistence_years), inputs=inputs)
