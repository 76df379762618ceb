"""`envelope change`: classify and measure range change between suitability maps."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, polygons_opt
from envelope.cli.progress import ProgressBar

_existing = click.Path(exists=True, dir_okay=False)


@click.command()
@click.option("--now", "now", type=_existing, required=True, help="Current suitability raster (NOW.tif).")
@click.option("--future", "future", type=_existing, default=None,
              help="Future suitability raster (FUTURE.tif); or use --scenarios.")
@click.option("--out", "out", type=click.Path(dir_okay=False), default=None, help="Change-class raster to write.")
@click.option("--summary", "summary", type=click.Path(dir_okay=False), default=None, help="Summary JSON to write.")
@click.option("--scenarios", "scenarios", type=_existing, default=None,
              help="CSV of future maps: name,pathway,climate_model,horizon,path[,mess_path].")
@click.option("--out-dir", "out_dir", type=click.Path(file_okay=False), default=None,
              help="Folder for <name>.tif and <name>.json of each scenario (with --scenarios).")
@click.option("--table", "table", type=click.Path(dir_okay=False), default=None,
              help="Combined CSV table of all scenarios (with --scenarios).")
@click.option("--threshold", type=float, default=None,
              help="Suitability threshold in [0, 1] (default: the rasters' 'threshold' tag).")
@click.option("--mess", "mess", type=_existing, default=None,
              help="MESS raster of the future climate: gains with MESS < 0 are 'gained_novel', stable cells 'stable_novel'.")
@click.option("--elevation", "elevation", type=_existing, default=None,
              help="Elevation raster (m, same grid) for the mean elevation shift.")
@click.option("--edge-percentile", type=float, default=95.0, show_default=True,
              help="Area-weighted percentile of poleward latitude taken as the leading edge.")
@polygons_opt
@overwrite_opt
def change(now, future, out, summary, scenarios, out_dir, table, threshold, mess, elevation,
           edge_percentile, polygons, overwrite):
    """Classify and measure range change between two suitability maps.

    Cells are absent, lost, stable, gained, or (with --mess) gained or stable in novel climate;
    areas are true areas on the ground. The summary gives range sizes, the centroid shift
    and bearing, poleward leading/trailing edge shifts and, with --elevation, the mean
    elevation shift. With --scenarios every listed future map is compared with NOW and one
    combined table is written.

    Huge GeoTIFF grids (more than 2^26 cells) are measured window by window over the
    blocks the files store, in bounded memory, and the class map is written sparse; the
    numbers are the same. A progress bar on stderr shows long work.

    \b
    Examples:
      $ envelope change --now now.tif --future high_2070.tif --out change.tif --summary change.json
      $ envelope change --now now.tif --future f.tif --mess mess.tif --threshold 0.42 --out c.tif --summary c.json
      $ envelope change --now now.tif --scenarios suitability.csv --out-dir changes --table changes.csv
      $ envelope change --now now.tif --future f.tif --out c.tif --summary c.json --polygons change.gpkg
    """
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.change import range_change, range_change_batch

    inputs = {"--now": now, "--future": future, "--mess": mess, "--elevation": elevation, "--scenarios": scenarios}
    check_distinct({"--out": out, "--summary": summary, "--table": table}, inputs)

    if scenarios is not None:
        clash = [flag for flag, value in (("--future", future), ("--out", out), ("--summary", summary),
                                          ("--mess", mess), ("--polygons", polygons)) if value is not None]
        if clash:
            raise click.UsageError(f"{clash[0]} does not go with --scenarios (give future maps in the table)")
        if out_dir is None or table is None:
            raise click.UsageError("--scenarios needs --out-dir and --table")
        with ProgressBar("change") as progress:
            frame = range_change_batch(now, scenarios, out_dir, table, threshold=threshold, elevation=elevation,
                                       edge_percentile=edge_percentile, overwrite=overwrite, progress=progress)
        click.echo(f"Wrote {len(frame)} change maps and summaries to {out_dir} and the table {table}")
        return
    if future is None or out is None or summary is None:
        raise click.UsageError("give --future, --out and --summary (or --scenarios, --out-dir and --table)")
    if out_dir is not None or table is not None:
        raise click.UsageError("--out-dir and --table go with --scenarios")
    with ProgressBar("change") as progress:
        result = range_change(now, future, out, summary, threshold=threshold, mess=mess, elevation=elevation,
                              edge_percentile=edge_percentile, overwrite=overwrite, polygons=polygons,
                              progress=progress)
    area = result["area_km2"]
    pct = result["range_change_pct"]
    click.echo(f"Range {result['range_km2']['now']:.1f} -> {result['range_km2']['future']:.1f} km² "
               f"({'n/a' if pct is None else f'{pct:+.1f}%'}); lost {area['lost']:.1f}, stable {area['stable_total']:.1f}, "
               f"gained {area['gained_total']:.1f} km²")
    click.echo(f"Wrote {out} and {summary}" + (f" and {result['polygons']}" if polygons else ""))
