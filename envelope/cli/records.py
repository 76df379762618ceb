"""``envelope records``: clean occurrence records against a climate grid and report what was dropped."""

from __future__ import annotations

import json
import click

from envelope.cli.options import (climate_opt, json_opt, output_opt, overwrite_opt, positive_float,
                                  record_years_opt, record_years_value)


@click.command()
@click.argument("records_path", metavar="RECORDS.csv", type=click.Path(dir_okay=False))
@climate_opt(multiple=True, required=True)
@click.option("--x-column", default=None, help="Column of x coordinates (default: decimalLongitude).")
@click.option("--y-column", default=None, help="Column of y coordinates (default: decimalLatitude).")
@click.option("--crs", default=None, help="CRS of the coordinates, e.g. EPSG:3035 (default EPSG:4326; "
                                          "required with --x-column/--y-column).")
@click.option("--max-uncertainty-m", type=float, default=None, callback=positive_float, metavar="M",
              help="Drop records whose coordinateUncertaintyInMeters exceeds M.")
@record_years_opt
@click.option("--thin-km", type=float, default=None, callback=positive_float, metavar="KM",
              help="Keep records more than KM apart (greedy, in file order).")
@output_opt(required=False, help="Write the cleaned records to this CSV file.")
@overwrite_opt
@json_opt
def records(records_path, climate, x_column, y_column, crs, max_uncertainty_m, record_years, thin_km, out, overwrite,
            as_json):
    """Clean occurrence records against a climate grid and report what was dropped.

    Reads a CSV/TSV of occurrence records (Darwin Core decimalLongitude/decimalLatitude, or
    named columns with a stated CRS), places each on the grid, and drops absences, broken
    rows, imprecise or out-of-period records, records off the grid or without climate,
    all but one record per cell, and (with --thin-km) records too close to a kept one.
    Prints how many were read, kept and dropped for each reason; with --out writes the
    cleaned table (cell centre x/y, row/col, original coordinates, source columns).

    \b
    Examples:
      $ envelope records sightings.csv --climate baseline.tif
      $ envelope records sightings.csv --climate baseline.tif --record-years 1990-2020 \\
          --max-uncertainty-m 1000 --thin-km 10 --out clean.csv
      $ envelope records plots.tsv --climate tmean.tif --climate precip.tif \\
          --x-column easting --y-column northing --crs EPSG:3035 --json
    """
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.records import clean_records_file

    check_distinct({"--out": out}, {"RECORDS.csv": records_path, "--climate": climate})
    summary = clean_records_file(records_path, list(climate), x_column=x_column, y_column=y_column, crs=crs,
                                 max_uncertainty_m=max_uncertainty_m, record_years=record_years_value(record_years),
                                 thin_km=thin_km, out=out, overwrite=overwrite)
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    _print_table(summary)


def _print_table(summary):
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    table = Table(title=f"Records: {escape(summary['source'])}", show_header=True, header_style="bold")
    table.add_column("")
    table.add_column("records", justify="right")
    table.add_row("read", str(summary["read"]))
    for reason, count in summary["dropped"].items():
        table.add_row(f"  dropped: {reason.replace('_', ' ')}", str(count), style="dim" if count == 0 else None)
    table.add_row("kept", str(summary["kept"]), style="bold")
    console = Console()
    console.print(table)
    console.print(f"Grid CRS {escape(summary['crs'])}; records read in {escape(summary['record_crs'])}.")
    if "out" in summary:
        console.print(f"Wrote {escape(summary['out'])}")
