"""`envelope margins`: observed poleward and equatorward range-margin shifts between two recording periods."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, seed_opt


@click.command()
@click.argument("records", type=click.Path(exists=True, dir_okay=False))
@click.option("--grid", "grid", required=True, multiple=True, type=click.Path(exists=True),
              help="Grid whose cells are the recording units (a climate grid; repeat for single-band files).")
@click.option("--periods", required=True, metavar="FIRST-LAST,FIRST-LAST",
              help="Two separate recording periods, inclusive years, the earlier first: 1970-1989,2000-2019.")
@click.option("--species", required=True, metavar="NAME",
              help="Focal taxon (scientificName or species column); all other records measure recording effort.")
@click.option("--summary", "summary", required=True, type=click.Path(dir_okay=False), help="Summary JSON to write.")
@click.option("--n-cells", type=click.IntRange(min=1), default=10, show_default=True,
              help="N of the mean latitude of the N most poleward (equatorward) occupied cells.")
@click.option("--effort", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Effort raster on the grid (one band, or one per period) instead of the record counts.")
@click.option("--min-records", type=click.FloatRange(min=0), default=5, show_default=True,
              help="A cell is recorded well in a period with at least this many records of all taxa "
                   "(or this effort-raster value); only cells recorded well in both periods are used.")
@click.option("--bootstrap", type=click.IntRange(min=0), default=1000, show_default=True,
              help="Bootstrap replicates of the 95 % intervals (0: none).")
@click.option("--elevation", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Elevation raster (m) on the grid: adds the shift in mean elevation.")
@click.option("--no-effort-correction", is_flag=True, help="Use every occupied cell (the uncorrected figure).")
@seed_opt
@overwrite_opt
def margins(records, grid, periods, species, summary, n_cells, effort, min_records, bootstrap, elevation,
            no_effort_correction, seed, overwrite):
    """Observed shift of a species' poleward and equatorward range margins between two periods.

    Each margin is the mean latitude of the N most poleward (equatorward) occupied cells of a
    period (Thomas & Lennon 1999; Hickling et al. 2006), also given as the area-weighted 95th
    (5th) percentile; shifts are km along the meridian, positive = poleward in the
    species' hemisphere. Only cells recorded well in both periods are used, judged by the
    records of all taxa in the file or by an effort raster; bootstrap 95 % intervals.

    \b
    Examples:
      $ envelope margins records.csv --grid baseline.tif --periods 1970-1989,2000-2019 \\
            --species "Fictus marginalis" --summary margins.json
      $ envelope margins records.csv --grid baseline.tif --periods 1970-1989,2000-2019 \\
            --species "Fictus marginalis" --effort effort.tif --min-records 3 \\
            --elevation dem.tif --n-cells 20 --summary margins.json
      $ envelope margins records.csv --grid baseline.tif --periods 1970-1989,2000-2019 \\
            --species "Fictus marginalis" --no-effort-correction --summary raw.json
    """
    from envelope.pipelines.margins import MarginOptions, margins_files

    options = MarginOptions(periods=periods, species=species, n_cells=n_cells, min_records=min_records,
                            bootstrap=bootstrap, effort_correction=not no_effort_correction, seed=seed)
    result = margins_files(records, list(grid), summary, options=options, effort=effort, elevation=elevation,
                           overwrite=overwrite)
    labels = result["periods"]
    click.echo(f"{species}: poleward = {result['poleward']}; cells used {labels[0]} "
               f"{result['n_cells_used'][labels[0]]}, {labels[1]} {result['n_cells_used'][labels[1]]}")
    for side in ("poleward", "equatorward"):
        interval = result[f"{side}_margin_shift_interval_km"]
        text = "" if interval is None else f" (95 % interval {interval[0]:.1f} to {interval[1]:.1f})"
        click.echo(f"{side} margin shift: {result[f'{side}_margin_shift_km']:.1f} km{text}")
    if result.get("elevation_shift_m") is not None:
        click.echo(f"mean elevation shift: {result['elevation_shift_m']:.1f} m")
    click.echo(f"summary: {summary}")
