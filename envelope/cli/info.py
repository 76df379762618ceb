"""`envelope info`: describe a grid file (CRS, shape, variables, nodata share, true area)."""

from __future__ import annotations

import json

import click

from envelope.cli.options import json_opt


@click.command()
@click.argument("path", type=click.Path(dir_okay=False))
@json_opt
def info(path, as_json):
    """Describe a grid: CRS, shape, variables, nodata share, true area.

    Reads a multi-band GeoTIFF, a single-band GeoTIFF or a CF-NetCDF file and reports its
    CRS, shape, resolution and bounds, every variable with units and value range, the
    share of nodata cells, and the true area of the cells where every variable is valid
    (exact ellipsoidal cell areas on geographic grids, ground areas on projected ones).

    \b
    Examples:
      $ envelope info sample_grids/demo/baseline.tif
      $ envelope info climate.nc --json > climate.json
    """
    from envelope.pipelines.info import describe_grid

    summary = describe_grid(path)
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    _print_table(summary)


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def _print_table(s: dict) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)
    rows, cols = s["shape"]
    left, bottom, right, top = s["bounds"]
    console.print(f"[bold]{s['path']}[/bold]  ({s['format']})")
    console.print(f"CRS          {s['crs']}")
    console.print(f"Shape        {rows} rows x {cols} columns")
    console.print(f"Resolution   {_fmt(s['resolution'][0])} x {_fmt(s['resolution'][1])}")
    console.print(f"Bounds       west {_fmt(left)}, south {_fmt(bottom)}, east {_fmt(right)}, north {_fmt(top)}")
    console.print(f"Nodata       {100 * s['nodata_share']:.2f}% of cells (any variable)")
    console.print(f"Valid area   {s['valid_area_km2']:,.1f} km²")
    table = Table(title="Variables")
    for column in ("name", "units", "min", "max", "nodata %"):
        table.add_column(column, justify="left" if column in ("name", "units") else "right")
    for v in s["variables"]:
        table.add_row(v["name"], v["units"] or "-", _fmt(v["min"]), _fmt(v["max"]),
                      f"{100 * v['nodata_share']:.2f}")
    console.print(table)
