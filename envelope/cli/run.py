"""`envelope run`: a whole study from one TOML file."""

from __future__ import annotations

import os

import click

from envelope.cli.options import scheduler_opt


@click.command()
@click.argument("study_file", type=click.Path(exists=True, dir_okay=False))
@click.option("--out", "out", required=True, type=click.Path(file_okay=False), help="Run folder.")
@scheduler_opt
def run(study_file, out, scheduler):
    """Run a study: fit, evaluate, project, ensemble, change, reach, figures, report.

    Every step is skipped when its inputs and settings are unchanged (content hashes in
    RUN_DIR/manifest.json), so an interrupted run resumes where it stopped.

    A study whose records.species is a list of names, or "all", runs every species in its
    own folder (RUN_DIR/species/<name>/) and writes RUN_DIR/species_summary.csv and a report
    ranking the species. --scheduler (or compute.scheduler in the study file) sends each
    species to a dask.distributed cluster as a task; a single-species study sends its
    projection's chunks. See docs/hpc.md.

    \b
    Examples:
      $ envelope run sample_grids/study.toml --out demo-run
      $ envelope -v run my-study.toml --out results/2026-12
      $ envelope run many-species.toml --out results/all --scheduler tcp://10.0.0.5:8786
    """
    from envelope.study.schema import load_study

    study = load_study(study_file)
    results = execute(study, out, scheduler=scheduler)
    print_results(results)


def execute(study, out, scheduler=None):
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from envelope.pipelines.project import scheduler_context
    from envelope.study.runner import remove_failed_run_folder, run_study

    created = not os.path.lexists(out)
    try:
        with scheduler_context(scheduler or study.compute.scheduler) as client, \
                Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(),
                         console=Console(stderr=True), transient=True) as bar:
            task = bar.add_task("starting", total=None)
            return run_study(study, out, progress=lambda stage: bar.update(task, description=stage), client=client)
    except BaseException:
        if created:  # a run that failed before its first result (a full disk, say) leaves no empty folder
            remove_failed_run_folder(out)
        raise


def print_results(results):
    import json
    from pathlib import Path

    from rich.console import Console
    from rich.table import Table

    console = Console()
    if "species_summary" in results:
        print_species_results(console, results)
        return
    cv = results["fit"]["cv"]
    console.print(f"model skill: AUC {cv['auc_mean']:.3f} ± {cv['auc_sd']:.3f}, TSS {cv['tss_mean']:.3f}, "
                  f"Boyce {cv['boyce_mean']:.3f}")
    if results.get("reach"):
        t = Table(title="Climatic gain by the last horizon (km²)")
        for col in ("run", "gained, reached", "gained, not reached", "gained, no habitat", "reached share",
                    "front advance km"):
            t.add_column(col, justify="right" if col != "run" else "left")
        for row in results["reach"]:
            s = json.loads(Path(row["summary"]).read_text())
            a = s["area_km2"]
            share = s["reached_share_of_gain"]
            t.add_row(row["run"], f"{a['gained_reached']:,.0f}", f"{a['gained_unreached']:,.0f}",
                      f"{a['gained_no_habitat']:,.0f}", "–" if share is None else f"{share:.0%}",
                      "–" if s["front_advance_km"] is None else f"{s['front_advance_km']:.1f}")
        console.print(t)
    console.print(f"steps run: {len(results['ran'])}, skipped (unchanged): {len(results['skipped'])}")
    if results.get("report"):
        console.print(f"report: {results['report']}")


def print_species_results(console, results):
    """A multi-species run: one line per species (folder, wall time) and the summary's path."""
    from rich.table import Table

    t = Table(title=f"{len(results['species'])} species")
    for col in ("species", "run folder", "seconds", "where"):
        t.add_column(col, justify="right" if col == "seconds" else "left")
    for name, s in results["species"].items():
        t.add_row(name, str(s["run_dir"]), f"{s['seconds']:.1f}", str(s["where"]))
    console.print(t)
    console.print(f"species summary: {results['species_summary']}")
    console.print(f"steps run: {len(results['ran'])}, skipped (unchanged): {len(results['skipped'])} "
                  "(the study's own; each species' steps are in its folder's manifest.json)")
    if results.get("report"):
        console.print(f"report: {results['report']}")
