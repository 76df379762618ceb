"""Catalogue of shared options: each defined once, re-used by every command that needs it.

Used by:
  output_opt     -- fit, project, change, reach, bioclim, delta
  overwrite_opt  -- every command that writes files
  scheduler_opt  -- project, reach, run
  climate_opt    -- records, fit, project, evaluate (--climate [NAME=]PATH[:BAND], repeatable, and --layers CSV)
  seed_opt       -- fit, reach
  json_opt       -- info, inspect
  reach_inputs_opt -- reach, target (optional there: --study can supply them)
  record_years_opt -- records, fit (--record-years; the old --years still works, with a warning)
  species_opt, absences_opt -- records, fit, evaluate
  region_opt     -- fit, project, reach
  polygons_opt   -- change, reach
"""

from __future__ import annotations

import functools
import re

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


def _record_years(ctx, param, value):
    """'1990-2020' -> (1990, 2020); '2001' -> (2001, 2001)."""
    if value is None:
        return None
    match = re.fullmatch(r"\s*(\d{1,4})\s*(?:[-:/]\s*(\d{1,4})\s*)?", value)
    if not match:
        raise click.BadParameter(f"{value!r}; expected FIRST-LAST, e.g. 1990-2020", ctx=ctx, param=param)
    first = int(match.group(1))
    last = int(match.group(2)) if match.group(2) else first
    if first > last:
        raise click.BadParameter(f"{value!r}: first year is after last year", ctx=ctx, param=param)
    return first, last


def _old_record_years(ctx, param, value):
    parsed = _record_years(ctx, param, value)
    if parsed is not None:
        click.echo("Warning: --years is deprecated for the record-year filter; use --record-years "
                   "(--years names horizon years in reach and target)", err=True)
        ctx.meta["old_record_years"] = parsed
    return parsed


def record_years_opt(f):
    """--record-years FIRST-LAST (and the deprecated spelling --years), passed as ``record_years``."""
    f = click.option("--years", "old_record_years", default=None, callback=_old_record_years, hidden=True,
                     expose_value=False, metavar="FIRST-LAST", help="Deprecated spelling of --record-years.")(f)
    return click.option("--record-years", "record_years", default=None, callback=_record_years, metavar="FIRST-LAST",
                        help="Keep records from these years (inclusive), e.g. 1990-2020; records without a year "
                             "are dropped.")(f)


def record_years_value(record_years):
    """The record-year filter given as --record-years or, deprecated, as --years."""
    if record_years is not None:
        return record_years
    return click.get_current_context().meta.get("old_record_years")


species_opt = click.option(
    "--species", default=None, metavar="NAME",
    help="Keep the records of this taxon (scientificName, acceptedScientificName or species; case and "
         "authorship ignored). Needed when the records hold several taxa.")

cv_opt = click.option(
    "--cv", "cv", type=click.Choice(["block", "random"]), default="block", show_default=True,
    help="Spatial block CV, or random K-fold for comparison.")

features_opt = click.option(
    "--features", default="cv", show_default=True, metavar="cv|CLASS,...",
    help="Feature classes of the point-process model: cv (choose linear,quadratic / +hinge / "
         "+product by the spatial CV, one-standard-error rule) or a fixed list, e.g. "
         "linear,quadratic,hinge. Other methods ignore it.")

absences_opt = click.option(
    "--absences", is_flag=True,
    help="Keep records whose occurrenceStatus is absent, as absences (survey data).")

polygons_opt = click.option(
    "--polygons", type=click.Path(dir_okay=False), default=None, metavar="FILE.gpkg|FILE.geojson",
    help="Also write one dissolved polygon per class (fields class, name, area_km2 = true area) in the "
         "grid's CRS, for planning GIS; the format follows the suffix.")


def region_opt(help="Study region: GeoPackage, GeoJSON or shapefile of polygons, in any CRS."):
    return click.option("--region", type=click.Path(exists=True, dir_okay=False), default=None, metavar="FILE",
                        help=help)


overwrite_opt = click.option("--overwrite", is_flag=True, help="Replace output files that already exist.")

json_opt = click.option("--json", "as_json", is_flag=True, help="Print JSON instead of a table.")

# 0 .. 2**32 - 1: what numpy's SeedSequence and scikit-learn's random_state both take
seed_opt = click.option("--seed", type=click.IntRange(min=0, max=2**32 - 1), default=0, show_default=True,
                        help="Random seed, 0 to 4294967295 (runs are reproducible).")

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
    """--climate [NAME=]PATH[:BAND] (repeatable) and --layers LAYERS.csv, passed as one list ``climate``.

    The list holds paths and named layers (see ``envelope.pipelines.inputs.climate_sources``);
    ``required`` asks for at least one of the two options.
    """
    def decorate(f):
        @functools.wraps(f)
        def wrapper(*args, climate=(), layers=None, **kwargs):
            from envelope.pipelines.inputs import climate_sources

            if required and not climate and not layers:
                raise click.UsageError("give the climate grid: --climate PATH or NAME=PATH[:BAND] (repeat it), "
                                       "or --layers LAYERS.csv")
            return f(*args, climate=climate_sources(climate, layers), **kwargs)

        wrapper = click.option(
            "--layers", "layers", type=click.Path(exists=True, dir_okay=False), default=None, metavar="LAYERS.csv",
            help="Layer table naming each climate variable: CSV with columns name,path[,band].")(wrapper)
        return click.option(
            "--climate", "climate", multiple=True, metavar="[NAME=]PATH[:BAND]",
            help="Climate grid: multi-band GeoTIFF, single-band GeoTIFFs or NetCDF (repeat the option); "
                 "NAME=PATH names the variable a file holds, NAME=PATH:BAND one band of a multi-band file.")(wrapper)

    return decorate


positive_float = _positive_float
csv_list = _csv_list


def _distance(ctx, param, value):
    """'3' -> (3, None); '2:5' -> (2, (2, 5)) for per-replicate draws; None stays None."""
    if value is None:
        return None
    try:
        if ":" in value:
            lo, hi = (float(v) for v in value.split(":"))
            parsed = (lo + hi) / 2.0, (lo, hi)
        else:
            lo = hi = float(value)
            parsed = lo, None
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected a distance in km, or LOW:HIGH", ctx=ctx, param=param) from None
    if not (lo > 0 and hi >= lo and hi < float("inf")):
        raise click.BadParameter(f"{value!r}: a mean dispersal distance must be > 0 km (LOW:HIGH with LOW <= HIGH)",
                                 ctx=ctx, param=param)
    return parsed


def _year_list(ctx, param, value):
    if value is None:
        return None
    try:
        return [float(v) for v in value.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected comma-separated years, e.g. 2050,2080",
                                 ctx=ctx, param=param) from None


def reach_inputs_opt(distance_metavar="KM|LOW:HIGH",
                     distance_help="Mean dispersal distance per step; LOW:HIGH draws one per replicate "
                                   "(stochastic mode).", required=True):
    """The inputs of the reach model, shared by `envelope reach` and `envelope target`.

    ``required=False`` leaves --now, --future, --years, --habitat, --start and
    --mean-distance-km optional, for a command that can take them from elsewhere (a study
    run) and checks them itself.
    """
    options = [
        click.option("--now", required=required, type=click.Path(exists=True, dir_okay=False),
                     help="Suitability raster today (from `envelope project`)."),
        click.option("--future", "futures", required=required, multiple=True,
                     type=click.Path(exists=True, dir_okay=False),
                     help="Suitability raster at a horizon; repeat for several horizons (one year each in --years)."),
        click.option("--habitat", required=required, type=click.Path(exists=True, dir_okay=False),
                     help="Habitat fraction 0–1, or land-cover classes with --classes."),
        click.option("--classes", type=click.Path(exists=True, dir_okay=False), default=None,
                     help="Land-cover class table (CSV code,name,habitat_quality): --habitat is then land cover."),
        click.option("--align-habitat", is_flag=True, help="Resample a coarser or misaligned habitat map onto the grid."),
        click.option("--start", required=required, type=click.Path(exists=True, dir_okay=False),
                     help="Occupied cells today: records (CSV/TSV) or a raster (occupied where > 0.5)."),
        click.option("--species", default=None, metavar="NAME",
                     help="With a records --start holding several taxa: start from this taxon's records "
                          "(matched as by `envelope fit --species`)."),
        click.option("--kernel", type=click.Choice(["exponential", "gaussian", "2dt"]), default="exponential",
                     show_default=True, help="Dispersal kernel family."),
        click.option("--mean-distance-km", required=required, callback=_distance, metavar=distance_metavar,
                     help=distance_help),
        click.option("--shape", type=float, default=None, help="2Dt shape parameter (> 1.5 for a finite mean)."),
        click.option("--years", required=required, callback=_year_list, metavar="Y1,Y2",
                     help="Horizon year of each --future, in the same order."),
        click.option("--now-year", type=float, default=2020.0, show_default=True, help="Year of the --now map."),
        click.option("--step-years", type=float, default=1.0, show_default=True, help="Years per dispersal step."),
        click.option("--rate", type=float, default=1.0, show_default=True, callback=_positive_float,
                     help="Colonisation rate R per step."),
        click.option("--threshold", type=float, default=None, help="Suitability threshold (default: the rasters' tags)."),
        click.option("--persistence-years", type=float, default=0.0, show_default=True,
                     help="Years an occupied cell survives unsuitable climate before it is lost.")
    ]

    def decorate(f):
        for option in reversed(options):
            f = option(f)
        return f

    return decorate
