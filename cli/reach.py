"""`envelope reach`: which climatic gains the species can reach, given habitat and dispersal."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, seed_opt


def _distance(ctx, param, value):
    """'3' -> (3, None); '2:5' -> (2, (2, 5)) for per-replicate draws."""
    try:
        if ":" in value:
            lo, hi = (float(v) for v in value.split(":"))
            return (lo + hi) / 2.0, (lo, hi)
        return float(value), None
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected a distance in km, or LOW:HIGH", ctx=ctx, param=param) from None


def _year_list(ctx, param, value):
    try:
        return [float(v) for v in value.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected comma-separated years, e.g. 2050,2080",
                                 ctx=ctx, param=param) from None


@click.command()
@click.option("--now", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Suitability raster today (from `envelope project`).")
@click.option("--future", "futures", required=True, multiple=True, type=click.Path(exists=True, dir_okay=False),
              help="Suitability raster at a horizon; repeat for several horizons (one year each in --years).")
@click.option("--habitat", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Habitat fraction 0–1, or land-cover classes with --classes.")
@click.option("--classes", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Land-cover class table (CSV code,name,habitat_quality): --habitat is then land cover.")
@click.option("--align-habitat", is_flag=True, help="Resample a coarser or misaligned habitat map onto the grid.")
@click.option("--start", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Occupied cells today: records (CSV/TSV) or a raster (occupied where > 0.5).")
@click.option("--kernel", type=click.Choice(["exponential", "gaussian", "2dt"]), default="exponential",
              show_default=True, help="Dispersal kernel family.")
@click.option("--mean-distance-km", required=True, callback=_distance, metavar="KM|LOW:HIGH",
              help="Mean dispersal distance per step; LOW:HIGH draws one per replicate (stochastic mode).")
@click.option("--shape", type=float, default=None, help="2Dt shape parameter (> 1.5 for a finite mean).")
@click.option("--years", required=True, callback=_year_list, metavar="Y1,Y2",
              help="Horizon year of each --future, in the same order.")
@click.option("--now-year", type=float, default=2020.0, show_default=True, help="Year of the --now map.")
@click.option("--step-years", type=float, default=1.0, show_default=True, help="Years per dispersal step.")
@click.option("--rate", type=float, default=1.0, show_default=True, help="Colonisation rate R per step.")
@click.option("--threshold", type=float, default=None, help="Suitability threshold (default: the rasters' tags).")
@click.option("--persistence-years", type=float, default=0.0, show_default=True,
              help="Years an occupied cell survives unsuitable climate before it is lost.")
@click.option("--replicates", type=click.IntRange(min=0), default=0, show_default=True,
              help="0: deterministic expected occupancy; N: N stochastic replicates.")
@seed_opt
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Reach-class raster to write.")
@click.option("--summary", required=True, type=click.Path(dir_okay=False), help="Summary JSON to write.")
@click.option("--front", type=click.Path(dir_okay=False), default=None, help="Expansion front GeoJSON (0.5 contours).")
@click.option("--arrival", type=click.Path(dir_okay=False), default=None, help="Arrival-year raster.")
@overwrite_opt
def reach(now, futures, habitat, classes, align_habitat, start, kernel, mean_distance_km, shape, years, now_year,
          step_years, rate, threshold, persistence_years, replicates, seed, out, summary, front, arrival, overwrite):
    """Habitat-gated dispersal through the transient climate.

    Starting from the cells occupied today, each step disperses propagules with the
    kernel (FFT convolution), colonises empty cells with probability
    1 − exp(−R · pressure · habitat · suitable), and loses occupied cells whose climate
    has become unsuitable. Suitability between the given maps is interpolated linearly in
    time. Newly suitable cells are classed as reached, not reached (dispersal-limited) or
    without habitat.

    \b
    Examples:
      $ envelope reach --now now.tif --future high_2050.tif --future high_2080.tif \\
            --years 2050,2080 --habitat habitat.tif --start records.csv \\
            --kernel exponential --mean-distance-km 2 --out reach.tif --summary reach.json
      $ envelope reach --now now.tif --future f2080.tif --years 2080 --habitat landcover.tif \\
            --classes classes.csv --start occupied.tif --kernel 2dt --shape 3 \\
            --mean-distance-km 1:4 --replicates 50 --seed 1 --front front.geojson \\
            --arrival arrival.tif --out reach.tif --summary reach.json
    """
    from rich.console import Console
    from rich.progress import Progress

    from envelope.errors import InputError
    from envelope.grids import check_same_grid
    from envelope.habitat import load_habitat
    from envelope.io.atomic import check_writable
    from envelope.io.rasters import open_layer, read_tags
    from envelope.reach import (DispersalSettings, load_start, simulate_reach, threshold_from_tags,
                                write_reach_outputs)

    for p in (out, summary, front, arrival):
        if p:
            check_writable(p, overwrite)
    if len(years) != len(futures):
        raise InputError(f"--years gives {len(years)} year(s) for {len(futures)} --future map(s); give one per map")
    mean_km, mean_range = mean_distance_km
    settings = DispersalSettings(kernel=kernel, mean_distance_km=mean_km, shape=shape,
                                 mean_distance_range_km=mean_range if replicates else None)
    now_layer = open_layer(now)
    future_layers = []
    for year, path in zip(years, futures):
        layer = open_layer(path)
        check_same_grid(now_layer, layer, ref_name=f"--now {now}", other_name=f"--future {path}")
        future_layers.append((year, layer))
    thr = threshold_from_tags({now: read_tags(now), **{p: read_tags(p) for p in futures}}, threshold)
    hab = load_habitat(habitat, now_layer, classes=classes, align=align_habitat)
    start_arr, start_info = load_start(start, now_layer)

    console = Console(stderr=True)
    with Progress(console=console, transient=True) as bar:
        task = bar.add_task("dispersal steps", total=None)
        result = simulate_reach(now_layer, future_layers, hab, start_arr, threshold=thr, settings=settings,
                                now_year=now_year, step_years=step_years, rate=rate,
                                persistence_years=persistence_years, replicates=replicates, seed=seed,
                                progress=lambda i, n: bar.update(task, completed=i, total=n))
    result.summary["start"] = start_info
    result.summary["inputs"] = {"now": now, "futures": list(futures), "habitat": habitat, "classes": classes}
    written = write_reach_outputs(result, out, summary, front=front, arrival=arrival, overwrite=overwrite,
                                  tags={"software": "envelope"})
    _print(result.summary, written)


def _print(summary, written):
    from rich.console import Console
    from rich.table import Table

    console = Console()
    t = Table(title=f"Reach by {summary['horizon_years'][-1]:g} ({summary['mode']}, {summary['kernel']} kernel, "
                    f"mean {summary['mean_distance_km']:g} km per {summary['step_years']:g} y)")
    t.add_column("class")
    t.add_column("area km²", justify="right")
    for key, value in summary["area_km2"].items():
        t.add_row(key.replace("_", " "), f"{value:,.0f}")
    console.print(t)
    share = summary["reached_share_of_gain"]
    console.print(f"reached share of gain: {'–' if share is None else f'{share:.1%}'}; "
                  f"front advance {_km(summary['front_advance_km'])}, "
                  f"{_km(summary['spread_rate_km_per_decade'])} per decade")
    for key, path in written.items():
        console.print(f"{key}: {path}")


def _km(v):
    return "–" if v is None else f"{v:.1f} km"
