"""Climate-building pipelines: bioclimatic variables from monthly files, and scenario grids by the delta method."""

from __future__ import annotations

import csv
from pathlib import Path

from envelope.bioclim import bioclim as compute_bioclim
from envelope.bioclim import check_monthly, check_monthly_grids
from envelope.delta import delta as delta_method
from envelope.errors import InputError
from envelope.io.atomic import atomic_outputs, check_out_dir, check_writable, remove_empty_folder
from envelope.io.monthly import PRECIPITATION, TEMPERATURE, kind_of_units, open_monthly, write_monthly
from envelope.io.series import expand_paths, open_monthly_series, parse_period, variable_for_role
from envelope.io.tables import SCENARIO_COLUMNS, read_model_table
from envelope.io.writing import write_raster

__all__ = ["MONTHLY_TABLE_COLUMNS", "VARIABLE_METHODS", "delta_batch", "delta_single", "method_for_units", "write_bioclim"]

# Method per monthly variable of the batch form (Hay, Wilby & Leavesley 2000).
VARIABLE_METHODS = {"tmin": "additive", "tmax": "additive", "tmean": "additive", "prec": "ratio"}
_UNITS = {"tmin": "temperature", "tmax": "temperature", "tmean": "temperature", "prec": "precipitation"}
MONTHLY_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "variable", "path")



def _label(paths) -> str:
    """How an input is named in messages and tags: the path, or the paths joined by ';'."""
    items = [paths] if isinstance(paths, (str, Path)) else list(paths)
    return ";".join(str(p) for p in items)


def write_bioclim(paths: dict, out, *, variables=None, gdd_base=5.0, wrap=True, ddof=0, cv_plus_one=False,
                  period=None, overwrite=False):
    """Open the monthly inputs in ``paths`` (tmin, tmax, prec[, tmean]), check them, write BIO layers to ``out``.

    Each input is a 12-month stack, or a monthly series (one or several files or glob
    patterns, :func:`envelope.io.series.open_monthly_series`) reduced to its climatology over
    ``period`` ("1991-2020"). Returns the lazy result that was written (for reporting).
    """

    check_writable(out, overwrite)
    years = parse_period(period)
    given = {role: p for role, p in paths.items() if p is not None and (isinstance(p, (str, Path)) or len(p))}
    arrays = {role: open_monthly_series(p, name=role, units=PRECIPITATION if role == "prec" else TEMPERATURE,
                                        period=years, hint=f"name it {role} or give its CF standard_name")
              for role, p in given.items()}
    names = {role: _label(p) for role, p in given.items()}
    check_monthly_grids({names[r]: a for r, a in arrays.items()})
    check_monthly(arrays["tmin"], arrays["tmax"], arrays["prec"], arrays.get("tmean"), names=names)
    stack = compute_bioclim(arrays["tmin"], arrays["tmax"], arrays["prec"], arrays.get("tmean"),
                            variables=variables, wrap=wrap, ddof=int(ddof), cv_plus_one=cv_plus_one,
                            gdd_base=gdd_base)
    tags = {key: str(value) for key, value in stack.attrs.items()}
    tags["long_names"] = dict(zip(map(str, stack["variable"].values), map(str, stack["long_name"].values)))
    tags.update({f"input_{role}": str(p) for role, p in names.items()})
    if years is not None:
        tags["period"] = f"{years[0]}-{years[1]}"
        tags["calendar"] = str(arrays["tmin"].attrs.get("calendar", ""))
    write_raster(stack, out, overwrite=overwrite, tags=tags)
    return stack


def method_for_units(method, baseline, path):
    if method:
        return method
    kind = kind_of_units(baseline.attrs.get("units", ""))
    if kind == TEMPERATURE:
        return "additive"
    if kind == PRECIPITATION:
        return "ratio"
    raise InputError(f"{path}: units {baseline.attrs.get('units', '')!r} do not say temperature or "
                     "precipitation; add --method additive (temperature) or --method ratio (precipitation)")


def delta_single(baseline_path, hist_path, fut_path, out, *, model_variable=None, method=None, ratio_floor=1.0,
                 max_ratio=None, period=None, future_period=None, overwrite=False) -> dict:
    """Delta method for one baseline variable: write the future 12-month stack to ``out``; returns what was written.

    ``hist_path`` and ``fut_path`` are 12-month climatologies or monthly series (a path, a glob
    pattern, or a list of them); a series is reduced to its climatology over ``period`` (the
    historical run) and ``future_period`` (the future run), each "FIRST-LAST" or None for
    every year of the files.
    """

    check_writable(out, overwrite)
    baseline = open_monthly(baseline_path, name="baseline")
    method = method_for_units(method, baseline, baseline_path)
    preferred = Path(baseline_path).stem
    variables = {role: _model_variable(p, model_variable, preferred, "add --variable NAME to pick one")
                 for role, p in (("historical", hist_path), ("future", fut_path))}
    periods = {"historical": parse_period(period), "future": parse_period(future_period, option="--future-period")}
    future = _future(baseline, baseline_path, hist_path, fut_path, method, ratio_floor, max_ratio, variables,
                     periods=periods, role=preferred)
    tags = _tags(future, baseline_path, hist_path, fut_path)
    tags.update({f"{role}_period": f"{p[0]}-{p[1]}" for role, p in periods.items() if p is not None})
    write_monthly(future, out, overwrite=overwrite, tags=tags)
    return {"method": method, "out": str(out)}


def _model_variable(path, requested, preferred, hint):
    """The NetCDF variable to read from a model file: as requested, the only one, or the one for ``preferred``.

    ``preferred`` is a role (``tmin``) or a baseline file's stem: the variable is found by that
    name, by CMIP-style names (``tasmin``) or by CF standard_name
    (:func:`envelope.io.series.series_variable`). None lets the reader decide (a GeoTIFF, or a
    single gridded variable). Only the first file's header is read.
    """

    if requested:
        return requested
    first = expand_paths(path, option="model file")[0]
    if first.suffix.lower() not in (".nc", ".nc4", ".netcdf", ".cdf"):
        return None
    return variable_for_role(first, preferred, hint)


def _future(baseline, baseline_path, hist_path, fut_path, method, ratio_floor, max_ratio, variables=None,
            periods=None, role=None):

    variables = variables or {}
    periods = periods or {}
    hist = open_monthly_series(hist_path, name="historical", variable=variables.get("historical"),
                               period=periods.get("historical"), role=role)
    fut = open_monthly_series(fut_path, name="future", variable=variables.get("future"),
                              period=periods.get("future"), role=role)
    _check_same_kind(baseline, baseline_path, hist, hist_path)
    return delta_method(baseline, hist, fut, method=method, ratio_floor=ratio_floor, max_ratio=max_ratio,
                        names={"baseline": str(baseline_path), "historical": _label(hist_path),
                               "future": _label(fut_path)})


def _check_same_kind(baseline, baseline_path, model, model_path):
    """Refuse a model variable that is not what the baseline holds (a temperature applied to precipitation)."""
    kinds = {role: kind_of_units(da.attrs.get("units", "")) for role, da in (("baseline", baseline), ("model", model))}
    if None not in kinds.values() and kinds["baseline"] != kinds["model"]:
        raise InputError(f"{_label(model_path)}: the model variable holds {kinds['model']} "
                         f"({model.attrs.get('units')!r}) but the baseline {baseline_path} holds {kinds['baseline']} "
                         f"({baseline.attrs.get('units')!r}); expected the same quantity (pick the model variable "
                         "with --variable NAME, or a model_variable column in the table)")


def _tags(future, baseline_path, hist_path, fut_path):
    tags = {k: str(v) for k, v in future.attrs.items() if k != "source"}
    tags.update({"baseline": str(baseline_path), "model_historical": _label(hist_path),
                 "model_future": _label(fut_path)})
    return tags


def delta_batch(table, baseline_paths: dict, out_dir, *, ratio_floor=1.0, max_ratio=None, with_bioclim=False,
                conventions=None, period=None, overwrite=False) -> dict:
    """Delta method over a model table (:func:`envelope.io.tables.read_model_table`), all outputs or none.

    ``period`` ("1991-2020") reduces historical model files that hold monthly series to
    that period's climatology; future series are averaged over all their years.

    Writes ``out_dir/<name>/<variable>.tif`` and ``out_dir/monthly.csv``; with ``with_bioclim``
    also ``out_dir/<name>/bioclim.tif`` and the scenario table ``out_dir/scenarios.csv``.
    """
    conventions = conventions or {}

    out_dir = check_out_dir(out_dir)
    scenarios = read_model_table(table)
    years = parse_period(period)
    baselines = {var: open_monthly(p, name=var, units=_UNITS.get(var)) for var, p in baseline_paths.items()}
    for name, sc in scenarios.items():
        absent = sorted(set(sc["files"]) - set(baselines))
        if absent:
            raise InputError(f"{table}: scenario {name!r} has variable {absent[0]!r} but no --baseline {absent[0]}=PATH")
        if with_bioclim:
            need = sorted({"tmin", "tmax", "prec"} - set(sc["files"]))
            if need:
                raise InputError(f"{table}: scenario {name!r} lacks variable {need[0]!r}, needed by --bioclim")
    if with_bioclim:
        _check_bioclim_baselines(baselines, baseline_paths)

    # Build every output lazily first, so any bad input stops the run before a file is written.
    jobs, monthly_rows, scenario_rows = [], [], []
    for name, sc in scenarios.items():
        futures = {}
        for var, (hist_path, fut_path) in sc["files"].items():
            method = VARIABLE_METHODS.get(var) or method_for_units(None, baselines[var], baseline_paths[var])
            requested = sc["model_variables"].get(var)
            hint = f"add a model_variable column to {table} to pick one"
            variables = {role: _model_variable(p, requested, var, hint)
                         for role, p in (("historical", hist_path), ("future", fut_path))}
            futures[var] = _future(baselines[var], baseline_paths[var], hist_path, fut_path, method,
                                   ratio_floor, max_ratio, variables, periods={"historical": years}, role=var)
            rel = Path(name) / f"{var}.tif"
            jobs.append(("monthly", futures[var], rel,
                         _tags(futures[var], baseline_paths[var], hist_path, fut_path)))
            monthly_rows.append([name, sc["pathway"], sc["climate_model"], sc["horizon"], var, rel.as_posix()])
        if with_bioclim:
            stack = compute_bioclim(futures["tmin"], futures["tmax"], futures["prec"], futures.get("tmean"),
                                    **conventions)
            rel = Path(name) / "bioclim.tif"
            jobs.append(("bioclim", stack, rel, {k: str(v) for k, v in stack.attrs.items()}))
            scenario_rows.append([name, sc["pathway"], sc["climate_model"], sc["horizon"], rel.as_posix()])
    targets = [out_dir / rel for _, _, rel, _ in jobs] + [out_dir / "monthly.csv"]
    if with_bioclim:
        targets.append(out_dir / "scenarios.csv")
    new_folders = [f for f in [*reversed(out_dir.absolute().parents), out_dir.absolute()]
                   + [out_dir.absolute() / name for name in scenarios] if not f.exists()]
    for folder in new_folders:
        folder.mkdir(exist_ok=True)
    try:
        _write_batch(jobs, targets, monthly_rows, scenario_rows, with_bioclim, overwrite)
    except BaseException:
        for folder in reversed(new_folders):  # a batch that failed leaves no empty folder behind
            remove_empty_folder(folder)
        raise
    return {"n_scenarios": len(scenarios), "out_dir": str(out_dir),
            "scenario_table": str(out_dir / "scenarios.csv") if with_bioclim else None}


def _write_batch(jobs, targets, monthly_rows, scenario_rows, with_bioclim, overwrite):
    # all outputs appear together or not at all (temporary siblings renamed at the end)
    with atomic_outputs(targets, overwrite) as tmps:
        for (kind, da, _, tags), tmp in zip(jobs, tmps):
            if kind == "monthly":
                write_monthly(da, tmp, overwrite=True, tags=tags)
            else:
                write_raster(da, tmp, overwrite=True, tags=tags)
        _write_csv(tmps[len(jobs)], MONTHLY_TABLE_COLUMNS, monthly_rows)
        if with_bioclim:
            _write_csv(tmps[len(jobs) + 1], SCENARIO_COLUMNS, scenario_rows)


def _check_bioclim_baselines(arrays, paths):
    """The baselines are the user's observations: check them as `envelope bioclim` does."""

    missing = [v for v in ("tmin", "tmax", "prec") if v not in arrays]
    if missing:
        raise InputError(f"--bioclim needs --baseline {missing[0]}=PATH")
    roles = [v for v in ("tmin", "tmax", "prec", "tmean") if v in arrays]
    check_monthly_grids({str(paths[v]): arrays[v] for v in roles})
    check_monthly(arrays["tmin"], arrays["tmax"], arrays["prec"], arrays.get("tmean"),
                  names={v: str(paths[v]) for v in roles})


def _write_csv(path, columns, rows):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(columns)
        writer.writerows(rows)
