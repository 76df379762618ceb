"""`envelope bioclim`: the 19 bioclimatic variables (and growing degree days) from 12-month grids."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, output_opt, variables_opt


def convention_options(func):
    """The bioclim conventions, shared with ``envelope delta --bioclim``."""
    options = [
        click.option("--gdd-base", type=float, default=5.0, show_default=True, metavar="DEGC",
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


def write_bioclim(paths: dict, out, *, variables=None, gdd_base=5.0, wrap=True, ddof=0, cv_plus_one=False,
                  overwrite=False):
    """Open the monthly files in ``paths`` (tmin, tmax, prec[, tmean]), check them, write BIO layers to ``out``.

    Returns the lazy result that was written (for reporting).
    """
    from envelope.bioclim import bioclim as compute_bioclim
    from envelope.bioclim import check_monthly, check_monthly_grids
    from envelope.io.atomic import check_writable
    from envelope.io.monthly import PRECIPITATION, TEMPERATURE, open_monthly
    from envelope.io.writing import write_raster

    check_writable(out, overwrite)
    arrays = {role: open_monthly(p, name=role, units=PRECIPITATION if role == "prec" else TEMPERATURE)
              for role, p in paths.items() if p is not None}
    names = {role: str(p) for role, p in paths.items() if p is not None}
    check_monthly_grids({names[r]: a for r, a in arrays.items()})
    check_monthly(arrays["tmin"], arrays["tmax"], arrays["prec"], arrays.get("tmean"), names=names)
    stack = compute_bioclim(arrays["tmin"], arrays["tmax"], arrays["prec"], arrays.get("tmean"),
                            variables=variables, wrap=wrap, ddof=int(ddof), cv_plus_one=cv_plus_one,
                            gdd_base=gdd_base)
    tags = {key: str(value) for key, value in stack.attrs.items()}
    tags["long_names"] = dict(zip(map(str, stack["variable"].values), map(str, stack["long_name"].values)))
    tags.update({f"input_{role}": str(p) for role, p in names.items()})
    write_raster(stack, out, overwrite=overwrite, tags=tags)
    return stack


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
    stack = write_bioclim({"tmin": tmin, "tmax": tmax, "prec": prec, "tmean": tmean}, out,
                          variables=variables, gdd_base=gdd_base, wrap=wrap, ddof=int(ddof),
                          cv_plus_one=cv_plus_one, overwrite=overwrite)
    names = list(stack["variable"].values)
    click.echo(f"Wrote {len(names)} layers ({', '.join(names)}) to {out}")
