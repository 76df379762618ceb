"""``envelope records``: clean occurrence records against a climate grid and report what was dropped."""

from __future__ import annotations

import json
import click

from envelope.cli.options import (absences_opt, climate_opt, json_opt, output_opt, overwrite_opt, positive_float,
                                  record_years_opt, record_years_value, species_opt)


@click.command()
@click.argument("records_path", metavar="RECORDS", type=click.Path(dir_okay=False))
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
@species_opt
@absences_opt
@output_opt(required=False, help="Write the cleaned records to this CSV file.")
@overwrite_opt
@json_opt
def records(records_path, climate, x_column, y_column, crs, max_uncertainty_m, record_years, thin_km, species,
            absences, out, overwrite, as_json):
    """Clean occurrence records against a climate grid and report what was dropped.

    Reads occurrence records: a CSV/TSV (Darwin Core decimalLongitude/decimalLatitude,
    else degrees under plain names such as longitude/latitude or lon/lat, or named columns
    with a stated CRS; UTF-8 with or without a byte-order mark, UTF-16
    with one, else Windows-1252; degrees with decimal commas are read) or a Darwin Core
    Archive zip as occurrence portals deliver it (its meta.xml names the core file and columns).
    Places each record on the grid, and drops records of other taxa (--species), absences
    (unless --absences), broken rows, imprecise or out-of-period records, records off the
    grid or without climate, all but one record per cell, and (with --thin-km) records too
    close to a kept one. Prints what was read, how many were kept and dropped for each
    reason; with --out writes the cleaned table (cell centre x/y, row/col, original
    coordinates, source columns).

    \b
    Examples:
      $ envelope records sightings.csv --climate baseline.tif
      $ envelope records download.zip --species "Aus bus" --climate bio1=bio1.tif --climate bio12=bio12.tif
      $ envelope records surveys.csv --absences --layers layers.csv --json
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
                                 thin_km=thin_km, species=species, absences=absences, out=out, overwrite=overwrite)
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
    if "absences" in summary:
        table.add_row("  of which absences", str(summary["absences"]))
    console = Console()
    console.print(_read_line(summary.get("input", {})), markup=False)
    taxa = summary.get("taxa")
    if taxa:
        shown = ", ".join(f"{name} ({count})" for name, count in taxa["counts"].items())
        console.print(f"Taxa in the records: {shown}" + (f"; kept {taxa['asked']!r}" if taxa["asked"] else ""),
                      markup=False)
    console.print(table)
    console.print(f"Grid CRS {escape(summary['crs'])}; records read in {escape(summary['record_crs'])}.")
    if "out" in summary:
        console.print(f"Wrote {escape(summary['out'])}")


def _read_line(info: dict) -> str:
    if info.get("format") == "Darwin Core Archive":
        ignored = info.get("extensions_ignored") or []
        return (f"Read a Darwin Core Archive: core file {info['core']} ({info['rows']} rows, {info['fields']} fields, "
                f"{info['encoding']}, delimiter {info['delimiter']!r}, {info['header_lines']} header line(s))"
                + (f"; {len(ignored)} extension(s) not read" if ignored else ""))
    if info:
        return (f"Read delimited text: {info.get('rows')} rows, delimiter {info.get('delimiter')!r}, "
                f"{info.get('encoding')}" + (" with a byte-order mark" if info.get("byte_order_mark") else "")
                + (", decimal commas" if info.get("decimal_comma") else "")
                + (", degrees from columns {}/{}".format(*info["degree_columns"]) if info.get("degree_columns") else ""))
    return ""
