"""`envelope run`: a whole study from one TOML file."""

from __future__ import annotations

import os

import click


@click.command()
@click.argument("study_file", type=click.Path(exists=True, dir_okay=False))
@click.option("--out", "out", required=True, type=click.Path(file_okay=False), help="Run folder.")
def run(study_file, out):
    """Run a study: fit, evaluate, project, ensemble, change, reach, figures, report.

    Every step is skipped when its inputs and settings are unchanged (content hashes in
    RUN_DIR/manifest.json), so an interrupted run resumes where it stopped.

    \b
    Examples:
      $ envelope run sample_grids/study.toml --out demo-run
      $ envelope -v run my-study.toml --out results/2026-12
    """
    from envelope.study.schema import load_study

    study = load_study(study_file)
    results = execute(study, out)
    print_results(results)


def execute(study, out):
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from envelope.pipelines.project import scheduler_context
    from envelope.study.runner import remove_failed_run_folder, run_study

    created = not os.path.lexists(out)
    try:
        with scheduler_context(study.compute.scheduler), Progress(SpinnerColumn(), TextColumn("{task.description}"),
                                                                  TimeElapsedColumn(), console=Console(stderr=True),
                                                                  transient=True) as bar:
            task = bar.add_task("starting", total=None)
            return run_study(study, out, progress=lambda stage: bar.update(task, description=stage))
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
