"""`envelope target`: rank candidate restoration patches by the reachable range they add."""

from __future__ import annotations

import click

from envelope.cli.options import overwrite_opt, reach_inputs_opt, seed_opt


def _class_codes(ctx, param, value):
    if value is None:
        return None
    try:
        codes = [int(v) for v in value.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter(f"{value!r}: expected comma-separated integer class codes, e.g. 4,5",
                                 ctx=ctx, param=param) from None
    if not codes:
        raise click.BadParameter(f"{value!r} holds no class code; give e.g. 4,5", ctx=ctx, param=param)
    return codes


# the reach-model options a study run supplies; giving one together with --study is an error
_STUDY_SUPPLIED = ("now", "futures", "years", "scenario_table", "habitat", "classes", "align_habitat", "start",
                   "species",
                   "kernel", "mean_distance_km", "shape", "now_year", "step_years", "rate", "threshold",
                   "persistence_years")


@click.command()
@reach_inputs_opt(distance_metavar="KM", distance_help="Mean dispersal distance per step (deterministic runs: one value).",
                  required=False)
@click.option("--scenarios", "scenario_table", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Suitability table (CSV name,pathway,climate_model,horizon,path, as `envelope project "
                   "--scenarios` writes it): one climate path per pathway × climate model. Instead of --future/--years.")
@click.option("--study", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Study file of a finished `envelope run` (with --run-dir): today's map, each pathway's "
                   "ensemble-mean futures, habitat, start and dispersal come from the run.")
@click.option("--run-dir", type=click.Path(exists=True, file_okay=False), default=None,
              help="Run folder of --study (from `envelope run STUDY --out RUN_DIR`).")
@click.option("--objective", type=click.Choice(["mean", "worst"]), default="mean", show_default=True,
              help="With several climate paths: the mean added reachable area over paths, or its minimum.")
@click.option("--candidates", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Raster of cells that could become habitat (nonzero = candidate), or a land-cover raster "
                   "with --candidate-classes.")
@click.option("--candidate-classes", callback=_class_codes, metavar="C1,C2", default=None,
              help="Land-cover codes that could be restored: --candidates is then a land-cover raster and its "
                   "cells of these classes are the candidates.")
@click.option("--max-patch-km2", type=float, default=None, metavar="KM2",
              help="Cut connected candidate areas larger than this into pieces of at most this area "
                   "(default: each connected area is one patch).")
@click.option("--budget-km2", required=True, type=float, help="Total area of patches that may be restored (km²).")
@click.option("--cost", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Cost per cell; patches are ranked by gain per unit cost (default: per km²).")
@click.option("--budget-cost", type=float, default=None, help="Total cost allowed (with --cost), besides the area.")
@click.option("--quality", default="1", show_default=True, metavar="Q|RASTER",
              help="Habitat quality a restored cell reaches, in (0, 1]: one number, or a raster of it per cell "
                   "(habitat becomes max(current, Q)).")
@click.option("--random-draws", type=click.IntRange(min=1), default=10, show_default=True,
              help="Random patch orders averaged for the random baseline.")
@click.option("--max-evaluations", type=click.IntRange(min=1), default=2000, show_default=True,
              help="Cap on new patch sets evaluated per greedy pass (each one reach run per climate path).")
@seed_opt
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Priority-rank raster to write.")
@click.option("--table", "table", required=True, type=click.Path(dir_okay=False), help="Chosen-patch table (CSV).")
@click.option("--summary", required=True, type=click.Path(dir_okay=False), help="Summary JSON to write.")
@overwrite_opt
@click.pass_context
def target(ctx, now, futures, habitat, classes, align_habitat, start, species, kernel, mean_distance_km, shape, years,
           now_year, step_years, rate, threshold, persistence_years, scenario_table, study, run_dir, objective,
           candidates, candidate_classes, max_patch_km2, budget_km2, cost, budget_cost, quality, random_draws,
           max_evaluations, seed, out, table,
           summary, overwrite):
    """Rank candidate restoration patches by the reachable range they add by the horizon.

    Candidate cells (nonzero cells of --candidates, or its cells of the restorable
    --candidate-classes of a land-cover raster) are grouped into 4-connected patches, cut
    to at most --max-patch-km2 when given. Patches are chosen by lazy
    greedy (CELF): each step restores the patch with the largest gain in newly suitable
    area reached by the horizon (deterministic `envelope reach` runs) per unit cost,
    until the area budget (and --budget-cost) is spent. Random and nearest-first patch
    choices of the same budget are reported for comparison.

    The climate comes as one path (--now, --future, --years), as several (--now and a
    suitability table with --scenarios: one path per pathway × climate model), or from a
    finished study run (--study, --run-dir: one path per pathway, the climate models'
    ensemble mean). With several paths the gain is their mean, or with --objective worst
    their minimum.

    \b
    Examples:
      $ envelope target --now now.tif --future f2080.tif --years 2080 --habitat habitat.tif \\
            --start occupied.tif --mean-distance-km 2 --candidates restorable.tif \\
            --budget-km2 500 --out priority.tif --table priority.csv --summary target.json
      $ envelope target --now now.tif --scenarios proj/suitability_table.csv --habitat habitat.tif \\
            --start records.csv --mean-distance-km 5 --step-years 5 --rate 4 --objective worst \\
            --candidates restorable.tif --quality quality.tif --budget-km2 300 \\
            --out priority.tif --table priority.csv --summary target.json
      $ envelope target --study sample_grids/study.toml --run-dir demo-run --candidates restorable.tif \\
            --budget-km2 300 --out priority.tif --table priority.csv --summary target.json
      $ envelope target --study sample_grids/study.toml --run-dir demo-run \\
            --candidates sample_grids/demo/landcover.tif --candidate-classes 4 --max-patch-km2 400 \\
            --budget-km2 1500 --out priority.tif --table priority.csv --summary target.json
    """
    from rich.console import Console

    from envelope.errors import InputError
    from envelope.io.atomic import check_distinct, check_writable
    from envelope.pipelines.target import choose_patches, reach_model_from_options, write_target_outputs

    check_distinct({"--out": out, "--table": table, "--summary": summary},
                   {"--now": now, "--future": futures, "--habitat": habitat, "--start": start, "--candidates": candidates,
                    "--cost": cost, "--scenarios": scenario_table, "--study": study, "--classes": classes,
                    "--quality": quality if quality and not _is_number(quality) else None})
    for p in (out, table, summary):
        check_writable(p, overwrite)
    if not budget_km2 > 0:
        raise InputError(f"--budget-km2 must be > 0, got {budget_km2:g}")
    if budget_cost is not None and cost is None:
        raise InputError("--budget-cost needs --cost (a cost raster)")
    if study or run_dir:
        if not (study and run_dir):
            raise InputError("--study and --run-dir go together: the study file and the folder of its finished run")
        for name in _STUDY_SUPPLIED:
            if ctx.get_parameter_source(name) not in (click.core.ParameterSource.DEFAULT, None):
                flag = "--" + {"futures": "future", "scenario_table": "scenarios"}.get(name, name).replace("_", "-")
                raise InputError(f"{flag}: the reach model comes from the study run with --study; leave {flag} out")
        model = _from_study(study, run_dir)
    else:
        model = reach_model_from_options(now, futures, years, scenario_table, habitat, classes, align_habitat, start, kernel,
                              mean_distance_km, shape, threshold, now_year, step_years, rate, persistence_years,
                              species=species)
    with Console(stderr=True).status("choosing patches (deterministic reach runs)"):
        result = choose_patches(model, candidates, candidate_classes=candidate_classes, cost=cost, quality=quality,
                                budget_km2=budget_km2, budget_cost=budget_cost, objective=objective,
                                random_draws=random_draws, seed=seed, max_evaluations=max_evaluations,
                                max_patch_km2=max_patch_km2)
    written = write_target_outputs(result, out, table, summary, overwrite=overwrite, tags={"software": "envelope"})
    _print(result, written)


def _is_number(text) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _from_study(study_file, run_dir):
    """The reach model of a finished study run: each pathway's ensemble-mean futures."""
    from envelope.study.layout import reach_inputs_from_run
    from envelope.study.schema import load_study

    study = load_study(study_file)
    model = reach_inputs_from_run(study, run_dir)
    model.inputs.update({"study": study_file, "run_dir": run_dir})
    return model


def _print(result, written):
    from rich.console import Console
    from rich.table import Table

    s = result.summary
    console = Console()
    t = Table(title=f"Restoration priorities ({s['n_chosen']} of {s['n_candidate_patches']} patches, "
                    f"budget {s['budget_km2']:,.0f} km²)")
    for col in ("rank", "patch", "area km²", "adds km²", "per km²"):
        t.add_column(col, justify="right")
    for row in result.table.head(15).itertuples():
        t.add_row(str(row.rank), str(row.patch_id), f"{row.area_km2:,.1f}", f"{row.added_reachable_km2:,.1f}",
                  f"{row.added_per_km2:.2f}")
    console.print(t)
    paths = s["climate_paths"]
    over = f" ({s['objective']} over {len(paths)} climate paths)" if len(paths) > 1 else ""
    console.print(f"reachable gain{over} {s['reachable_gain_km2']:,.0f} km² "
                  f"(random {s['random_baseline_gain_km2']:,.0f}, nearest-first {s['nearest_baseline_gain_km2']:,.0f}); "
                  f"{s['n_reach_runs']} reach runs")
    if len(paths) > 1:
        console.print("per climate path: " + ", ".join(f"{p['name']} {p['reachable_gain_km2']:,.0f} km²"
                                                       for p in paths))
    for key, path in written.items():
        console.print(f"{key}: {path}")
