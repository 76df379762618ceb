"""`envelope delta`: future monthly grids by the delta (change-factor) method, singly or over a table of models."""

from __future__ import annotations

from pathlib import Path

import click

from envelope.cli.bioclim import convention_options
from envelope.cli.options import overwrite_opt, output_opt, positive_float


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


@click.command()
@click.option("--baseline", "baselines", multiple=True, required=True, metavar="[VAR=]PATH",
              help="Observed 12-month baseline; with --table repeat as VAR=PATH (tmin, tmax, prec, tmean).")
@click.option("--model-historical", type=click.Path(dir_okay=False), multiple=True,
              help="Model climatology, historical period; or a monthly CF series (repeat the option for "
                   "several files, or give a quoted glob pattern).")
@click.option("--model-future", type=click.Path(dir_okay=False), multiple=True,
              help="Model climatology, future period; or a monthly CF series (repeatable, or a glob).")
@click.option("--period", default=None, metavar="FIRST-LAST",
              help="Years of the historical model series averaged into its climatology, e.g. 1991-2020 "
                   "(default: every year the files hold).")
@click.option("--future-period", default=None, metavar="FIRST-LAST",
              help="Single form: years of the future model series, e.g. 2041-2070 (default: every year).")
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
@click.option("--out-dir", type=click.Path(file_okay=False), default=None, help="Batch form: output folder (created, with missing parents, when new).")
@click.option("--bioclim", "with_bioclim", is_flag=True,
              help="Batch form: also write BIO layers per scenario and a scenario table pointing at them.")
@convention_options
@overwrite_opt
def delta(baselines, model_historical, model_future, period, future_period, out, model_variable, method, ratio_floor,
          max_ratio, table, out_dir, with_bioclim, gdd_base, wrap, ddof, cv_plus_one, overwrite):
    """Build scenario grids by the delta (change-factor) method.

    For each month the climate model's change between its historical and future
    periods (future - historical for temperature, future / historical with a floor for
    precipitation) is interpolated bilinearly onto the baseline grid and applied to the
    baseline. Model grids may be coarse, in another CRS, with 0..360 longitudes.

    A model file holding several variables is read at --variable, or by default at the
    variable named like the baseline file (tmin.tif -> tmin, or tasmin, or the variable
    whose CF standard_name and cell_methods say minimum air temperature).

    Raw model output is read directly: monthly CF-NetCDF series split over several files
    (repeat --model-historical / --model-future, or quote a glob pattern), in any CF
    calendar, reduced to the mean per calendar month over --period (historical) and
    --future-period (future); kelvin becomes degC and kg m-2 s-1 mm per month with each
    month's days in the series' calendar. Mixed calendars, a period the files do not cover,
    missing months and a variable without units stop the command.

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
      $ envelope delta --baseline tmin.tif --model-historical 'tasmin_hist_*.nc' --period 1991-2020 \\
          --model-future 'tasmin_ssp245_*.nc' --future-period 2041-2070 --out tmin_2041-2070.tif
    """
    from envelope.errors import InputError
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.climate import delta_batch, delta_single

    if table is None:
        if with_bioclim or out_dir:
            raise InputError("--bioclim and --out-dir belong to the batch form; add --table MODELS.csv")
        if not (model_historical and model_future and out) or len(baselines) != 1:
            raise InputError("single form needs one --baseline, --model-historical, --model-future and --out "
                             "(or use --table for the batch form)")
        check_distinct({"--out": out}, {"--baseline": baselines, "--model-historical": model_historical,
                                        "--model-future": model_future})
        done = delta_single(baselines[0], list(model_historical), list(model_future), out,
                            model_variable=model_variable, method=method, ratio_floor=ratio_floor,
                            max_ratio=max_ratio, period=period, future_period=future_period, overwrite=overwrite)
        click.echo(f"Wrote {done['method']} delta-method monthly stack to {out}")
        return
    if model_historical or model_future or out or method or model_variable or future_period:
        raise InputError("--model-historical/--model-future/--future-period/--out/--method/--variable belong to the "
                         "single form; "
                         "with --table the table names the model files (and their model_variable) "
                         "and --out-dir the output folder")
    if not out_dir:
        raise InputError("--table needs --out-dir DIR for the outputs")
    done = delta_batch(table, _parse_baselines(baselines), Path(out_dir), ratio_floor=ratio_floor, max_ratio=max_ratio,
                       with_bioclim=with_bioclim, period=period,
                       conventions={"gdd_base": gdd_base, "wrap": wrap, "ddof": int(ddof), "cv_plus_one": cv_plus_one},
                       overwrite=overwrite)
    click.echo(f"Wrote {done['n_scenarios']} scenarios to {out_dir}"
               + (f" (scenario table {done['scenario_table']})" if with_bioclim else ""))
