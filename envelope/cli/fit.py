"""`envelope fit`: fit, cross-validate and save a presence/background model."""

from __future__ import annotations

import click

from envelope.cli.options import climate_opt, overwrite_opt, seed_opt, variables_opt, positive_float


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


def _features(ctx, param, value):
    from envelope.errors import InputError
    from envelope.features import parse_feature_classes

    try:
        return parse_feature_classes(value, where="--features")
    except InputError as exc:
        raise click.BadParameter(f"{value!r}: expected cv or comma-separated classes from linear, quadratic, "
                                 "product, hinge", ctx=ctx, param=param) from exc


def _years(ctx, param, value):
    if value is None:
        return None
    try:
        lo, hi = (int(v) for v in value.split("-"))
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected FIRST-LAST, e.g. 1990-2020", ctx=ctx, param=param) from None
    if lo > hi:
        raise click.BadParameter(f"{value!r}: first year after last", ctx=ctx, param=param)
    return lo, hi


@click.command()
@click.option("--presences", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Occurrence records: Darwin Core CSV/TSV (decimalLongitude, decimalLatitude, ...).")
@climate_opt()
@click.option("--out", "out", required=True, type=click.Path(dir_okay=False), help="Model file to write (.envm).")
@click.option("--summary", type=click.Path(dir_okay=False), default=None,
              help="Fit summary JSON (default: <model>.fit.json beside the model; per-fold CSV beside it).")
@click.option("--method", type=click.Choice(["pointprocess", "envelope", "brt", "forest", "ensemble"]),
              default="pointprocess", show_default=True, help="Model family.")
@click.option("--background", "n_background", type=click.IntRange(min=100), default=10_000, show_default=True,
              help="Number of random background cells.")
@click.option("--bias", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Sampling-effort raster: background drawn in proportion to it (same grid as the climate).")
@variables_opt
@click.option("--blocks-km", type=float, callback=positive_float, default=None,
              help="Side of the square CV blocks in km (default: derived from the predictors' spatial autocorrelation).")
@click.option("--folds", type=click.IntRange(min=2, max=20), default=5, show_default=True, help="Number of CV folds.")
@click.option("--cv", "cv_scheme", type=click.Choice(["block", "random"]), default="block", show_default=True,
              help="Spatial block CV, or random K-fold for comparison.")
@click.option("--features", callback=_features, default="cv", show_default=True, metavar="cv|CLASS,...",
              help="Feature classes of the point-process model: cv (choose linear,quadratic / +hinge / "
                   "+product by the spatial CV, one-standard-error rule) or a fixed list, e.g. "
                   "linear,quadratic,hinge. Other methods ignore it.")
@click.option("--threshold-rule", callback=_rule, default="max-sss", show_default=True,
              help="max-sss, p10, min-presence, or a fixed number in 0..1.")
@click.option("--max-uncertainty-m", type=float, default=None, help="Drop records less precise than this.")
@click.option("--years", callback=_years, default=None, metavar="FIRST-LAST", help="Keep records from these years.")
@click.option("--thin-km", type=float, callback=positive_float, default=None,
              help="Spatially thin records to this minimum distance.")
@seed_opt
@overwrite_opt
def fit(presences, climate, out, summary, method, n_background, bias, variables, blocks_km, folds, cv_scheme,
        features, threshold_rule, max_uncertainty_m, years, thin_km, seed, overwrite):
    """Fit and cross-validate a presence/background model, and save it.

    Cleans the records against the baseline climate (every dropped record is counted by
    reason), draws background cells, evaluates the model with spatial block
    cross-validation (AUC, TSS, kappa, Boyce index, 10th-percentile omission), fits the
    final model on all data (the point-process model chooses its penalty and feature
    classes by the same spatial folds), chooses the threshold, and writes the model file, a fit
    summary JSON and a per-fold CSV.

    \b
    Examples:
      $ envelope fit --presences records.csv --climate baseline.tif --out model.envm
      $ envelope fit --presences records.csv --climate bio1.tif --climate bio12.tif \\
            --method brt --blocks-km 50 --folds 5 --out brt.envm --summary brt.json
      $ envelope fit --presences records.csv --climate baseline.nc --variables bio1,bio5,bio12 \\
            --bias effort.tif --threshold-rule p10 --seed 7 --out model.envm
      $ envelope fit --presences records.csv --climate baseline.tif --features linear,quadratic \\
            --out smooth.envm
    """
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from envelope.fitting import FitOptions, fit_model, write_fit_outputs
    from envelope.io.atomic import check_writable
    from envelope.io.rasters import open_climate, open_layer

    check_writable(out, overwrite)
    console = Console(stderr=True)
    stack = open_climate(list(climate))
    bias_layer = open_layer(bias) if bias else None
    if bias_layer is not None:
        from envelope.grids import check_same_grid

        check_same_grid(stack, bias_layer, ref_name="climate", other_name=f"--bias {bias}")
    options = FitOptions(method=method, n_background=n_background, variables=variables, block_km=blocks_km,
                         n_folds=folds, cv_scheme=cv_scheme, threshold_rule=threshold_rule, seed=seed, features=features,
                         max_uncertainty_m=max_uncertainty_m, years=years, thin_km=thin_km)
    with Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed}/{task.total}"),
                  TimeElapsedColumn(), console=console, transient=True) as bar:
        tasks = {}

        def progress(stage, done, total):
            if stage not in tasks:
                tasks[stage] = bar.add_task(stage, total=total)
            bar.update(tasks[stage], completed=done)

        result = fit_model(presences, stack, options=options, bias=bias_layer, climate_paths=climate,
                           bias_path=bias, progress=progress)
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
    console.print(f"threshold {thr['value']:.4f} ({thr['rule']}); {summary['n_presences']} presences, "
                  f"{summary['n_background']} background")
    for note in summary.get("notes", []):
        console.print(f"[yellow]note:[/] {note}")
    console.print(f"model: {paths['model']}\nsummary: {paths['summary']}\nfolds: {paths['folds']}")
