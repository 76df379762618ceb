"""`envelope bioclim`: the 19 bioclimatic variables (and growing degree days) from 12-month grids."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, output_opt, variables_opt


def _finite_temperature(ctx, param, value):
    import math

    if value is not None and not math.isfinite(value):
        raise click.BadParameter(f"{value!r}: expected a finite temperature in degC, e.g. 5", ctx=ctx, param=param)
    return value


def convention_options(func):
    """The bioclim conventions, shared with ``envelope delta --bioclim``."""
    options = [
        click.option("--gdd-base", type=float, default=5.0, show_default=True, metavar="DEGC", callback=_finite_temperature,
                     help="Base temperature of growing degree days (GDD<base> layer)."),
        click.option("--wrap/--no-wrap", default=True, show_default=True,
                     help="Let quarters wrap round the year end (NDJ, DJF)."),
        click.option("--ddof", type=click.Choice(["0", "1"]), default="0", show_default=True,
                     help="SD denominator in BIO4/BIO15: 0 = n (12 months as the whole year), 1 = n-1."),
        click.option("--cv-plus-one", is_flag=True, help="Compute BIO15 on precipitation + 1 mm."),
    ]
    for option in reversed(options):
        func = option(func)
    return func


def monthly_path(flag):
    return click.option(flag, type=click.Path(dir_okay=False), required=flag != "--tmean",
                        help=f"12-month stack for {flag[2:]} (12-band GeoTIFF or NetCDF with 12 months).")


@click.command()
@monthly_path("--tmin")
@monthly_path("--tmax")
@monthly_path("--prec")
@monthly_path("--tmean")
@output_opt(required=True, help="Output stack of BIO layers (GeoTIFF .tif or NetCDF .nc).")
@variables_opt
@convention_options
@overwrite_opt
def bioclim(tmin, tmax, prec, tmean, out, variables, gdd_base, wrap, ddof, cv_plus_one, overwrite):
    """Compute the 19 bioclimatic variables from monthly grids.

    Reads 12-month stacks of minimum and maximum temperature (degC) and precipitation
    (mm per month) on one grid and writes BIO1 ... BIO19 as defined by O'Donnell & Ignizio
    (2012, USGS Data Series 691), plus growing degree days (GDD5 by default), as one
    stack whose band descriptions are the short names. Temperatures in kelvin are
    converted; other units, a stack without 12 months, grids that differ, tmin > tmax or
    negative precipitation stop the command before anything is written.

    \b
    Examples:
      $ envelope bioclim --tmin tmin.tif --tmax tmax.tif --prec prec.tif --out bio.tif
      $ envelope bioclim --tmin t.nc --tmax T.nc --prec p.nc --out bio.tif --variables BIO1,BIO12,GDD5
    """
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.climate import write_bioclim

    check_distinct({"--out": out}, {"--tmin": tmin, "--tmax": tmax, "--prec": prec, "--tmean": tmean})
    stack = write_bioclim({"tmin": tmin, "tmax": tmax, "prec": prec, "tmean": tmean}, out,
                          variables=variables, gdd_base=gdd_base, wrap=wrap, ddof=int(ddof),
                          cv_plus_one=cv_plus_one, overwrite=overwrite)
    names = list(stack["variable"].values)
    click.echo(f"Wrote {len(names)} layers ({', '.join(names)}) to {out}")
