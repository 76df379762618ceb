"""`envelope demo`: run the bundled fictional study end to end."""

from __future__ import annotations

import click


@click.command()
@click.option("--out", "out", type=click.Path(file_okay=False), default="demo-output", show_default=True,
              help="Run folder (inside the current folder by default).")
def demo(out):
    """Run the bundled fictional study end to end and print its summary.

    The study (sample_grids/study.toml) is an invented species on an invented island in
    the open North Pacific: nothing in it is a real place or species. The run fits a model,
    cross-validates it spatially, projects 12 scenario grids, measures range change, runs
    habitat-gated dispersal for each pathway and a held-climate counterfactual, and writes
    an HTML report. A second run reuses every unchanged step.

    \b
    Examples:
      $ envelope demo
      $ envelope demo --out /tmp/demo-run
    """
    from envelope.cli.run import execute, print_results
    from envelope.study.demo import demo_dir
    from envelope.study.schema import load_study

    study = load_study(demo_dir().parent / "study.toml")
    results = execute(study, out)
    print_results(results)
