"""The projection pipeline: model file + climate grid files in, suitability / MESS / binary and ensemble rasters out."""

from __future__ import annotations

import contextlib
import logging
import os
from pathlib import Path

import xarray as xr

from envelope.ensemble import (COUNT_NODATA, CONSENSUS_CATEGORIES, DEFAULT_AGREEMENT, ENSEMBLE_STATISTICS,
                               ensemble_statistics)
from envelope.errors import InputError
from envelope.grids import cell_area_km2, check_same_grid, match_variables
from envelope import __version__
from envelope.io.modelfile import open_model
from envelope.io.atomic import atomic_outputs, check_distinct, check_out_dir, check_writable
from envelope.io.rasters import open_climate, open_layer
from envelope.io.tables import SUITABILITY_TABLE_NAME, group_scenarios, read_scenarios, write_suitability_table
from envelope.io.writing import PLATEAU_PREDICTOR, RasterOutput, write_rasters
from envelope.projection import (BINARY_CATEGORIES, BINARY_NODATA, MESS_BANDS, binary_map, novel_area_sums,
                                 project_mess, project_suitability, share_of, training_range)
from envelope.provenance import file_sha256

PROJECT_CHUNKS = {"y": 512, "x": 1024}

log = logging.getLogger(__name__)


@contextlib.contextmanager
def scheduler_context(address=None):
    """Run dask work on the dask.distributed scheduler at ``address``; local threads when None."""
    if not address:
        yield None
        return
    try:
        from distributed import Client
    except ImportError:
        raise InputError("--scheduler needs dask.distributed; install the 'distributed' package") from None
    try:
        client = Client(address, timeout="10s", set_as_default=True)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"--scheduler {address}: cannot connect ({exc}); expected the address of a "
                         "running dask.distributed scheduler, e.g. tcp://127.0.0.1:8786") from None
    try:
        yield client
    finally:
        client.close()


def load_projection_model(model_file):
    """``(estimator, metadata, method, sha256)`` of a model file (errors name the file)."""

    estimator, manifest = open_model(model_file)
    metadata, method = manifest["metadata"], manifest["method"]
    variables = [str(v["name"]) for v in metadata["variables"]]
    threshold = metadata.get("threshold") or {}
    if not isinstance(threshold, dict) or threshold.get("value") is None:
        raise InputError(f"{model_file}: model metadata has no threshold value; expected "
                         "metadata['threshold'] = {'value', 'rule'} (refit with envelope fit)")
    return estimator, metadata, variables, method, file_sha256(model_file)


def projection_tags(model_file, method, sha256, metadata, climate, clamp) -> dict:
    """Provenance tags of a suitability raster (threshold, method, model file, climate, clamping)."""

    threshold = metadata["threshold"]
    return {"threshold": float(threshold["value"]), "threshold_rule": str(threshold.get("rule", "")),
            "method": method, "model_file": str(model_file), "model_sha256": sha256,
            "climate": [str(c) for c in climate], "clamped": bool(clamp),
            "envelope_version": __version__}


def project_file(model_file, climate, out, *, mess_out=None, binary_out=None, clamp=True,
                 overwrite=False, scheduler=None, chunks=None, progress=None, region=None) -> dict:
    """Project a model file onto climate grid file(s) and write suitability (and MESS, binary).

    Everything is streamed chunk by chunk in one pass: each window of the model's
    variables is read once and feeds the suitability, the MESS and the binary map, and
    the share of the area in novel climate (MESS < 0, weighted by true cell areas) is
    summed on the way and stored in the suitability raster's tags. The outputs appear
    together at the end or not at all (nothing half-written).

    Parameters
    ----------
    model_file : path of an ``.envm`` model file
    climate : path or list of paths opened with :func:`envelope.io.rasters.open_climate`
    out : path (.tif or .nc) of the suitability raster (float32, 0–1)
    mess_out : path, optional
        2-layer raster: ``mess`` and ``most_dissimilar`` (index; names in the
        ``categories`` tag).
    binary_out : path, optional
        uint8 map, 1 = suitable (suitability >= threshold), 0 = unsuitable, 255 = nodata.
    clamp : bool, default=True
    overwrite : bool, default=False
    scheduler : str, optional
        dask.distributed scheduler address.
    chunks : dict, optional
        Spatial chunks of the streamed stack (default :data:`PROJECT_CHUNKS`).
    progress : callable(done, total), optional
        Called as blocks finish (local threads only).
    region : path of a vector file, optional
        Project only the cells inside this region (others are nodata);
        :func:`envelope.io.vectors.region_mask`.

    Returns
    -------
    dict with ``out``, ``mess``, ``binary``, ``novel_share`` (None without MESS),
    ``threshold``, ``method``, ``n_cells``.
    """

    climate = [climate] if isinstance(climate, (str, os.PathLike)) else list(climate)
    targets = [p for p in (out, mess_out, binary_out) if p is not None]
    if len({os.path.abspath(p) for p in targets}) != len(targets):
        raise InputError(f"outputs: the same file is given twice ({', '.join(map(str, targets))})")
    for p in targets:
        check_writable(p, overwrite)
    estimator, metadata, variables, method, sha = load_projection_model(model_file)
    if mess_out is not None and not metadata.get("mess_reference"):
        raise InputError(f"{model_file}: model metadata has no mess_reference; cannot write MESS")
    bounds = training_range(metadata) if clamp else None
    stack = limit_to_region(open_model_climate(climate, variables, chunks=chunks, model_file=model_file,
                                               metadata=metadata), region)
    tags = projection_tags(model_file, method, sha, metadata, climate, clamp)
    if region is not None:
        tags["region"] = str(region)
    with scheduler_context(scheduler), atomic_outputs(targets, overwrite=overwrite) as tmps:
        names = ["out"] + (["mess"] if mess_out else []) + (["binary"] if binary_out else [])
        summary = write_projection(estimator, stack, variables, bounds, metadata, tags, dict(zip(names, tmps)),
                                    progress=progress)
    summary.update(out=str(out), mess=None if mess_out is None else str(mess_out),
                   binary=None if binary_out is None else str(binary_out))
    return summary


def open_model_climate(climate, variables, *, chunks=None, source=None, model_file=None,
                       metadata=None) -> xr.DataArray:
    """The model's variables from climate grid file(s), in the model's order, lazily.

    Only those variables are ever read (the other bands of a multi-band GeoTIFF are
    skipped), every variable of a window in one read. A missing variable is an error that
    names it (:func:`match_variables`).

    A model fitted with the spatial autocovariate term (``metadata["autocovariate"]``) takes
    that predictor from the climate files when they hold it, and otherwise from the layer
    written beside ``model_file`` (:func:`envelope.pipelines.fit.autocovariate_path`): today's
    neighbourhood held for every scenario, the ``held`` mode of
    :func:`envelope.autocovariate.autocovariate_for_projection`.
    """

    climate = [climate] if isinstance(climate, (str, os.PathLike)) else list(climate)
    source = source or ", ".join(map(str, climate))
    spec = {"band": -1, **(PROJECT_CHUNKS if chunks is None else chunks)}
    everything = open_climate(climate, chunks=spec)  # names only, no reading
    names = [str(v) for v in everything["variable"].values]
    layer = _held_autocovariate(metadata, model_file, variables, names, source)
    wanted = [v for v in variables if layer is None or v != str(layer.name)]
    match_variables(everything, wanted, source=source)
    stack = open_climate(climate, variables=wanted, chunks=spec)
    if layer is None:
        return stack
    from envelope.autocovariate import with_autocovariate
    from envelope.grids import check_same_grid

    layer = check_same_grid(stack.isel(variable=0), layer, ref_name=source,
                            other_name=f"autocovariate layer {layer.attrs['path']}")
    if stack.chunks is not None:
        layer = layer.chunk({"y": stack.chunks[1], "x": stack.chunks[2]})
    return with_autocovariate(stack, layer).sel(variable=list(variables))


def _held_autocovariate(metadata, model_file, variables, names, source):
    """The model's autocovariate layer from beside ``model_file`` when the climate lacks it, else None."""
    info = (metadata or {}).get("autocovariate")
    if not info or model_file is None:
        return None
    from envelope.autocovariate import AUTOCOVARIATE_VARIABLE
    from envelope.io.rasters import open_layer
    from envelope.pipelines.fit import autocovariate_path

    name = str(info.get("variable", AUTOCOVARIATE_VARIABLE))
    if name in names or name not in variables:
        return None
    path = autocovariate_path(model_file)
    if not path.is_file():
        raise InputError(f"{source}: no variable {name!r}, and {path} is missing; the model {model_file} was fitted "
                         f"with the autocovariate term, so give its layer (as one more climate file named "
                         f"{name}.tif) or keep it beside the model")
    layer = open_layer(path).rename(name)
    layer.attrs["path"] = str(path)
    log.info("%s: the model's autocovariate term is held at today's neighbourhood (%s)", source, path)
    return layer


def limit_to_region(stack: xr.DataArray, region) -> xr.DataArray:
    """``stack`` with every cell outside the region (a vector file) set to NaN, lazily; unchanged without one."""
    if region is None:
        return stack
    from envelope.io.vectors import region_mask

    inside = region_mask(region, stack)
    return stack.where(inside.assign_coords(x=stack["x"], y=stack["y"]) > 0)


def write_projection(estimator, stack, variables, bounds, metadata, tags, paths, progress=None) -> dict:
    """Write suitability (+ MESS, binary) of ``stack`` to the (temporary) ``paths`` in one pass.

    All outputs come from one dask graph, so each climate block is read once; the share
    of the area in novel climate is summed in the same pass and lands in the suitability
    raster's tags.
    """

    tags = dict(tags)
    threshold = float(tags["threshold"])
    # the cells with a ±inf value are counted by the suitability's own tasks (one pass)
    suitability, n_infinite = project_suitability(estimator, stack, variables, bounds, clamp=bounds is not None,
                                                  count_infinite=True)
    outputs, also = [], (n_infinite,)
    if "mess" in paths:
        mess_da = project_mess(stack, variables, metadata["mess_reference"])
        outputs.append(RasterOutput(mess_da, paths["mess"], tags={**tags, "most_dissimilar_variables": list(variables)},
                                    categories=dict(enumerate(variables)), predictor=PLATEAU_PREDICTOR,
                                    nearest_bands=(MESS_BANDS.index("most_dissimilar"),)))
        mess_values = mess_da.sel(variable="mess")
        also += novel_area_sums(mess_values, cell_area_km2(mess_values))

    def suitability_tags(sums):
        extra = {"infinite_climate_cells": int(sums[0])}
        return {**tags, **extra, **({"novel_share": share_of(*sums[1:])} if len(sums) > 1 else {})}

    outputs.insert(0, RasterOutput(suitability, paths["out"], tags=suitability_tags))
    if "binary" in paths:
        outputs.append(RasterOutput(binary_map(suitability, threshold, nodata=BINARY_NODATA), paths["binary"],
                                    tags={**tags, "nodata": BINARY_NODATA}, categories=BINARY_CATEGORIES,
                                    nodata=BINARY_NODATA))
    sums = write_rasters(outputs, overwrite=True, also=also, progress=progress)
    n_infinite = int(sums[0])
    if n_infinite:
        log.warning("%s: %d cells hold +inf or -inf climate values; their suitability is nodata",
                    tags["climate"][0] if len(tags["climate"]) == 1 else ", ".join(tags["climate"]), n_infinite)
    return {"novel_share": share_of(*sums[1:]) if len(sums) > 1 else None, "threshold": threshold,
            "method": tags["method"], "n_cells": int(stack.sizes["y"] * stack.sizes["x"]),
            "n_infinite": n_infinite}



def ensemble_file(out_dir, pathway: str, horizon: int, statistic: str, *, suffix: str = ".tif") -> Path:
    """File of one ensemble statistic of a projection batch: ``ensemble_<pathway>_<horizon>_<statistic><suffix>``."""
    return Path(out_dir) / f"ensemble_{pathway}_{horizon}_{statistic}{suffix}"


def scenario_outputs(scenarios, out_dir, *, mess: bool, suffix: str = ".tif") -> dict:
    """Output file names of a batch: per scenario suitability (and MESS), per group the
    ensemble rasters, and the suitability table; all inside ``out_dir``. The one
    definition of these names (the study's run folder uses it too)."""
    out_dir = Path(out_dir)
    files = {"table": out_dir / SUITABILITY_TABLE_NAME, "suitability": {}, "mess": {}, "ensemble": {}}
    for sc in scenarios:
        files["suitability"][sc.name] = out_dir / f"{sc.name}_suitability{suffix}"
        if mess:
            files["mess"][sc.name] = out_dir / f"{sc.name}_mess{suffix}"
    for pathway, horizon in group_scenarios(scenarios):
        for stat in ENSEMBLE_STATISTICS:
            files["ensemble"][(pathway, horizon, stat)] = ensemble_file(out_dir, pathway, horizon, stat, suffix=suffix)
    return files


def _all_paths(files) -> list[Path]:
    return ([files["table"]] + list(files["suitability"].values()) + list(files["mess"].values())
            + list(files["ensemble"].values()))


def project_scenarios(model_file, table, out_dir, *, mess: bool = False, agreement: float = DEFAULT_AGREEMENT,
                      clamp: bool = True, overwrite: bool = False, scheduler=None, chunks=None,
                      progress=None, suffix: str = ".tif", region=None) -> dict:
    """Project a model onto every scenario of a table and build the climate-model ensembles.

    Writes into ``out_dir`` (created if missing): ``<name>_suitability.tif`` (and
    ``<name>_mess.tif``) per scenario; per pathway × horizon
    ``ensemble_<pathway>_<horizon>_{mean,sd,count,consensus}.tif`` (``suffix`` ``.nc``
    writes CF-NetCDF instead; see
    :func:`ensemble_statistics`; threshold from the model file); and
    ``suitability_table.csv`` (columns :data:`SUITABILITY_TABLE_COLUMNS`, paths relative to
    the table's folder). All scenario grids must share one grid (CRS, resolution, shape,
    origin); a difference is an error naming both scenarios. Files appear together at the
    end or not at all.

    ``progress(done, total, what)``, when given, is called as dask tasks finish, with
    ``what`` naming the scenario or ensemble being written. ``region`` (a vector file)
    limits every projection to the cells inside it.

    A scenario whose table rows map each variable to its own file (column ``variable``)
    is opened as those named layers (:attr:`envelope.io.tables.Scenario.climate`).

    Returns
    -------
    dict with ``table`` (path), ``rows`` (list of dicts) and ``ensembles`` (list of dicts).
    """

    scenarios = read_scenarios(table)
    groups = group_scenarios(scenarios)
    out_dir = check_out_dir(out_dir)
    if not agreement or not 0.0 < agreement <= 1.0:
        raise InputError(f"agreement: got {agreement!r}; expected a share of models in (0, 1]")
    estimator, metadata, variables, method, sha = load_projection_model(model_file)
    if mess and not metadata.get("mess_reference"):
        raise InputError(f"{model_file}: model metadata has no mess_reference; cannot write MESS")
    bounds = training_range(metadata) if clamp else None
    stacks, first = {}, None
    for sc in scenarios:
        stack = open_model_climate(sc.climate, variables, chunks=chunks, source=f"scenario {sc.name} ({sc.path})",
                                   model_file=model_file, metadata=metadata)
        stack = limit_to_region(stack, region)
        if first is None:
            first = sc
        else:
            check_same_grid(stacks[first.name], stack, ref_name=f"scenario {first.name} ({first.path})",
                            other_name=f"scenario {sc.name} ({sc.path})")
        stacks[sc.name] = stack
    files = scenario_outputs(scenarios, out_dir, mess=mess, suffix=suffix)
    check_distinct({f"--out-dir file {p.name}": p for p in _all_paths(files)},
                   {"MODEL_FILE": model_file, "--scenarios": table, "a scenario grid": [sc.path for sc in scenarios]})
    if out_dir.is_dir():
        for p in _all_paths(files):
            check_writable(p, overwrite)
    out_dir.mkdir(parents=True, exist_ok=True)
    threshold = float(metadata["threshold"]["value"])
    rows, ensembles = [], []
    with scheduler_context(scheduler), atomic_outputs(_all_paths(files), overwrite=overwrite) as tmps:
        tmp = dict(zip(_all_paths(files), tmps))
        for sc in scenarios:
            tags = projection_tags(model_file, method, sha, metadata, sc.climate, clamp)
            tags.update(scenario=sc.name, pathway=sc.pathway, climate_model=sc.climate_model, horizon=sc.horizon)
            paths = {"out": tmp[files["suitability"][sc.name]]}
            if mess:
                paths["mess"] = tmp[files["mess"][sc.name]]
            step = None if progress is None else (lambda d, t, what=f"scenario {sc.name}": progress(d, t, what))
            summary = write_projection(estimator, stacks[sc.name], variables, bounds, metadata, tags, paths,
                                        progress=step)
            rows.append({"name": sc.name, "pathway": sc.pathway, "climate_model": sc.climate_model,
                         "horizon": sc.horizon, "path": files["suitability"][sc.name].name,
                         "mess_path": files["mess"][sc.name].name if mess else None,
                         "novel_share": summary["novel_share"]})
        for (pathway, horizon), members in groups.items():
            layers = [open_layer(tmp[files["suitability"][m.name]]) for m in members]
            stack = xr.concat(layers, dim="model", join="override", coords="minimal", compat="override")
            stack = stack.assign_coords(model=[m.climate_model for m in members])
            ds = ensemble_statistics(stack, threshold, agreement=agreement)
            base = {"pathway": pathway, "horizon": horizon, "climate_models": [m.climate_model for m in members],
                    "scenarios": [m.name for m in members], "n_models": ds.attrs["n_models"],
                    "threshold": threshold, "threshold_rule": metadata["threshold"].get("rule", ""),
                    "agreement": float(agreement), "consensus_min_models": ds.attrs["consensus_min_models"],
                    "sd_ddof": ds.attrs["sd_ddof"], "model_file": str(model_file), "model_sha256": sha}
            outputs = []
            for stat in ENSEMBLE_STATISTICS:
                kw = {}
                if stat in ("count", "consensus"):
                    kw = {"nodata": COUNT_NODATA}
                if stat == "consensus":
                    kw["categories"] = CONSENSUS_CATEGORIES
                outputs.append(RasterOutput(ds[stat].rio.write_crs(stack.rio.crs),
                                            tmp[files["ensemble"][(pathway, horizon, stat)]],
                                            tags={**base, "statistic": stat}, **kw))
            step = None if progress is None else (lambda d, t, what=f"ensemble {pathway} {horizon}": progress(d, t, what))
            write_rasters(outputs, overwrite=True, progress=step)  # one pass over the members for all statistics
            ensembles.append({**base, "files": {stat: str(files["ensemble"][(pathway, horizon, stat)])
                                                for stat in ENSEMBLE_STATISTICS}})
        write_suitability_table(rows, tmp[files["table"]], overwrite=True)
    return {"table": str(files["table"]), "rows": rows, "ensembles": ensembles}
