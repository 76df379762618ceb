"""Scenario tables (pathway × climate model × horizon) and ensemble statistics of suitability across climate models."""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from envelope.errors import InputError

SCENARIO_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path")
SUITABILITY_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path", "mess_path",
                             "novel_share")
# Default consensus level: a cell is in consensus when at least two thirds of the climate
# models call it suitable (a common "likely" agreement level; our choice, no source).
DEFAULT_AGREEMENT = 2.0 / 3.0
COUNT_NODATA = 255  # uint8 nodata of the count and consensus rasters


@dataclass(frozen=True)
class Scenario:
    """One row of a scenario table: a climate grid for one pathway, climate model and horizon."""

    name: str
    pathway: str
    climate_model: str
    horizon: int
    path: Path


def _rows_from_csv(path: Path) -> list[dict]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            header = [h.strip() for h in (reader.fieldnames or [])]
            missing = [c for c in SCENARIO_COLUMNS if c not in header]
            if missing:
                raise InputError(f"{path}: column {missing[0]!r} missing (found {', '.join(header) or 'none'}; "
                                 f"expected {', '.join(SCENARIO_COLUMNS)})")
            return [{(k or "").strip(): (v or "").strip() for k, v in row.items()} for row in reader]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read the scenario table ({exc})") from None


def _rows_from_toml(path: Path) -> list[dict]:
    import tomllib

    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: cannot read the scenario table ({exc})") from None
    rows = doc.get("scenario")
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise InputError(f"{path}: expected [[scenario]] tables with keys {', '.join(SCENARIO_COLUMNS)}")
    for i, row in enumerate(rows, start=1):
        missing = [c for c in SCENARIO_COLUMNS if c not in row]
        if missing:
            raise InputError(f"{path}: scenario {i} has no key {missing[0]!r} "
                             f"(expected {', '.join(SCENARIO_COLUMNS)})")
    return [{k: str(v) for k, v in row.items()} for row in rows]


def read_scenarios(path, *, what: str = "climate grid") -> list[Scenario]:
    """Read a scenario table (CSV with a header, or TOML with ``[[scenario]]`` tables).

    Columns / keys: ``name, pathway, climate_model, horizon, path``. ``horizon`` is a
    year; ``path`` is a climate grid (or, ``what`` says, another raster such as a
    suitability map), relative to the table's folder unless absolute. Names must be
    unique (they name the output files) and every grid must exist.

    Examples
    --------
    >>> read_scenarios("scenarios.csv")  # doctest: +SKIP
    [Scenario(name='p1-mA-2050', pathway='p1', climate_model='mA', horizon=2050, path=...)]
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: scenario table not found")
    suffix = path.suffix.lower()
    if suffix == ".csv":
        rows = _rows_from_csv(path)
    elif suffix == ".toml":
        rows = _rows_from_toml(path)
    else:
        raise InputError(f"{path}: scenario table suffix {path.suffix!r}; expected .csv or .toml")
    if not rows:
        raise InputError(f"{path}: the scenario table has no rows; expected at least one scenario")
    scenarios, seen = [], set()
    for i, row in enumerate(rows, start=1):
        name = row["name"]
        if not name or any(c in name for c in "/\\"):
            raise InputError(f"{path}: row {i} name {name!r}; expected a non-empty name without slashes")
        if name in seen:
            raise InputError(f"{path}: scenario name {name!r} appears twice; names must be unique")
        seen.add(name)
        for key in ("pathway", "climate_model"):
            if not row[key]:
                raise InputError(f"{path}: row {i} ({name}) has an empty {key!r}")
        try:
            horizon = int(float(row["horizon"]))
        except ValueError:
            raise InputError(f"{path}: row {i} ({name}) horizon {row['horizon']!r}; expected a year") from None
        grid = Path(row["path"])
        if not grid.is_absolute():
            grid = path.parent / grid
        if not grid.exists():
            raise InputError(f"{path}: row {i} ({name}) {what} {grid} not found")
        scenarios.append(Scenario(name, row["pathway"], row["climate_model"], horizon, grid))
    return scenarios


def suitability_paths(path) -> dict[str, list[tuple[int, Path]]]:
    """Climate paths from a suitability table: {"<pathway>/<climate_model>": [(horizon, map), ...]}.

    The table is the one ``envelope project --scenarios`` writes (``suitability_table.csv``;
    columns ``name, pathway, climate_model, horizon, path``, ``path`` a suitability raster).
    One path per pathway × climate model, its horizons in time order; a climate model
    listed twice for one pathway and horizon is an error.
    """
    scenarios = read_scenarios(path, what="suitability raster")
    group_scenarios(scenarios)
    paths: dict[str, list[tuple[int, Path]]] = {}
    for sc in scenarios:
        paths.setdefault(f"{sc.pathway}/{sc.climate_model}", []).append((sc.horizon, sc.path))
    return {name: sorted(horizons) for name, horizons in paths.items()}


def group_scenarios(scenarios) -> dict[tuple[str, int], list[Scenario]]:
    """Scenarios grouped by (pathway, horizon), in table order; the members differ by climate model."""
    groups: dict[tuple[str, int], list[Scenario]] = {}
    for sc in scenarios:
        groups.setdefault((sc.pathway, sc.horizon), []).append(sc)
    for (pathway, horizon), members in groups.items():
        models = [m.climate_model for m in members]
        dup = sorted({m for m in models if models.count(m) > 1})
        if dup:
            raise InputError(f"scenario table: climate model {dup[0]!r} appears twice for pathway "
                             f"{pathway!r}, horizon {horizon}")
    return groups


def consensus_count(n_models: int, agreement: float) -> int:
    """Fewest models that must call a cell suitable for consensus: ceil(agreement × n).

    A small tolerance keeps 2/3 of 3 models at 2, not 3, despite rounding of 2/3.
    """
    if not 0.0 < agreement <= 1.0:
        raise InputError(f"agreement: got {agreement!r}; expected a share of models in (0, 1]")
    return max(1, math.ceil(agreement * n_models - 1e-9))


def _ensemble_block(S, threshold, needed, ddof):
    """Kernel on one chunk: ``S`` is (..., model); returns mean, sd, count, consensus.

    A cell with NaN in any model gets NaN mean/SD and the nodata code in count/consensus.
    """
    S = np.asarray(S, dtype=np.float64)
    n = S.shape[-1]
    valid = np.isfinite(S).all(axis=-1)
    mean = S.mean(axis=-1)
    if n - ddof > 0:
        sd = np.sqrt(((S - mean[..., None]) ** 2).sum(axis=-1) / (n - ddof))
    else:
        sd = np.full(mean.shape, np.nan)
    count = (S >= threshold).sum(axis=-1)
    consensus = (count >= needed).astype(np.uint8)
    count = np.where(valid, count, COUNT_NODATA).astype(np.uint8)
    consensus = np.where(valid, consensus, COUNT_NODATA).astype(np.uint8)
    return (mean.astype(np.float32), sd.astype(np.float32), count, consensus)


def ensemble_statistics(suitability: xr.DataArray, threshold: float, *,
                        agreement: float = DEFAULT_AGREEMENT, ddof: int = 1) -> xr.Dataset:
    """Mean, SD, suitable count and consensus of suitability across climate models (lazy).

    Parameters
    ----------
    suitability : DataArray (model, y, x)
        One suitability layer per climate model of one pathway and horizon.
    threshold : float
        A model calls a cell suitable when suitability >= threshold (the model file's
        threshold).
    agreement : float, default=2/3
        Share of models needed for consensus: a cell is 1 in ``consensus`` when at least
        ``ceil(agreement × n_models)`` models call it suitable.
    ddof : int, default=1
        SD denominator ``n - ddof``: 1 treats the climate models as a sample (SD is NaN
        with a single model); 0 gives the population SD.

    Returns
    -------
    Dataset with ``mean``, ``sd`` (float32) and ``count``, ``consensus`` (uint8, 255 =
    nodata where any model has no value), dims (y, x); attrs ``n_models``,
    ``threshold``, ``agreement``, ``consensus_min_models``.
    """
    if "model" not in suitability.dims:
        raise InputError(f"suitability: dims {suitability.dims}; expected a 'model' dimension")
    n = suitability.sizes["model"]
    needed = consensus_count(n, agreement)
    if suitability.chunks is not None:
        suitability = suitability.chunk({"model": -1})
    mean, sd, count, consensus = xr.apply_ufunc(
        _ensemble_block, suitability,
        kwargs={"threshold": float(threshold), "needed": needed, "ddof": int(ddof)},
        input_core_dims=[["model"]], output_core_dims=[[], [], [], []],
        dask="parallelized", output_dtypes=[np.float32, np.float32, np.uint8, np.uint8],
    )
    ds = xr.Dataset({"mean": mean, "sd": sd, "count": count, "consensus": consensus})
    ds = ds.drop_vars([c for c in ds.coords if c not in ("y", "x", "spatial_ref")])
    ds.attrs = {"n_models": n, "threshold": float(threshold), "agreement": float(agreement),
                "consensus_min_models": needed, "sd_ddof": int(ddof)}
    crs = suitability.rio.crs
    if crs is not None:
        ds = ds.rio.write_crs(crs)
    return ds


def write_suitability_table(rows, path, *, overwrite: bool = False) -> Path:
    """Write the per-scenario suitability table (CSV) that ``envelope change --scenarios`` reads.

    ``rows`` are mappings with keys :data:`SUITABILITY_TABLE_COLUMNS`; paths are written
    as given.
    """
    from envelope.io.atomic import atomic_output

    with atomic_output(path, overwrite=overwrite) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=SUITABILITY_TABLE_COLUMNS, extrasaction="ignore")
            writer.writeheader()
            for row in rows:
                writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in SUITABILITY_TABLE_COLUMNS})
    return Path(path)


ENSEMBLE_STATISTICS = ("mean", "sd", "count", "consensus")
CONSENSUS_CATEGORIES = {0: "no consensus", 1: "suitable in consensus"}
TABLE_NAME = "suitability_table.csv"


def scenario_outputs(scenarios, out_dir, *, mess: bool, suffix: str = ".tif") -> dict:
    """Output file names of a batch: per scenario suitability (and MESS), per group the
    ensemble rasters, and the suitability table; all inside ``out_dir``."""
    out_dir = Path(out_dir)
    files = {"table": out_dir / TABLE_NAME, "suitability": {}, "mess": {}, "ensemble": {}}
    for sc in scenarios:
        files["suitability"][sc.name] = out_dir / f"{sc.name}_suitability{suffix}"
        if mess:
            files["mess"][sc.name] = out_dir / f"{sc.name}_mess{suffix}"
    for pathway, horizon in group_scenarios(scenarios):
        for stat in ENSEMBLE_STATISTICS:
            files["ensemble"][(pathway, horizon, stat)] = out_dir / f"ensemble_{pathway}_{horizon}_{stat}{suffix}"
    return files


def _all_paths(files) -> list[Path]:
    return ([files["table"]] + list(files["suitability"].values()) + list(files["mess"].values())
            + list(files["ensemble"].values()))


def project_scenarios(model_file, table, out_dir, *, mess: bool = False, agreement: float = DEFAULT_AGREEMENT,
                      clamp: bool = True, overwrite: bool = False, scheduler=None, chunks=None,
                      progress=None) -> dict:
    """Project a model onto every scenario of a table and build the climate-model ensembles.

    Writes into ``out_dir`` (created if missing): ``<name>_suitability.tif`` (and
    ``<name>_mess.tif``) per scenario; per pathway × horizon
    ``ensemble_<pathway>_<horizon>_{mean,sd,count,consensus}.tif`` (see
    :func:`ensemble_statistics`; threshold from the model file); and
    ``suitability_table.csv`` (columns :data:`SUITABILITY_TABLE_COLUMNS`, paths relative to
    the table's folder). All scenario grids must share one grid (CRS, resolution, shape,
    origin); a difference is an error naming both scenarios. Files appear together at the
    end or not at all.

    ``progress(done, total, what)``, when given, is called as dask tasks finish, with
    ``what`` naming the scenario or ensemble being written.

    Returns
    -------
    dict with ``table`` (path), ``rows`` (list of dicts) and ``ensembles`` (list of dicts).
    """
    from envelope.grids import check_same_grid
    from envelope.io.atomic import atomic_outputs, check_writable
    from envelope.io.rasters import open_layer
    from envelope.io.writing import RasterOutput, write_rasters
    from envelope.projection import (_write_projection, load_projection_model, open_model_climate, projection_tags,
                                     scheduler_context, training_range)

    scenarios = read_scenarios(table)
    groups = group_scenarios(scenarios)
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"--out-dir {out_dir}: exists and is not a folder")
    if not agreement or not 0.0 < agreement <= 1.0:
        raise InputError(f"agreement: got {agreement!r}; expected a share of models in (0, 1]")
    estimator, metadata, variables, method, sha = load_projection_model(model_file)
    if mess and not metadata.get("mess_reference"):
        raise InputError(f"{model_file}: model metadata has no mess_reference; cannot write MESS")
    bounds = training_range(metadata) if clamp else None
    stacks, first = {}, None
    for sc in scenarios:
        stack = open_model_climate(sc.path, variables, chunks=chunks, source=f"scenario {sc.name} ({sc.path})")
        if first is None:
            first = sc
        else:
            check_same_grid(stacks[first.name], stack, ref_name=f"scenario {first.name} ({first.path})",
                            other_name=f"scenario {sc.name} ({sc.path})")
        stacks[sc.name] = stack
    files = scenario_outputs(scenarios, out_dir, mess=mess)
    if out_dir.is_dir():
        for p in _all_paths(files):
            check_writable(p, overwrite)
    out_dir.mkdir(parents=True, exist_ok=True)
    threshold = float(metadata["threshold"]["value"])
    rows, ensembles = [], []
    with scheduler_context(scheduler), atomic_outputs(_all_paths(files), overwrite=overwrite) as tmps:
        tmp = dict(zip(_all_paths(files), tmps))
        for sc in scenarios:
            tags = projection_tags(model_file, method, sha, metadata, [sc.path], clamp)
            tags.update(scenario=sc.name, pathway=sc.pathway, climate_model=sc.climate_model, horizon=sc.horizon)
            paths = {"out": tmp[files["suitability"][sc.name]]}
            if mess:
                paths["mess"] = tmp[files["mess"][sc.name]]
            step = None if progress is None else (lambda d, t, what=f"scenario {sc.name}": progress(d, t, what))
            summary = _write_projection(estimator, stacks[sc.name], variables, bounds, metadata, tags, paths,
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


__all__ = ["COUNT_NODATA", "DEFAULT_AGREEMENT", "SCENARIO_COLUMNS", "SUITABILITY_TABLE_COLUMNS", "Scenario",
           "consensus_count", "ensemble_statistics", "project_scenarios", "scenario_outputs", "group_scenarios", "read_scenarios",
           "suitability_paths", "write_suitability_table"]
