"""`envelope fit`: fit, cross-validate and save a presence/background model."""

from __future__ import annotations

import click

from envelope.models import BIAS_METHODS, METHOD_NAMES

from envelope.cli.options import (absences_opt, climate_opt, cv_opt, features_opt, overwrite_opt, positive_float,
                                  record_years_opt, record_years_value, region_opt, seed_opt, species_opt,
                                  variables_opt)


def _rule(ctx, param, value):
    from envelope.kernels.thresholds import THRESHOLD_RULES

    if value in THRESHOLD_RULES:
        return value
    try:
        number = float(value)
    except ValueError:
        raise click.BadParameter(f"{value!r} is not a rule; use one of {', '.join(THRESHOLD_RULES)} "
                                 "or a fixed number in 0..1", ctx=ctx, param=param) from None
    if not 0 <= number <= 1:
        raise click.BadParameter(f"{value!r}: a fixed threshold must lie in 0..1", ctx=ctx, param=param)
    return number


@click.command()
@click.option("--presences", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Occurrence records: Darwin Core CSV/TSV (decimalLongitude, decimalLatitude, ...) or a "
                   "Darwin Core Archive zip.")
@climate_opt()
@click.option("--out", "out", required=True, type=click.Path(dir_okay=False), help="Model file to write (.envm).")
@click.option("--summary", type=click.Path(dir_okay=False), default=None,
              help="Fit summary JSON (default: <model>.fit.json beside the model; per-fold CSV beside it).")
@click.option("--method", type=click.Choice(METHOD_NAMES),
              default="pointprocess", show_default=True, help="Model family.")
@click.option("--background", "background", type=click.IntRange(min=100), default=10_000, show_default=True,
              help="Background points, drawn in proportion to true cell area (repeats count as weights).")
@click.option("--bias", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Recording-effort raster on the climate grid, used as --bias-method says.")
@click.option("--bias-method", type=click.Choice(BIAS_METHODS), default="auto",
              show_default=True,
              help="With --bias: 'covariate' = log effort as a model term held at the highest effort for "
                   "prediction (pointprocess only); 'weighted' = background drawn in proportion to area x "
                   "effort; 'auto' = covariate for pointprocess, weighted for the other methods.")
@variables_opt
@click.option("--blocks-km", type=float, callback=positive_float, default=None,
              help="Side of the square CV blocks in km (default: derived from the predictors' spatial autocorrelation).")
@click.option("--folds", type=click.IntRange(min=2, max=20), default=5, show_default=True, help="Number of CV folds.")
@cv_opt
@features_opt
@click.option("--threshold-rule", callback=_rule, default="max-sss", show_default=True,
              help="max-sss, p10, min-presence, or a fixed number in 0..1.")
@click.option("--max-uncertainty-m", type=float, default=None, help="Drop records less precise than this.")
@record_years_opt
@click.option("--thin-km", type=float, callback=positive_float, default=None,
              help="Spatially thin records to this minimum distance.")
@species_opt
@absences_opt
@region_opt(help="Study region (GeoPackage, GeoJSON or shapefile, any CRS): background is drawn inside it only.")
@click.option("--background-buffer-km", type=float, callback=positive_float, default=None, metavar="KM",
              help="Draw background only within KM of a record.")
@click.option("--autocovariate", "autocovariate_km", type=float, callback=positive_float, default=None, metavar="KM",
              help="Add a spatial autocovariate term: the inverse-distance-weighted share of occupied "
                   "neighbour cells within KM (Augustin et al. 1996); its layer is written beside the model "
                   "as <model>.autocovariate.tif and held at today's neighbourhood in projection.")
@seed_opt
@overwrite_opt
def fit(presences, climate, out, summary, method, background, bias, bias_method, variables, blocks_km, folds, cv,
        features, threshold_rule, max_uncertainty_m, record_years, thin_km, species, absences, region,
        background_buffer_km, autocovariate_km, seed, overwrite):
    """Fit and cross-validate a presence/background model, and save it.

    Cleans the records against the baseline climate (every dropped record is counted by
    reason), draws background points in proportion to true cell area (a quadrature of the
    study area; with --bias, recording effort is corrected for as --bias-method says),
    evaluates the model with spatial block cross-validation (AUC, TSS, kappa, Boyce index,
    10th-percentile omission), fits the final model on all data (the point-process model
    chooses its penalty and feature classes by the same spatial folds), chooses the
    threshold, and writes the model file, a fit summary JSON and a per-fold CSV.

    Background comes from the whole grid, or only from inside --region and/or within
    --background-buffer-km of a record. With --absences, surveyed absences
    (occurrenceStatus absent) are kept: brt and forest are then fitted to presences
    against absences; the other methods note them and keep the background.

    \b
    Examples:
      $ envelope fit --presences records.csv --climate baseline.tif --out model.envm
      $ envelope fit --presences records.csv --climate bio1.tif --climate bio12.tif \\
            --method brt --blocks-km 50 --folds 5 --out brt.envm --summary brt.json
      $ envelope fit --presences records.csv --climate baseline.nc --variables bio1,bio5,bio12 \\
            --bias effort.tif --threshold-rule p10 --seed 7 --out model.envm
      $ envelope fit --presences records.csv --climate baseline.tif --bias effort.tif \\
            --bias-method weighted --out weighted.envm
      $ envelope fit --presences records.csv --climate baseline.tif --features linear,quadratic \\
            --out smooth.envm
      $ envelope fit --presences download.zip --species "Aus bus" --layers layers.csv \\
            --region study_area.gpkg --background-buffer-km 200 --out model.envm
      $ envelope fit --presences surveys.csv --absences --method brt --climate bio1=bio1.tif \\
            --climate bio12=bio12.tif --out pa.envm
      $ envelope fit --presences records.csv --climate baseline.tif --autocovariate 25 --out spatial.envm
    """
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from envelope.io.atomic import check_distinct, check_writable
    from envelope.pipelines.fit import FitOptions, fit_files, fit_output_paths, write_fit_outputs

    outputs = fit_output_paths(out, summary)
    check_distinct(outputs, {"--presences": presences, "--climate": climate, "--bias": bias, "--region": region})
    for path in [out, summary, *outputs.values()]:  # as given first: a trailing '/' is refused
        if path is not None:
            check_writable(path, overwrite)
    console = Console(stderr=True)
    options = FitOptions(method=method, background=background, variables=variables, blocks_km=blocks_km,
                         folds=folds, cv=cv, threshold_rule=threshold_rule, seed=seed, features=features,
                         max_uncertainty_m=max_uncertainty_m, record_years=record_years_value(record_years),
                         thin_km=thin_km, bias_method=bias_method, species=species, absences=absences,
                         background_buffer_km=background_buffer_km, autocovariate_km=autocovariate_km)
    with Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed}/{task.total}"),
                  TimeElapsedColumn(), console=console, transient=True) as bar:
        tasks = {}

        def progress(stage, done, total):
            if stage not in tasks:
                tasks[stage] = bar.add_task(stage, total=total)
            bar.update(tasks[stage], completed=done)

        result = fit_files(presences, list(climate), options=options, bias=bias, region=region, progress=progress)
    paths = write_fit_outputs(result, out, summary, overwrite=overwrite)
    print_fit_summary(result.summary, paths)


def print_fit_summary(summary: dict, paths: dict) -> None:
    """Tables of record cleaning and CV skill (stdout)."""
    from rich.console import Console
    from rich.table import Table

    console = Console()
    rec = summary["records"]
    t = Table(title=f"Records: {rec['read']} read, {rec['kept']} kept")
    t.add_column("dropped because")
    t.add_column("records", justify="right")
    for reason, count in rec["dropped"].items():
        t.add_row(reason.replace("_", " "), str(count))
    console.print(t)
    cv = summary["cv"]
    s = Table(title=f"{summary['method']}: {cv['scheme']} cross-validation, {cv['n_folds']} folds"
                    + (f", blocks {cv['block_km']:.0f} km" if cv.get("block_km") else ""))
    s.add_column("metric")
    s.add_column("mean", justify="right")
    s.add_column("sd", justify="right")
    for key, label in (("auc", "AUC"), ("tss", "TSS"), ("kappa", "kappa"), ("boyce", "Boyce"),
                       ("omission_p10", "omission at P10")):
        mean, sd = cv.get(f"{key}_mean"), cv.get(f"{key}_sd")
        s.add_row(label, "–" if mean is None else f"{mean:.3f}", "–" if sd is None else f"{sd:.3f}")
    console.print(s)
    fc = summary.get("feature_classes")
    if fc:
        how = "one-standard-error rule over the spatial CV" if fc["rule"] == "one-standard-error" else fc["rule"]
        parts, previous = [], []
        for r in fc.get("scores", []):
            added = [c for c in r["classes"] if c not in previous]
            label = ",".join(added) if not previous else "+" + ",".join(added)
            parts.append(f"{label} {r['mean_auc']:.3f} ± {r['se']:.3f}")
            previous = r["classes"]
        console.print(f"features: {', '.join(fc['chosen'])} ({how})"
                      + (f"; CV AUC {'; '.join(parts)}" if parts else ""))
    thr = summary["threshold"]
    against = (f"{summary['n_absences']} absences" if summary.get("training") == "presence-absence"
               else f"{summary['n_background']} background")
    console.print(f"threshold {thr['value']:.4f} ({thr['rule']}); {summary['n_presences']} presences, {against}")
    bg = summary.get("background") or {}
    if bg:
        line = f"background: {bg['draw']}; {bg['n_cells']} distinct cells; bias correction {bg['bias_correction']}"
        effort = bg.get("effort")
        if effort and effort.get("coef") is not None:
            line += f" (log-effort slope {effort['coef']:.3f}, predicted at effort {effort['reference']:g})"
        console.print(line)
    ac = (summary.get("residual_autocorrelation") or {}).get("classes") or []
    if ac:
        first = ac[0]
        console.print(f"residual Moran's I, 0-{first['upper_km']:.0f} km: {first['morans_i']:.3f}"
                      + (f" (autocovariate within {summary['autocovariate']['radius_km']:g} km)"
                         if summary.get("autocovariate") else ""))
    for note in summary.get("notes", []):
        console.print(f"[yellow]note:[/] {note}")
    console.print(f"model: {paths['model']}\nsummary: {paths['summary']}\nfolds: {paths['folds']}"
                  + (f"\nautocovariate: {paths['autocovariate']}" if "autocovariate" in paths else ""))
