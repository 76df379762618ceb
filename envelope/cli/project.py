"""`envelope project`: project a model onto a climate grid or a scenario table, with MESS and ensembles."""

from __future__ import annotations

import click

from envelope.cli.options import climate_opt, output_opt, overwrite_opt, region_opt, scheduler_opt
from envelope.cli.progress import ProgressBar

MESS_AUTO = "__beside__"  # --mess given without a file (scenario batch: one MESS per scenario)


def _agreement(ctx, param, value):
    if value is not None and not 0.0 < value <= 1.0:
        raise click.BadParameter(f"{value!r} must be a share of models in (0, 1]", ctx=ctx, param=param)
    return value


@click.command()
@click.argument("model_file", type=click.Path(dir_okay=False))
@climate_opt(multiple=True, required=False)
@output_opt(required=False, help="Suitability raster to write (.tif or .nc), float32 0-1.")
@click.option("--mess", "mess", is_flag=False, flag_value=MESS_AUTO, default=None, metavar="MESS.tif",
              help="Write MESS and the most dissimilar variable (2 layers); with --scenarios give it "
                   "without a file name.")
@click.option("--binary", "binary", type=click.Path(dir_okay=False), default=None, metavar="BIN.tif",
              help="Also write a 0/1 map at the model's threshold (uint8, 255 = nodata).")
@click.option("--no-clamp", "no_clamp", is_flag=True,
              help="Do not clamp climate values to the training range before predicting.")
@click.option("--scenarios", "scenarios", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Scenario table (CSV or TOML: name, pathway, climate_model, horizon, path).")
@click.option("--out-dir", "out_dir", type=click.Path(file_okay=False), default=None,
              help="Folder for the scenario batch outputs.")
@click.option("--agreement", type=float, default=2 / 3, show_default="2/3", callback=_agreement,
              help="Share of climate models that must call a cell suitable for the consensus map.")
@region_opt(help="Study region (GeoPackage, GeoJSON or shapefile, any CRS): project only the cells inside it.")
@scheduler_opt
@overwrite_opt
def project(model_file, climate, out, mess, binary, no_clamp, scenarios, out_dir, agreement, region, scheduler,
            overwrite):
    """Project a model onto climate grids, with MESS.

    Single grid: reads the model's variables by name from the climate grid (name layers
    with --climate NAME=PATH[:BAND] or --layers when the files do not), clamps them
    to the training range (unless --no-clamp) and writes suitability 0-1 with the
    model's threshold and provenance in the raster tags. --mess adds the multivariate
    environmental similarity surface and prints the share of the area (true cell areas)
    in novel climate (MESS < 0).

    Scenario batch: one suitability (and MESS) raster per row of the table, a
    suitability table CSV, and per pathway and horizon the mean, SD, suitable count and
    consensus across climate models (consensus: at least --agreement of the models call
    the cell suitable at the model's threshold).

    Work streams chunk by chunk on local threads, or on a dask.distributed cluster
    with --scheduler.

    \b
    Examples:
      $ envelope project model.envm --climate future.tif --out suit.tif --mess mess.tif
      $ envelope project model.envm --climate future.tif --out suit.tif --binary suit01.tif
      $ envelope project model.envm --scenarios scenarios.csv --out-dir projections --mess
      $ envelope project model.envm --climate future.tif --out suit.tif --scheduler tcp://10.0.0.5:8786
      $ envelope project model.envm --climate bio5=f_bio5.tif --climate bio12=f_stack.tif:12 --out suit.tif
      $ envelope project model.envm --layers future_layers.csv --region park.gpkg --out suit.tif
    """
    if scenarios:
        if climate or out or binary:
            raise click.UsageError("--scenarios replaces --climate/--out/--binary; give --out-dir instead")
        if mess not in (None, MESS_AUTO):
            raise click.UsageError("with --scenarios give --mess without a file name (one MESS per scenario)")
        if not out_dir:
            raise click.UsageError("--scenarios needs --out-dir")
        from envelope.pipelines.project import project_scenarios

        with ProgressBar("projecting") as progress:
            result = project_scenarios(model_file, scenarios, out_dir, mess=mess is not None, agreement=agreement,
                                       clamp=not no_clamp, overwrite=overwrite, scheduler=scheduler,
                                       progress=progress, region=region)
        for row in result["rows"]:
            share = "" if row["novel_share"] is None else f"  novel climate {100 * row['novel_share']:.2f} % of area"
            click.echo(f"{row['name']}: {row['path']}{share}")
        for ens in result["ensembles"]:
            click.echo(f"ensemble {ens['pathway']} {ens['horizon']}: {ens['n_models']} climate models, consensus "
                       f">= {ens['consensus_min_models']} of {ens['n_models']} (agreement {ens['agreement']:.3g})")
        click.echo(f"table: {result['table']}")
        return
    if not climate or not out:
        raise click.UsageError("give --climate and --out (or --scenarios and --out-dir)")
    if mess == MESS_AUTO:
        raise click.UsageError("--mess needs a file name for a single projection, e.g. --mess mess.tif")
    if out_dir:
        raise click.UsageError("--out-dir goes with --scenarios")
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.project import project_file

    check_distinct({"--out": out, "--mess": mess, "--binary": binary}, {"MODEL_FILE": model_file, "--climate": climate})
    with ProgressBar("projecting") as progress:
        result = project_file(model_file, list(climate), out, mess_out=mess, binary_out=binary, clamp=not no_clamp,
                              overwrite=overwrite, scheduler=scheduler, progress=progress, region=region)
    click.echo(f"suitability: {result['out']} ({result['method']}, threshold {result['threshold']:.4g})")
    if result["mess"]:
        click.echo(f"MESS: {result['mess']}; novel climate (MESS < 0): {100 * result['novel_share']:.2f} % of area")
    if result["binary"]:
        click.echo(f"binary: {result['binary']}")
    if result["n_infinite"]:
        click.echo(f"nodata: {result['n_infinite']} cells with +inf/-inf climate values")
