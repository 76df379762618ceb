"""`envelope evaluate`: a fitted model's skill on independent records (AUC, TSS, kappa, Boyce, omission)."""

from __future__ import annotations

import click

from envelope.cli.options import (climate_opt, overwrite_opt, positive_float, record_years_opt, record_years_value,
                                  region_opt, seed_opt, species_opt)


@click.command()
@click.argument("model_file", metavar="MODEL", type=click.Path(exists=True, dir_okay=False))
@click.option("--records", "records_path", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Independent test records: CSV/TSV or Darwin Core Archive, presences and (optionally) "
                   "surveyed absences (occurrenceStatus absent).")
@climate_opt()
@click.option("--summary", type=click.Path(dir_okay=False), default=None, metavar="EVAL.json",
              help="Write the evaluation summary (JSON).")
@click.option("--calibration", type=click.Path(dir_okay=False), default=None, metavar="PLOT.png",
              help="Write a calibration plot: observed share of presences against predicted suitability, by bins.")
@species_opt
@click.option("--no-absences", is_flag=True, help="Ignore absences in the records and score against background.")
@click.option("--background", type=click.IntRange(min=100), default=10_000, show_default=True,
              help="Background cells drawn when the records hold no absences.")
@region_opt(help="Study region (vector file, any CRS): background is drawn inside it only.")
@click.option("--background-buffer-km", type=float, callback=positive_float, default=None, metavar="KM",
              help="Draw background only within KM of a test record.")
@click.option("--x-column", default=None, help="Column of x coordinates (default: decimalLongitude).")
@click.option("--y-column", default=None, help="Column of y coordinates (default: decimalLatitude).")
@click.option("--crs", default=None, help="CRS of the coordinates (required with --x-column/--y-column).")
@click.option("--max-uncertainty-m", type=float, default=None, callback=positive_float, metavar="M",
              help="Drop records less precise than M metres.")
@record_years_opt
@seed_opt
@overwrite_opt
def evaluate(model_file, records_path, climate, summary, calibration, species, no_absences, background, region,
             background_buffer_km, x_column, y_column, crs, max_uncertainty_m, record_years, seed, overwrite):
    """Evaluate a fitted model on independent records, at the model's threshold.

    Cleans the test records against the climate grid (the model's variables, by name),
    predicts suitability at each record's cell and scores it: AUC, TSS, kappa and
    omission at the model's threshold, and the continuous Boyce index. Records with
    occurrenceStatus absent are used as absences (presence-absence evaluation); without
    absences, background is drawn per true area as in fit (presence-background
    evaluation, where TSS and kappa treat background as absence). Independent means
    records not used in the fit: from another survey, period or region.

    \b
    Examples:
      $ envelope evaluate model.envm --records survey_2023.csv --climate baseline.tif --summary eval.json
      $ envelope evaluate model.envm --records plots.zip --layers layers.csv --species "Aus bus" \\
            --summary eval.json --calibration calibration.png
      $ envelope evaluate model.envm --records later_records.csv --climate baseline.tif \\
            --region study_area.gpkg --background 5000 --seed 3 --summary eval.json
    """
    from envelope.pipelines.evaluate import evaluate_model

    options = {"x_column": x_column, "y_column": y_column, "crs": crs, "max_uncertainty_m": max_uncertainty_m,
               "record_years": record_years_value(record_years)}
    result = evaluate_model(model_file, records_path, list(climate), summary=summary, calibration=calibration,
                            species=species, absences=not no_absences, background=background, seed=seed,
                            region=region, buffer_km=background_buffer_km, clean_options=options,
                            overwrite=overwrite)
    _print(result)


def _print(result):
    from rich.console import Console
    from rich.table import Table

    console = Console()
    against = (f"{result['n_absences']} absences" if "n_absences" in result
               else f"{result['n_background']} background cells")
    table = Table(title=f"Evaluation: {result['n_presences']} presences against {against} ({result['data']})")
    table.add_column("metric")
    table.add_column("value", justify="right")
    for key, label in (("auc", "AUC"), ("tss", "TSS"), ("kappa", "kappa"), ("boyce", "Boyce"),
                       ("omission", "omission"), ("sensitivity", "sensitivity"), ("specificity", "specificity")):
        value = result[key]
        table.add_row(label, "–" if value is None or value != value else f"{value:.3f}")
    console.print(table)
    console.print(f"threshold {result['threshold']:.4f} ({result['threshold_rule']}, from the model file)")
    for note in result["notes"]:
        console.print(f"note: {note}", markup=False)
    for key in ("summary", "calibration_plot"):
        if key in result:
            console.print(f"{key.replace('_', ' ')}: {result[key]}", markup=False)
