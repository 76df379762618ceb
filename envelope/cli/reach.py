"""`envelope reach`: which climatic gains the species can reach, given habitat and dispersal."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, polygons_opt, reach_inputs_opt, region_opt, seed_opt


@click.command()
@reach_inputs_opt()
@click.option("--replicates", type=click.IntRange(min=0), default=0, show_default=True,
              help="0: deterministic expected occupancy; N: N stochastic replicates.")
@seed_opt
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Reach-class raster to write.")
@click.option("--summary", required=True, type=click.Path(dir_okay=False), help="Summary JSON to write.")
@click.option("--front", type=click.Path(dir_okay=False), default=None, help="Expansion front GeoJSON (0.5 contours).")
@click.option("--arrival", type=click.Path(dir_okay=False), default=None, help="Arrival-year raster.")
@click.option("--probability", type=click.Path(dir_okay=False), default=None,
              help="Probability-of-reach raster: the share of runs (replicates) occupying each cell at the horizon.")
@polygons_opt
@region_opt(help="Study region (GeoPackage, GeoJSON or shapefile, any CRS): spread only through cells inside it.")
@overwrite_opt
def reach(now, futures, habitat, classes, align_habitat, start, species, kernel, mean_distance_km, shape, years, now_year,
          step_years, rate, threshold, persistence_years, replicates, seed, out, summary, front, arrival, probability,
          polygons, region, overwrite):
    """Habitat-gated dispersal through the transient climate.

    Starting from the cells occupied today, each step disperses propagules with the
    kernel (FFT convolution), colonises empty cells with probability
    1 − exp(−R · pressure · habitat · suitable), and loses occupied cells whose climate
    has become unsuitable. Suitability between the given maps is interpolated linearly in
    time. Newly suitable cells are classed as reached, not reached (dispersal-limited) or
    without habitat. With --replicates the summary's areas, reached share and front
    advance are medians over the replicates, with their 5, 50 and 95 % values under
    `intervals`; --probability writes the share of replicates reaching each cell.

    \b
    Examples:
      $ envelope reach --now now.tif --future high_2050.tif --future high_2080.tif \\
            --years 2050,2080 --habitat habitat.tif --start records.csv \\
            --kernel exponential --mean-distance-km 2 --out reach.tif --summary reach.json
      $ envelope reach --now now.tif --future f2080.tif --years 2080 --habitat landcover.tif \\
            --classes classes.csv --start occupied.tif --kernel 2dt --shape 3 \\
            --mean-distance-km 1:4 --replicates 50 --seed 1 --front front.geojson \\
            --arrival arrival.tif --probability reach_probability.tif --out reach.tif --summary reach.json
      $ envelope reach --now now.tif --future f2080.tif --years 2080 --habitat habitat.tif \\
            --start download.csv --species "Aus bus" --mean-distance-km 2 --region park.gpkg \\
            --out reach.tif --summary reach.json --polygons reach.gpkg
    """
    from rich.console import Console
    from rich.progress import Progress

    from envelope.errors import InputError
    from envelope.io.atomic import check_distinct, check_writable
    from envelope.pipelines.inputs import build_reach_inputs
    from envelope.pipelines.reach import as_run_set, run_reach, write_reach_outputs

    check_distinct({"--out": out, "--summary": summary, "--front": front, "--arrival": arrival,
                    "--probability": probability, "--polygons": polygons},
                   {"--now": now, "--future": futures, "--habitat": habitat, "--start": start, "--classes": classes})
    for p in (out, summary, front, arrival, probability, polygons):
        if p:
            check_writable(p, overwrite)
    if len(years) != len(futures):
        raise InputError(f"--years gives {len(years)} year(s) for {len(futures)} --future map(s); give one per map")
    mean_km, mean_range = mean_distance_km
    if mean_range is not None and not replicates:
        lo, hi = mean_range
        raise InputError(f"--mean-distance-km {lo:g}:{hi:g} draws one distance per stochastic replicate, but "
                         "--replicates is 0 (deterministic); add --replicates N, or give one distance")
    settings = {"kernel": kernel, "mean_distance_km": mean_km, "shape": shape,
                "mean_distance_range_km": mean_range if replicates else None}
    inputs = build_reach_inputs(now, {None: list(zip(years, futures))}, habitat, start, settings=settings,
                                classes=classes, align_habitat=align_habitat, threshold=threshold,
                                now_year=now_year, step_years=step_years, rate=rate,
                                persistence_years=persistence_years, region=region,
                                start_options=None if species is None else {"species": species})
    console = Console(stderr=True)
    with Progress(console=console, transient=True) as bar:
        task = bar.add_task("dispersal steps", total=None)
        result = run_reach(inputs, replicates=replicates, seed=seed,
                           progress=lambda i, n: bar.update(task, completed=i, total=n))
    result = as_run_set(result)
    written = write_reach_outputs(result, out, summary, front=front, arrival=arrival, probability=probability,
                                  overwrite=overwrite, tags={"software": "envelope"}, polygons=polygons)
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
    frag = summary.get("fragmentation_by_latitude")
    if frag:
        console.print(f"habitat fragmentation by latitude: {frag['statement']}")
    for key, path in written.items():
        console.print(f"{key}: {path}")


def _km(v):
    return "–" if v is None else f"{v:.1f} km"
