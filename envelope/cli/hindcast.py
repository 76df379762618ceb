"""`envelope hindcast`: fit on one recording period, project onto the other's climate, compare with its records."""

from __future__ import annotations

import click

from envelope.models import METHOD_NAMES

from envelope.cli.options import cv_opt, features_opt, overwrite_opt, seed_opt


@click.command()
@click.argument("records", type=click.Path(exists=True, dir_okay=False))
@click.option("--climate-1", "climate_1", required=True, multiple=True, type=click.Path(exists=True),
              help="Climate of the first period (repeat for single-band files).")
@click.option("--climate-2", "climate_2", required=True, multiple=True, type=click.Path(exists=True),
              help="Climate of the second period, on the same grid.")
@click.option("--periods", required=True, metavar="FIRST-LAST,FIRST-LAST",
              help="Two separate recording periods, inclusive years, the earlier first.")
@click.option("--species", required=True, metavar="NAME", help="Focal taxon; the other taxa measure recording effort.")
@click.option("--out", "out", required=True, type=click.Path(file_okay=False),
              help="Folder for hindcast.json and the figures.")
@click.option("--method", type=click.Choice(METHOD_NAMES), default="pointprocess", show_default=True,
              help="Model family.")
@click.option("--background", type=click.IntRange(min=100), default=10_000, show_default=True,
              help="Background points of each fit.")
@click.option("--folds", type=click.IntRange(min=2, max=20), default=5, show_default=True, help="CV folds of each fit.")
@cv_opt
@features_opt
@click.option("--n-cells", type=click.IntRange(min=1), default=10, show_default=True,
              help="N of the N most poleward (equatorward) cells, for observed and predicted margins alike.")
@click.option("--min-records", type=click.FloatRange(min=0), default=5, show_default=True,
              help="Records of all taxa that make a cell well recorded in a period.")
@seed_opt
@overwrite_opt
def hindcast(records, climate_1, climate_2, periods, species, out, method, background, folds, cv, features, n_cells,
             min_records, seed, overwrite):
    """Test a model against change that has already happened, both ways.

    Fits on the first period's records with the first period's climate, projects onto the
    second period's climate and compares with the second period's records (AUC and Boyce
    index, predicted against observed margin shift); then the same backwards. Writes
    hindcast.json, two maps and a margin-shift chart into --out.

    \b
    Examples:
      $ envelope hindcast records.csv --climate-1 clim_1970s.tif --climate-2 clim_2000s.tif \\
            --periods 1970-1989,2000-2019 --species "Fictus marginalis" --out hindcast/
      $ envelope hindcast records.csv --climate-1 clim_1970s.tif --climate-2 clim_2000s.tif \\
            --periods 1970-1989,2000-2019 --species "Fictus marginalis" --method brt --out hc/
      $ envelope hindcast records.csv --climate-1 clim_1970s.tif --climate-2 clim_2000s.tif \\
            --periods 1970-1989,2000-2019 --species "Fictus marginalis" --features linear,quadratic \\
            --cv random --out hc-fixed/
    """
    from envelope.pipelines.hindcast import HindcastOptions, hindcast_files

    options = HindcastOptions(periods=periods, species=species, method=method, background=background, folds=folds,
                              cv=cv, features=features, n_cells=n_cells, min_records=min_records, seed=seed)
    result = hindcast_files(records, list(climate_1), list(climate_2), out, options=options, overwrite=overwrite)
    for key in ("forward", "backward"):
        r = result[key]
        click.echo(f"{key}: fitted {r['fit_period']}, tested on {r['projected_period']}: AUC {r['auc']:.3f}, "
                   f"Boyce {r['boyce']:.3f}; poleward margin predicted {r['predicted_poleward_margin_shift_km']:.0f} km, "
                   f"observed {r['observed_poleward_margin_shift_km']:.0f} km")
    click.echo(f"summary: {result['files']['summary']}")
