"""Catalogue of shared options: each defined once, re-used by every command that needs it.

Used by:
  output_opt     -- fit, project, change, reach, bioclim, delta
  overwrite_opt  -- every command that writes files
  scheduler_opt  -- project, reach, run
  climate_opt    -- fit, project
  seed_opt       -- fit, reach
  json_opt       -- info, inspect
"""

from __future__ import annotations

import click


def _positive_float(ctx, param, value):
    if value is None:
        return value
    if not value > 0:
        raise click.BadParameter(f"{value!r} must be a positive number", ctx=ctx, param=param)
    return value


def _csv_list(ctx, param, value):
    if value is None:
        return None
    items = [v.strip() for v in value.split(",") if v.strip()]
    if not items:
        raise click.BadParameter(f"{value!r} holds no names; give a comma-separated list", ctx=ctx, param=param)
    return items


overwrite_opt = click.option("--overwrite", is_flag=True, help="Replace output files that already exist.")

json_opt = click.option("--json", "as_json", is_flag=True, help="Print JSON instead of a table.")

seed_opt = click.option("--seed", type=int, default=0, show_default=True, help="Random seed (runs are reproducible).")

scheduler_opt = click.option(
    "--scheduler",
    metavar="ADDRESS",
    default=None,
    help="Address of a dask.distributed scheduler (e.g. tcp://127.0.0.1:8786); local threads if omitted.",
)

variables_opt = click.option(
    "--variables",
    callback=_csv_list,
    metavar="A,B,C",
    default=None,
    help="Comma-separated climate variables to use (default: all).",
)


def output_opt(required=True, help="Output file."):
    return click.option("--out", "out", type=click.Path(dir_okay=False), required=required, help=help)


def climate_opt(multiple=True, required=True):
    return click.option(
        "--climate",
        "climate",
        multiple=multiple,
        required=required,
        type=click.Path(exists=True),
        help="Climate grid: multi-band GeoTIFF, single-band GeoTIFFs (repeat the option), or NetCDF.",
    )


positive_float = _positive_float
csv_list = _csv_list
