"""`envelope delta`: future monthly grids by the delta (change-factor) method, singly or over a table of models."""

from __future__ import annotations

import csv
from pathlib import Path

import click

from envelope.cli.bioclim import convention_options
from envelope.cli.options import overwrite_opt, output_opt, positive_float

# Method per monthly variable of the batch form (Hay, Wilby & Leavesley 2000).
VARIABLE_METHODS = {"tmin": "additive", "tmax": "additive", "tmean": "additive", "prec": "ratio"}
MODEL_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "variable", "historical", "future")
MODEL_TABLE_OPTIONAL = ("model_variable",)  # NetCDF variable to read from the model files (default: `variable`)
_UNITS = {"tmin": "temperature", "tmax": "temperature", "tmean": "temperature", "prec": "precipitation"}
MONTHLY_TABLE_COLUMNS = ("name", "pathway", "climate_model", "horizon", "variable", "path")


def _method_for(method, baseline, path):
    from envelope.errors import InputError
    from envelope.io.monthly import PRECIPITATION, TEMPERATURE, kind_of_units

    if method:
        return method
    kind = kind_of_units(baseline.attrs.get("units", ""))
    if kind == TEMPERATURE:
        return "additive"
    if kind == PRECIPITATION:
        return "ratio"
    raise InputError(f"{path}: units {baseline.attrs.get('units', '')!r} do not say temperature or "
                     "precipitation; add --method additive (temperature) or --method ratio (precipitation)")


def _parse_baselines(values):
    from envelope.errors import InputError

    out = {}
    for value in values:
        if "=" not in value:
            raise InputError(f"--baseline {value!r}: with --table give VARIABLE=PATH, e.g. tmin=tmin.tif")
        var, path = (s.strip() for s in value.split("=", 1))
        if var in out:
            raise InputError(f"--baseline: variable {var!r} given twice")
        out[var] = path
    return out


def read_model_table(path) -> dict[str, dict]:
    """Read MODELS.csv: one row per scenario and monthly variable; paths relative to the table.

    Returns scenario name -> {"pathway", "climate_model", "horizon", "files": {variable: (hist, fut)},
    "model_variables": {variable: NetCDF variable name from the optional ``model_variable`` column, or None}}.
    """
    from envelope.errors import InputError

    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            header = [h.strip() for h in reader.fieldnames or []]
            rows = [{(k or "").strip(): (v or "").strip() for k, v in row.items()} for row in reader]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read the model table ({exc})") from None
    missing = [c for c in MODEL_TABLE_COLUMNS if c not in header]
    if missing:
        raise InputError(f"{path}: column {missing[0]!r} missing (found {', '.join(header) or 'none'}; "
                         f"expected {', '.join(MODEL_TABLE_COLUMNS)})")
    if not rows:
        raise InputError(f"{path}: no rows; expected one row per scenario and variable")
    scenarios: dict[str, dict] = {}
    for i, row in enumerate(rows, start=2):  # line numbers, header is line 1
        name = row["name"]
        if not name or any(c in name for c in "/\\"):
            raise InputError(f"{path}: line {i} name {name!r}; expected a non-empty name without slashes")
        try:
            horizon = int(float(row["horizon"]))
        except ValueError:
            raise InputError(f"{path}: line {i} horizon {row['horizon']!r}; expected a year") from None
        meta = {"pathway": row["pathway"], "climate_model": row["climate_model"], "horizon": horizon}
        entry = scenarios.setdefault(name, {**meta, "files": {}, "model_variables": {}})
        if {k: entry[k] for k in meta} != meta:
            raise InputError(f"{path}: line {i}: scenario {name!r} has a different pathway, climate model "
                             "or horizon than on its earlier lines")
        var = row["variable"]
        if var in entry["files"]:
            raise InputError(f"{path}: line {i}: scenario {name!r} lists variable {var!r} twice")
        files = []
        for col in ("historical", "future"):
            p = Path(row[col])
            p = p if p.is_absolute() else path.parent / p
            if not p.is_file():
                raise InputError(f"{path}: line {i} {col} file {p} not found")
            files.append(p)
        entry["files"][var] = tuple(files)
        entry["model_variables"][var] = row.get("model_variable") or None
    return scenarios


@click.command()
@click.option("--baseline", "baselines", multiple=True, required=True, metavar="[VAR=]PATH",
              help="Observed 12-month baseline; with --table repeat as VAR=PATH (tmin, tmax, prec, tmean).")
@click.option("--model-historical", type=click.Path(dir_okay=False), help="Model climatology, historical period.")
@click.option("--model-future", type=click.Path(dir_okay=False), help="Model climatology, future period.")
@output_opt(required=False, help="Future monthly stack on the baseline grid (single form).")
@click.option("--variable", "model_variable", default=None, metavar="NAME",
              help="Single form: NetCDF variable to read from the model files (default: the only one, "
                   "else the one named like the baseline file).")
@click.option("--method", type=click.Choice(["additive", "ratio"]), default=None,
              help="additive (temperature) or ratio (precipitation); default from the baseline's units.")
@click.option("--ratio-floor", type=float, default=1.0, show_default=True, callback=positive_float,
              help="Floor for both periods in the ratio, in the model files' units (1 suits mm/month).")
@click.option("--max-ratio", type=float, default=None, callback=positive_float, help="Cap on the ratio.")
@click.option("--table", type=click.Path(dir_okay=False), default=None,
              help="Batch form: CSV of name,pathway,climate_model,horizon,variable,historical,future.")
@click.option("--out-dir", type=click.Path(file_okay=False), default=None, help="Batch form: output folder.")
@click.option("--bioclim", "with_bioclim", is_flag=True,
              help="Batch form: also write BIO layers per scenario and a scenario table pointing at them.")
@convention_options
@overwrite_opt
def delta(baselines, model_historical, model_future, out, model_variable, method, ratio_floor, max_ratio, table, out_dir,
          with_bioclim, gdd_base, wrap, ddof, cv_plus_one, overwrite):
    """Build scenario grids by the delta (change-factor) method.

    For each month the climate model's change between its historical and future
    periods (future - historical for temperature, future / historical with a floor for
    precipitation) is interpolated bilinearly onto the baseline grid and applied to the
    baseline. Model grids may be coarse, in another CRS, with 0..360 longitudes.

    A model file holding several variables is read at --variable, or by default at the
    variable named like the baseline file (tmin.tif -> tmin).

    The batch form reads a table of climate models x pathways x horizons (one row per
    scenario and variable; an optional model_variable column names the NetCDF variable
    when it differs from the row's variable) and writes DIR/<name>/<variable>.tif and DIR/monthly.csv; with
    --bioclim also DIR/<name>/bioclim.tif and DIR/scenarios.csv
    (name,pathway,climate_model,horizon,path), which `envelope project` reads directly.

    \b
    Examples:
      $ envelope delta --baseline tmin.tif --model-historical hist.nc --model-future fut.nc --out tmin_2050.tif
      $ envelope delta --baseline tn.tif --model-historical hist.nc --model-future fut.nc --variable tmin \\
          --out tmin_2050.tif
      $ envelope delta --table models.csv --baseline tmin=tmin.tif --baseline tmax=tmax.tif \\
          --baseline prec=prec.tif --out-dir scenarios --bioclim
    """
    from envelope.errors import InputError

    if table is None:
        if with_bioclim or out_dir:
            raise InputError("--bioclim and --out-dir belong to the batch form; add --table MODELS.csv")
        if not (model_historical and model_future and out) or len(baselines) != 1:
            raise InputError("single form needs one --baseline, --model-historical, --model-future and --out "
                             "(or use --table for the batch form)")
        _single(baselines[0], model_historical, model_future, out, model_variable, method, ratio_floor, max_ratio,
                overwrite)
        return
    if model_historical or model_future or out or method or model_variable:
        raise InputError("--model-historical/--model-future/--out/--method/--variable belong to the single form; "
                         "with --table the table names the model files (and their model_variable) "
                         "and --out-dir the output folder")
    if not out_dir:
        raise InputError("--table needs --out-dir DIR for the outputs")
    _batch(table, _parse_baselines(baselines), Path(out_dir), ratio_floor, max_ratio, with_bioclim,
           {"gdd_base": gdd_base, "wrap": wrap, "ddof": int(ddof), "cv_plus_one": cv_plus_one}, overwrite)


def _single(baseline_path, hist_path, fut_path, out, model_variable, method, ratio_floor, max_ratio, overwrite):
    from envelope.io.atomic import check_writable
    from envelope.io.monthly import open_monthly, write_monthly

    check_writable(out, overwrite)
    baseline = open_monthly(baseline_path, name="baseline")
    method = _method_for(method, baseline, baseline_path)
    preferred = Path(baseline_path).stem
    variables = {role: _model_variable(p, model_variable, preferred, "add --variable NAME to pick one")
                 for role, p in (("historical", hist_path), ("future", fut_path))}
    future = _future(baseline, baseline_path, hist_path, fut_path, method, ratio_floor, max_ratio, variables)
    write_monthly(future, out, overwrite=overwrite, tags=_tags(future, baseline_path, hist_path, fut_path))
    click.echo(f"Wrote {method} delta-method monthly stack to {out}")


def _model_variable(path, requested, preferred, hint):
    """The NetCDF variable to read from a model file: as requested, the only one, or the one called ``preferred``.

    None lets :func:`envelope.io.monthly.open_monthly` decide (a GeoTIFF, or a single
    gridded variable); a requested name is checked by ``open_monthly`` itself.
    """
    from envelope.errors import InputError
    from envelope.io.monthly import gridded_variables

    if requested:
        return requested
    names = gridded_variables(path)
    if names is None or len(names) == 1:
        return None
    if preferred in names:
        return preferred
    raise InputError(f"{path}: {len(names)} gridded variables ({', '.join(names) or 'none'}) and none "
                     f"called {preferred!r}; {hint}")


def _future(baseline, baseline_path, hist_path, fut_path, method, ratio_floor, max_ratio, variables=None):
    from envelope.delta import delta as delta_method
    from envelope.io.monthly import open_monthly

    variables = variables or {}
    hist = open_monthly(hist_path, name="historical", variable=variables.get("historical"))
    fut = open_monthly(fut_path, name="future", variable=variables.get("future"))
    return delta_method(baseline, hist, fut, method=method, ratio_floor=ratio_floor, max_ratio=max_ratio,
                        names={"baseline": str(baseline_path), "historical": str(hist_path),
                               "future": str(fut_path)})


def _tags(future, baseline_path, hist_path, fut_path):
    tags = {k: str(v) for k, v in future.attrs.items() if k != "source"}
    tags.update({"baseline": str(baseline_path), "model_historical": str(hist_path),
                 "model_future": str(fut_path)})
    return tags


def _batch(table, baseline_paths, out_dir, ratio_floor, max_ratio, with_bioclim, conventions, overwrite):
    from envelope.errors import InputError
    from envelope.io.atomic import atomic_outputs
    from envelope.io.monthly import open_monthly, write_monthly

    if not out_dir.is_dir():
        raise InputError(f"--out-dir {out_dir}: folder does not exist")
    scenarios = read_model_table(table)
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
            method = VARIABLE_METHODS.get(var) or _method_for(None, baselines[var], baseline_paths[var])
            requested = sc["model_variables"].get(var)
            hint = f"add a model_variable column to {table} to pick one"
            variables = {role: _model_variable(p, requested, var, hint)
                         for role, p in (("historical", hist_path), ("future", fut_path))}
            futures[var] = _future(baselines[var], baseline_paths[var], hist_path, fut_path, method,
                                   ratio_floor, max_ratio, variables)
            rel = Path(name) / f"{var}.tif"
            jobs.append(("monthly", futures[var], rel,
                         _tags(futures[var], baseline_paths[var], hist_path, fut_path)))
            monthly_rows.append([name, sc["pathway"], sc["climate_model"], sc["horizon"], var, rel.as_posix()])
        if with_bioclim:
            from envelope.bioclim import bioclim as compute_bioclim

            stack = compute_bioclim(futures["tmin"], futures["tmax"], futures["prec"], futures.get("tmean"),
                                    **conventions)
            rel = Path(name) / "bioclim.tif"
            jobs.append(("bioclim", stack, rel, {k: str(v) for k, v in stack.attrs.items()}))
            scenario_rows.append([name, sc["pathway"], sc["climate_model"], sc["horizon"], rel.as_posix()])
    for name in scenarios:
        (out_dir / name).mkdir(exist_ok=True)

    from envelope.io.writing import write_raster
    from envelope.io.tables import SCENARIO_COLUMNS

    targets = [out_dir / rel for _, _, rel, _ in jobs] + [out_dir / "monthly.csv"]
    if with_bioclim:
        targets.append(out_dir / "scenarios.csv")
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
    click.echo(f"Wrote {len(scenarios)} scenarios to {out_dir}"
               + (f" (scenario table {out_dir / 'scenarios.csv'})" if with_bioclim else ""))


def _check_bioclim_baselines(arrays, paths):
    """The baselines are the user's observations: check them as `envelope bioclim` does."""
    from envelope.bioclim import check_monthly, check_monthly_grids
    from envelope.errors import InputError

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
