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
    return click.option(flag, type=click.Path(dir_okay=False), multiple=True, required=flag != "--tmean",
                        help=f"12-month stack for {flag[2:]} (12-band GeoTIFF or NetCDF with 12 months), or a "
                             "monthly CF-NetCDF series: repeat the option for several files or give a quoted "
                             "glob pattern.")


def period_opt(func):
    """``--period FIRST-LAST``: the years whose monthly climatology is taken from a series."""
    return click.option("--period", default=None, metavar="FIRST-LAST",
                        help="Years of a monthly series to average into the climatology, e.g. 1991-2020 "
                             "(default: every year the files hold).")(func)


@click.command()
@monthly_path("--tmin")
@monthly_path("--tmax")
@monthly_path("--prec")
@monthly_path("--tmean")
@output_opt(required=True, help="Output stack of BIO layers (GeoTIFF .tif or NetCDF .nc).")
@period_opt
@variables_opt
@convention_options
@overwrite_opt
def bioclim(tmin, tmax, prec, tmean, out, period, variables, gdd_base, wrap, ddof, cv_plus_one, overwrite):
    """Compute the 19 bioclimatic variables from monthly grids.

    Reads 12-month stacks of minimum and maximum temperature (degC) and precipitation
    (mm per month) on one grid and writes BIO1 ... BIO19 as defined by O'Donnell & Ignizio
    (2012, USGS Data Series 691), plus growing degree days (GDD5 by default), as one
    stack whose band descriptions are the short names. Temperatures in kelvin are
    converted; other units, a stack without 12 months, grids that differ, tmin > tmax or
    negative precipitation stop the command before anything is written.

    Monthly CF-NetCDF series from climate-model archives are read directly: each input
    may be several files (repeat the option, or a quoted glob pattern) combined by their
    time coordinates, in any CF calendar (noleap, 360_day ...). --period takes the mean
    per calendar month over those years (temperatures weighted by days per month);
    variables are found by name (tasmin, tasmax, pr ...) or CF standard_name, kelvin
    becomes degC and kg m-2 s-1 becomes mm per month with each month's days in the
    series' calendar. Mixed calendars, a period the files do not cover, missing months
    and a variable without units stop the command.

    \b
    Examples:
      $ envelope bioclim --tmin tmin.tif --tmax tmax.tif --prec prec.tif --out bio.tif
      $ envelope bioclim --tmin t.nc --tmax T.nc --prec p.nc --out bio.tif --variables BIO1,BIO12,GDD5
      $ envelope bioclim --tmin 'tasmin_*.nc' --tmax 'tasmax_*.nc' --prec 'pr_*.nc' \\
          --period 1991-2020 --out bio_1991_2020.tif
      $ envelope bioclim --tmin tasmin_1991-2000.nc --tmin tasmin_2001-2010.nc --tmin tasmin_2011-2020.nc \\
          --tmax 'tasmax_*.nc' --prec 'pr_*.nc' --period 1991-2020 --out bio.tif
    """
    from envelope.io.atomic import check_distinct
    from envelope.pipelines.climate import write_bioclim

    check_distinct({"--out": out}, {"--tmin": tmin, "--tmax": tmax, "--prec": prec, "--tmean": tmean})
    stack = write_bioclim({"tmin": list(tmin), "tmax": list(tmax), "prec": list(prec), "tmean": list(tmean)}, out,
                          variables=variables, gdd_base=gdd_base, wrap=wrap, ddof=int(ddof),
                          cv_plus_one=cv_plus_one, period=period, overwrite=overwrite)
    names = list(stack["variable"].values)
    click.echo(f"Wrote {len(names)} layers ({', '.join(names)}) to {out}")
