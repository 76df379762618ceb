"""`envelope info`: describe a grid file (CRS, shape, variables, nodata share, true area)."""

from __future__ import annotations

import json

import click

from envelope.cli.options import json_opt


@click.command()
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--quick", is_flag=True, default=False,
              help="Answer from the file's statistics tags and overviews where it has them (estimates; see 'source').")
@json_opt
def info(path, as_json, quick):
    """Describe a grid: CRS, shape, variables, nodata share, true area.

    Reads a multi-band GeoTIFF, a single-band GeoTIFF or a CF-NetCDF file and reports its
    CRS, shape, resolution and bounds, every variable with units and value range, the
    share of nodata cells, and the true area of the cells where every variable is valid
    (exact ellipsoidal cell areas on geographic grids, ground areas on projected ones).

    Large GeoTIFFs are read block by block, only the blocks the file stores, with a
    progress bar on stderr. With --quick a GeoTIFF is described from its GDAL statistics
    tags (value ranges, nodata shares) and its finest overview of at most 2^22 cells
    (nodata share and valid area, estimated), without reading the full-resolution cells;
    what the file does not hold is computed from the data. 'source' in the output says
    where each number came from.

    \b
    Examples:
      $ envelope info sample_grids/demo/baseline.tif
      $ envelope info climate.nc --json > climate.json
      $ envelope info continent.tif --quick
    """
    from envelope.cli.progress import ProgressBar
    from envelope.pipelines.info import describe_grid

    with ProgressBar("info") as progress:
        summary = describe_grid(path, quick=quick, progress=progress)
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
    source = s.get("source", {})
    if any(v != "data" for v in source.values()):
        console.print(f"Source       ranges from {source['ranges']}, area from {source['area']}")
    table = Table(title="Variables")
    for column in ("name", "units", "min", "max", "nodata %"):
        table.add_column(column, justify="left" if column in ("name", "units") else "right")
    for v in s["variables"]:
        table.add_row(v["name"], v["units"] or "-", _fmt(v["min"]), _fmt(v["max"]),
                      f"{100 * v['nodata_share']:.2f}")
    console.print(table)
