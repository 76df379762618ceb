"""`envelope fragmentation`: habitat amount and effective mesh size by latitude band."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt


@click.command()
@click.option("--habitat", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Habitat fraction 0–1, or land-cover classes with --classes.")
@click.option("--classes", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Land-cover class table (CSV code,name,habitat_quality): --habitat is then land cover.")
@click.option("--grid", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Climate grid (or any raster on it): habitat is put on this grid and its cells with data "
                   "are the land. Default: the habitat raster's own grid, land where it has data.")
@click.option("--align-habitat", is_flag=True, help="Resample a coarser or misaligned habitat map onto --grid.")
@click.option("--band-deg", type=float, default=1.0, show_default=True, help="Width of the latitude bands (degrees).")
@click.option("--habitat-threshold", type=float, default=0.5, show_default=True,
              help="A cell is habitat when its fraction is >= this value, in (0, 1].")
@click.option("--connectivity", type=click.Choice(["4", "8"]), default="4", show_default=True,
              help="Cells of one patch share an edge (4) or an edge or a corner (8).")
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Table to write (CSV, one row per band).")
@click.option("--summary", type=click.Path(dir_okay=False), default=None,
              help="Summary JSON: the bands and whether the poleward half is more fragmented.")
@overwrite_opt
def fragmentation(habitat, classes, grid, align_habitat, band_deg, habitat_threshold, connectivity, out, summary,
                  overwrite):
    """Habitat amount and fragmentation along the poleward gradient.

    Habitat cells (fraction >= --habitat-threshold) are grouped into patches; for each
    latitude band the table gives the land and habitat area, the habitat share, the
    number of patches and Jaeger's effective mesh size (the area reachable from a random
    point of the band without leaving habitat). Bands run from the equator poleward;
    the summary compares the poleward half of the bands with the equatorward half.
    `envelope reach` puts the same table in its summary.

    \b
    Examples:
      $ envelope fragmentation --habitat habitat.tif --grid baseline.tif --out fragmentation.csv
      $ envelope fragmentation --habitat landcover.tif --classes classes.csv --grid baseline.tif \\
            --band-deg 0.5 --connectivity 8 --out fragmentation.csv --summary fragmentation.json
    """
    from rich.console import Console
    from rich.table import Table

    from envelope.pipelines.fragmentation import fragmentation_files

    table, result = fragmentation_files(habitat, out, summary=summary, grid=grid, classes=classes,
                                        align_habitat=align_habitat, habitat_threshold=habitat_threshold,
                                        band_deg=band_deg, connectivity=connectivity, overwrite=overwrite)

    console = Console()
    t = Table(title=f"Habitat by {band_deg:g}° latitude band (equator to pole)")
    for col in ("band", "habitat km²", "share of land", "patches", "eff. mesh km²"):
        t.add_column(col, justify="right")
    for row in table.itertuples():
        t.add_row(f"{row.lat_min:g}–{row.lat_max:g}° {row.hemisphere}", f"{row.habitat_area_km2:,.0f}",
                  f"{row.habitat_share_of_land:.1%}", str(row.n_patches), f"{row.effective_mesh_size_km2:,.2f}")
    console.print(t)
    console.print(result["statement"])
    for path in (out, summary):
        if path:
            console.print(f"written: {path}")
