"""The figures the tutorial and the user guide quote, generated from a run of the demo study so that the docs cannot drift.

    python docs/figures.py                 # run the demo into a temporary folder, rewrite the blocks and pictures
    python docs/figures.py --run-dir DIR   # use a finished demo run
    python docs/figures.py --check         # exit 1 when the docs differ from a fresh run

Every generated part of a docs page sits between ``<!-- generated: NAME -->`` and
``<!-- end generated -->``: a block when a newline follows the opening comment, an inline
span (a number or a sentence inside prose) when it does not. Each name has one function
below, registered with :func:`block`; so has each picture in docs/img (:func:`picture`, a
matplotlib Figure drawn from the run's rasters with ``envelope.figures``); it reads the run folder through
:class:`envelope.study.layout.RunLayout` (never a hard-coded path) and returns the text.
The user guide's command excerpts are the commands' own output: :meth:`Demo.commands`
runs them with click's test runner on the demo data, with the demo study's settings. :func:`rewrite` puts the texts in place;
tests/study/test_report_render.py checks the committed pages against a fresh run.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import re
import sys
import tempfile
from functools import cached_property
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd

DOCS = Path(__file__).resolve().parent
PAGES = ("tutorial.md", "user-guide.md")
BLOCK = re.compile(r"(<!-- generated: (?P<name>[a-z0-9-]+) -->\n?)(?P<body>.*?)(<!-- end generated -->)", re.S)
#: Terminal width the console excerpts are drawn at (rich reads COLUMNS when not on a terminal).
COLUMNS = "120"
#: The counterfactual reach run of a study (envelope.study.runner).
HELD = "held-climate"
#: Where the tutorial and the guide pretend the run folder is.
TUTORIAL_RUN, GUIDE_RUN = "/tmp/tut", "run1"
#: Reasons a record is dropped (envelope.records), as the tutorial's table words them.
DROP_LABELS = {"other_taxon": "other taxon", "absent": "absent (surveyed, not found)",
               "malformed": "malformed (blank or text coordinates)", "imprecise": "imprecise (uncertainty above {unc} m)",
               "outside_years": "outside years ({years})", "outside_grid": "outside grid",
               "no_climate": "no climate (in the sea)", "duplicate_cell": "duplicate cell",
               "thinned": "thinned", "no_effort": "no recording effort in the cell"}
RULES = {"p10": "the 10th-percentile training presence threshold", "max-sss": "the maximum-SSS threshold",
         "min-presence": "the minimum training presence threshold"}

GENERATORS: dict = {}


def block(name):
    """Register the function that makes the generated text ``name``."""
    def register(fn):
        GENERATORS[name] = fn
        return fn
    return register


#: The pictures of the pages: file name in docs/img -> the function that draws it (a
#: matplotlib Figure) from the run, registered with :func:`picture`.
PICTURES: dict = {}
#: Where the pictures live and the resolution they are drawn at.
IMG, PICTURE_DPI = DOCS / "img", 72
#: Largest RMS difference (0-255 grey levels) between a committed picture and a fresh
#: drawing that --check and the docs test accept. Common practice, no source: with the pinned
#: matplotlib the drawings are identical; the margin absorbs anti-aliasing of another FreeType.
PICTURE_TOLERANCE = 2.0


def picture(filename):
    """Register the function that draws docs/img/``filename`` from the run."""
    def register(fn):
        PICTURES[filename] = fn
        return fn
    return register


# ---------------------------------------------------------------------- formatting
def km2(v):
    return "–" if v is None else f"{v:,.0f}"


def pct(v, digits=0):
    return "–" if v is None else f"{100 * v:.{digits}f} %"


def interval(s, *keys, fmt):
    node = s.get("intervals", {})
    for k in keys:
        node = node.get(k, {})
    return f"{fmt(node.get('p05'))}–{fmt(node.get('p95'))}" if node.get("p05") is not None else "–"


def span(values, fmt):
    """'a–b' of the smallest and largest of ``values``."""
    return f"{fmt(min(values))}–{fmt(max(values))}"


def fence(text):
    return "```\n" + text.rstrip("\n") + "\n```\n"


def excerpt(command, output=None):
    """A fenced command and its output (``output``: a trimmed one, else all it printed)."""
    return fence(command.shown + "\n" + (command.stdout if output is None else output))


def console(fn, *args):
    """What ``fn(*args)`` prints through rich, at the width of :data:`COLUMNS`."""
    out, old = io.StringIO(), os.environ.get("COLUMNS")
    os.environ["COLUMNS"] = COLUMNS
    try:
        with contextlib.redirect_stdout(out):
            fn(*args)
    finally:
        if old is None:
            del os.environ["COLUMNS"]
        else:
            os.environ["COLUMNS"] = old
    return "\n".join(line.rstrip() for line in out.getvalue().splitlines())


def shown(args, width=96) -> str:
    """``$ envelope ARGS`` as the guide prints a command: demo paths as ``$D``, lines broken before an option."""
    words = [a.replace("sample_grids/demo", "$D") for a in args]
    units = []  # an option with its value stays on one line
    for w in words:
        if w.startswith("-") or not units or units[-1].startswith("-") and " " in units[-1]:
            units.append(w)
        else:
            units[-1] += " " + w
    lines, line = [], "$ envelope"
    for u in units:
        if len(line) + len(u) + 1 > width:
            lines.append(line + " \\")
            line = "     "
        line += " " + u
    return "\n".join(lines + [line])


class Command(NamedTuple):
    """One command of the user guide: how it is shown, what it printed, the file it wrote (text)."""

    shown: str
    stdout: str
    file: str | None = None


# ---------------------------------------------------------------------- the run
class Demo:
    """A finished run of the demo study, read through its :class:`RunLayout`."""

    def __init__(self, run_dir):
        from envelope.study.demo import demo_dir
        from envelope.study.layout import RunLayout
        from envelope.study.schema import load_study

        self.study = load_study(demo_dir().parent / "study.toml")
        self.layout = RunLayout.of(self.study, run_dir)

    @cached_property
    def land(self):
        """The demo's land mask, the coast of every picture."""
        from envelope.io.rasters import open_layer
        from envelope.study.demo import demo_dir

        return open_layer(demo_dir() / "landmask.tif").load()

    @cached_property
    def fit(self) -> dict:
        return json.loads(self.layout.fit_summary().read_text())

    @cached_property
    def folds(self) -> pd.DataFrame:
        return pd.read_csv(self.layout.fit_folds())

    @cached_property
    def suitability(self) -> pd.DataFrame:
        return pd.read_csv(self.layout.suitability_table)

    @cached_property
    def change(self) -> pd.DataFrame:
        return pd.read_csv(self.layout.change_table)

    @property
    def pathways(self) -> list:
        return sorted(set(self.suitability["pathway"]))

    @property
    def last_horizon(self) -> int:
        return int(self.suitability["horizon"].max())

    @cached_property
    def reach(self) -> dict:
        """{run: summary} in the runner's order: the pathways, then the counterfactual."""
        runs = self.pathways + ([HELD] if self.study.dispersal.counterfactual else [])
        return {r: json.loads(self.layout.reach(r)["summary"].read_text()) for r in runs}

    def reach_runs(self, pathway) -> pd.DataFrame:
        return pd.read_csv(self.layout.reach_set(pathway)["runs"])

    @cached_property
    def last_run(self) -> dict:
        return json.loads(self.layout.manifest.read_text())["last_run"]

    def results(self, out) -> dict:
        """What :func:`envelope.study.runner.run_study` returned, rebuilt from the run folder (run folder ``out``)."""
        return {"fit": self.fit, "ran": self.last_run["ran"], "skipped": self.last_run["skipped"],
                "reach": [{"run": r, "summary": str(self.layout.reach(r)["summary"])} for r in self.reach],
                "report": f"{out}/{self.layout.report.name}"}

    @cached_property
    def commands(self) -> dict:
        """The user guide's command excerpts: {name: Command}.

        The guide's chain (records, fit, inspect, project, change, reach) with the demo
        study's settings, run in a scratch folder that holds ``sample_grids`` (the demo data),
        so the printed paths are the guide's. With the study's settings and seed, ``fit``
        makes the run's model (the guide says so, and the reach-table block shows the run).
        """
        from click.testing import CliRunner

        from envelope.cli.main import cli
        from envelope.study.demo import demo_dir

        d = "sample_grids/demo"
        fit_args = ["--variables", ",".join(self.study.climate.variables), "--bias", f"{d}/effort.tif",
                    "--background", str(self.study.model.background), "--blocks-km", f"{self.study.model.blocks_km:g}",
                    "--threshold-rule", self.study.model.threshold_rule,
                    "--max-uncertainty-m", f"{self.study.records.max_uncertainty_m:g}",
                    "--record-years", "{}-{}".format(*self.study.records.years)]
        record_args = ["--record-years", "{}-{}".format(*self.study.records.years),
                       "--max-uncertainty-m", f"{self.study.records.max_uncertainty_m:g}"]
        h = self.last_horizon
        steps = {
            "info": (["info", f"{d}/baseline.tif"], None),
            "records": (["records", f"{d}/presences.csv", "--climate", f"{d}/baseline.tif", *record_args,
                         "--thin-km", "10", "--out", "clean.csv"], "clean.csv"),
            "fit": (["fit", "--presences", f"{d}/presences.csv", "--climate", f"{d}/baseline.tif", *fit_args,
                     "--out", "model.envm"], None),
            "inspect": (["inspect", "model.envm"], None),
            "project": (["project", "model.envm", "--climate", f"{d}/scenarios/high_model-b_{h}.tif", "--out",
                         "hb80.tif", "--mess", "hb80_mess.tif", "--binary", "hb80_01.tif"], None),
            "project-batch": (["project", "model.envm", "--scenarios", f"{d}/scenarios.csv", "--out-dir", "proj",
                               "--mess"], None),
            "project-now": (["project", "model.envm", "--climate", f"{d}/baseline.tif", "--out", "now.tif"], None),
            "change": (["change", "--now", "now.tif", "--future", f"proj/high_model-b_{h}_suitability.tif",
                        "--mess", f"proj/high_model-b_{h}_mess.tif", "--elevation", f"{d}/elevation.tif",
                        "--out", "hb80_change.tif", "--summary", "hb80_change.json"], "hb80_change.json"),
            "change-batch": (["change", "--now", "now.tif", "--scenarios", "proj/suitability_table.csv",
                              "--out-dir", "changes", "--table", "changes.csv"], None),
            "reach": (["reach", "--now", "now.tif", "--future", "proj/ensemble_high_2050_mean.tif",
                       "--future", f"proj/ensemble_high_{h}_mean.tif", "--years", f"2050,{h}",
                       "--habitat", f"{d}/habitat.tif", "--start", "clean.csv",
                       "--kernel", self.study.dispersal.kernel, "--mean-distance-km", "5",
                       "--step-years", f"{self.study.dispersal.step_years:g}", "--rate",
                       f"{self.study.dispersal.rate:g}", "--persistence-years",
                       f"{self.study.dispersal.persistence_years:g}", "--front", "front.geojson",
                       "--arrival", "arrival.tif", "--out", "reach.tif", "--summary", "reach.json"], "reach.json"),
        }
        out, here = {}, Path.cwd()
        with tempfile.TemporaryDirectory() as tmp:
            os.symlink(demo_dir().parent, Path(tmp) / "sample_grids")
            os.makedirs(Path(tmp) / "changes")
            os.chdir(tmp)
            try:
                for name, (args, summary) in steps.items():
                    res = CliRunner().invoke(cli, args, env={"COLUMNS": COLUMNS}, catch_exceptions=False)
                    if res.exit_code != 0:
                        raise RuntimeError(f"envelope {' '.join(args)} failed: {res.output}")
                    text = "\n".join(line.rstrip() for line in res.stdout.splitlines())
                    out[name] = Command(shown(args), text, Path(summary).read_text() if summary else None)
            finally:
                os.chdir(here)
        return out


# ---------------------------------------------------------------------- tutorial §1
@block("demo-console")
def demo_console(run: Demo) -> str:
    from envelope.cli.run import print_results

    return fence(f"$ envelope demo --out {TUTORIAL_RUN}\n" + console(print_results, run.results(TUTORIAL_RUN)))


@block("demo-settings")
def demo_settings(run: Demo) -> str:
    from envelope.reach_runs import distance_levels

    s, d = run.study, run.study.dispersal
    levels = distance_levels(*d.mean_distance_range_km) if d.mean_distance_range_km else [d.mean_distance_km]
    scen = run.suitability
    bias = " drawn in proportion to recording effort" if s.model.bias else ""
    return "\n".join([
        f"- records with coordinate uncertainty up to {s.records.max_uncertainty_m:,.0f} m, from "
        f"{s.records.years[0]}–{s.records.years[1]};",
        f"- {len(s.climate.variables)} climate variables ({', '.join(f'`{v}`' for v in s.climate.variables)});",
        f"- a {', '.join(f'`{m}`' for m in s.model.methods)} model with {s.model.background:,} background cells{bias};",
        f"- {s.model.folds}-fold spatial cross-validation in {s.model.blocks_km:g} km blocks, and "
        f"{RULES.get(s.model.threshold_rule, s.model.threshold_rule)} (`{s.model.threshold_rule}`);",
        f"- {len(scen)} scenario grids ({scen['pathway'].nunique()} pathways × {scen['climate_model'].nunique()} "
        f"climate models × {scen['horizon'].nunique()} horizons);",
        f"- dispersal with an {d.kernel} kernel, mean distances of {', '.join(f'{v:g}' for v in levels)} km per "
        f"{d.step_years:g}-year step, colonisation rate {d.rate:g} per step, and persistence of "
        f"{d.persistence_years:g} years.",
    ]) + "\n"


@block("rerun-steps")
def rerun_steps(run: Demo) -> str:
    return f"steps run: 0, skipped (unchanged): {len(run.last_run['ran']) + len(run.last_run['skipped'])}"


# ---------------------------------------------------------------------- tutorial §2-§3
@block("report-figures")
def report_figures(run: Demo) -> str:
    n_fig = run.layout.report.read_text(encoding="utf-8").count("<figure ")
    return f"The report holds {n_fig} figures."


@block("records")
def records(run: Demo) -> str:
    rec, r = run.fit["records"], run.study.records
    labels = {k: v.format(unc=f"{r.max_uncertainty_m:g}", years=f"not in {r.years[0]}–{r.years[1]}")
              for k, v in DROP_LABELS.items()}
    rows = [f"| {labels.get(k, k)} | {n:,} |" for k, n in rec["dropped"].items() if n]
    return (f"Of the {rec['read']:,} rows in `{r.path.name}`, the model kept {rec['kept']:,} (a count of "
            f"records). The other {rec['read'] - rec['kept']:,} were dropped:\n\n"
            "| reason | records |\n|---|---|\n" + "\n".join(rows) + "\n")


# ---------------------------------------------------------------------- tutorial §4
@block("skill")
def skill(run: Demo) -> str:
    cv = run.fit["cv"]
    rows = [("AUC", "auc"), ("TSS", "tss"), ("kappa", "kappa"), ("Boyce index", "boyce"),
            (f"omission at {cv['threshold_rule'].upper()}", "omission_p10")]
    body = "".join(f"| {label} | {cv[f'{k}_mean']:.3f} | {cv[f'{k}_sd']:.3f} |\n" for label, k in rows)
    return f"| metric | mean over the {cv['n_folds']} folds | SD |\n|---|---|---|\n" + body


@block("auc")
def auc(run: Demo) -> str:
    a = run.fit["cv"]["auc_mean"]
    return (f"**AUC {a:.2f}** means that a held-out record outranks a random background cell in about "
            f"{100 * a:.0f} % of record–background pairs.")


@block("tss-kappa")
def tss_kappa(run: Demo) -> str:
    cv = run.fit["cv"]
    return f"**TSS {cv['tss_mean']:.2f} and kappa {cv['kappa_mean']:.2f}**"


@block("fold-sizes")
def fold_sizes(run: Demo) -> str:
    f = run.folds
    return (f"about {f['n_test_presence'].mean():.0f} test records against {f['n_test_background'].mean():.0f} "
            f"background cells per fold")


@block("boyce")
def boyce(run: Demo) -> str:
    return f"**Boyce {run.fit['cv']['boyce_mean']:.2f}**"


@block("omission")
def omission(run: Demo) -> str:
    cv, thr = run.fit["cv"], run.fit["threshold"]
    om = cv["omission_p10_mean"]
    return (f"**Omission {om:.3f} at the {thr['rule'].upper()} threshold.** The threshold {thr['value']:.3f} "
            f"(rule `{thr['rule']}`) leaves out 10 % of the training records by construction, and it leaves "
            f"out {100 * om:.1f} % of held-out records (mean over the folds).")


@block("threshold")
def threshold(run: Demo) -> str:
    return f"{run.fit['threshold']['value']:.3f}"


@block("collinear")
def collinear(run: Demo) -> str:
    pairs = run.fit.get("collinear_pairs") or []
    if not pairs:
        return "No pair of the variables has |r| above the fit's collinearity limit."
    text = ", ".join(f"`{p['a']}`–`{p['b']}` r = {p['r']:.2f}" for p in pairs)
    return f"Some of the variables are correlated: {text}."


@block("importance")
def importance(run: Demo) -> str:
    imp = sorted(run.fit["permutation_importance"].items(), key=lambda kv: -kv[1])
    text = ", ".join(f"`{v}` {m:.3f}" for v, m in imp)
    return (f"The permutation importance (the drop in AUC when a variable is shuffled), largest first: {text}.")


@block("least-important")
def least_important(run: Demo) -> str:
    v, m = min(run.fit["permutation_importance"].items(), key=lambda kv: kv[1])
    return f"a small importance for `{v}` ({m:.3f}) does not mean `{v}` is irrelevant"


# ---------------------------------------------------------------------- tutorial §5
@block("novel-share")
def novel_share(run: Demo) -> str:
    suit, horizons = run.suitability, sorted(set(run.suitability["horizon"]))
    cols = [(p, h) for p in ("low", "high") for h in horizons]
    lines = ["| share of the land area in novel climate (%) | " + " | ".join(f"{h} {p}" for p, h in cols) + " |",
             "|---" * (len(cols) + 1) + "|"]
    for model in sorted(set(suit["climate_model"])):
        cells = []
        for p, h in cols:
            row = suit[(suit["climate_model"] == model) & (suit["pathway"] == p) & (suit["horizon"] == h)]
            cells.append(f"{100 * float(row['novel_share'].iloc[0]):.1f} %" if len(row) else "–")
        lines.append(f"| {model} | " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


@block("novel-high")
def novel_high(run: Demo) -> str:
    s = run.suitability
    last = s[(s["pathway"] == "high") & (s["horizon"] == run.last_horizon)]
    return (f"Under `high` {run.last_horizon}, {span(last['novel_share'], lambda v: f'{100 * v:.0f}')} % of the "
            f"island's land area (depending on the climate model) is in climate the records never sampled.")


@block("novel-max")
def novel_max(run: Demo) -> str:
    return f"up to {100 * run.suitability['novel_share'].max():.0f} % of the island's land area"


@block("most-dissimilar")
def most_dissimilar(run: Demo) -> str:
    """Area share of each most dissimilar variable over the novel cells of the `high` last-horizon scenarios."""
    import rioxarray  # noqa: F401  (the .rio accessor)
    import xarray as xr

    from envelope.grids import cell_area_km2
    from envelope.io.rasters import read_tags

    s = run.suitability
    rows = s[(s["pathway"] == "high") & (s["horizon"] == run.last_horizon)]
    totals: dict = {}
    for name in rows["mess_path"]:
        path = run.layout.projections_dir / name
        names = read_tags(path)["categories"]
        with xr.open_dataarray(path, engine="rasterio") as da:
            mess, var = da.sel(band=1).load(), da.sel(band=2).values
        area = cell_area_km2(mess).values
        novel = mess.values < 0
        for code, v in names.items():
            totals[v] = totals.get(v, 0.0) + float(area[novel & (var == code)].sum())
    whole = sum(totals.values())
    top = sorted(totals.items(), key=lambda kv: -kv[1])[:2]
    text = " and ".join(f"`{v}` ({100 * a / whole:.0f} %)" for v, a in top)
    return (f"The most dissimilar variable there is mostly {text}; shares of the novel area of the three "
            f"`high` {run.last_horizon} maps together.")


# ---------------------------------------------------------------------- tutorial §6
@block("range-today")
def range_today(run: Demo) -> str:
    return f"the range today is {km2(run.change['range_km2.now'].iloc[0])} km²"


@block("change-table")
def change_table(run: Demo) -> str:
    head = ("| scenario | future range | change (% of today's range) | gained | gained, novel | stable, novel | lost "
            "| leading edge shift km | centroid shift km |\n" + "|---" * 9 + "|\n")
    rows = [f"| {r['name']} | {km2(r['range_km2.future'])} | {r['range_change_pct']:+.1f} % | "
            f"{km2(r['area_km2.gained'])} | {km2(r['area_km2.gained_novel'])} | {km2(r['area_km2.stable_novel'])} | "
            f"{km2(r['area_km2.lost'])} | {r['leading_edge_shift_km']:.0f} | {r['centroid_shift_km']:.0f} |\n"
            for _, r in run.change.iterrows()]
    return head + "".join(rows)


@block("change-shifts")
def change_shifts(run: Demo) -> str:
    c = run.change
    return (f"The largest loss in any scenario is {km2(c['area_km2.lost'].max())} km², and the leading edge (the "
            f"95th area-weighted percentile of latitude) moves {span(c['leading_edge_shift_km'], lambda v: f'{v:.0f}')}"
            f" km north.")


@block("change-high")
def change_high(run: Demo) -> str:
    c = run.change
    last = c[(c["pathway"] == "high") & (c["horizon"] == run.last_horizon)]
    share = last["area_km2.gained_novel"] / last["area_km2.gained_total"]
    top = last.loc[share.idxmax()]
    lo, hi = last["range_change_pct"].min(), last["range_change_pct"].max()
    return (f"Under `high` {run.last_horizon} the range changes by {lo:+.0f} % to {hi:+.0f} % of today's range, "
            f"depending on the climate model. "
            f"For `{top['climate_model']}`, {100 * share.max():.0f} % of the gained area "
            f"({km2(top['area_km2.gained_novel'])} of {km2(top['area_km2.gained_total'])} km²) lies in novel climate.")


@block("partition-range")
def partition_range(run: Demo) -> str:
    t = pd.read_csv(run.layout.uncertainty_partition)
    t = t[t["quantity"] == "range_change_km2"].set_index("source")["share"]
    return (f"climate models account for {100 * t.get('climate_model', 0):.0f} % of the variance of range change "
            f"across runs, and pathways for {100 * t.get('pathway', 0):.0f} %")


# ---------------------------------------------------------------------- tutorial §7
@block("reach-design")
def reach_design(run: Demo) -> str:
    s = run.reach[run.pathways[0]]
    by = s["runs_by"]
    dist = ", ".join(f"{v:g}" for v in by["distance_km"])
    return (f"Each pathway is run on every climate model's own suitability (not on their mean) at each of "
            f"{len(by['distance_km'])} mean dispersal distances ({dist} km per step), {s['n_runs']} runs per pathway")


@block("start-cells")
def start_cells(run: Demo) -> str:
    first = next(iter(run.reach.values()))
    return (f"The spread starts from the {first['n_start_cells']:,} cells holding a record "
            f"({km2(first['occupied_km2']['start'])} km²).\n")


@block("reach-table")
def reach_table(run: Demo) -> str:
    reach = run.reach
    order = list(reach)
    head = "| | " + " | ".join(order) + " |\n|---" + "|---" * len(order) + "|\n"
    rows = [
        ("gained, reached (km², median; 5–95 % over runs)", lambda s: f"{km2(s['area_km2']['gained_reached'])} "
         f"({interval(s, 'area_km2', 'gained_reached', fmt=km2)})"),
        ("gained, not reached (km², habitat present, dispersal-limited)",
         lambda s: km2(s["area_km2"]["gained_unreached"])),
        ("gained, no habitat (km²)", lambda s: km2(s["area_km2"]["gained_no_habitat"])),
        ("reached share of the gain (% of the gained area; 5–95 %)",
         lambda s: f"{pct(s['reached_share_of_gain'])} ({interval(s, 'reached_share_of_gain', fmt=pct)})"),
        ("front advance (km, median; 5–95 %)", lambda s: f"{s['front_advance_km']:+.0f} "
         f"({interval(s, 'front_advance_km', fmt=lambda v: f'{v:.0f}')})" if s["front_advance_km"] is not None else "–"),
        ("front speed (km per decade, median run)", lambda s: "–" if s.get("spread_rate_km_per_decade") is None
         else f"{s['spread_rate_km_per_decade']:.1f}"),
        ("occupied at the last horizon (km²)", lambda s: km2(s["occupied_km2"]["horizon"])),
        ("runs (climate models × distances)", lambda s: f"{s['n_runs']:,}"),
    ]
    return head + "".join(f"| {name} | " + " | ".join(f(reach[k]) for k in order) + " |\n" for name, f in rows)


@block("front-columns")
def front_columns(run: Demo) -> str:
    used = [s["front_columns_used"] for s in run.reach.values()]
    total = next(iter(run.reach.values()))["front_columns_total"]
    return f"{span(used, str)} of the {total} columns have a front at both times"


@block("reach-reading")
def reach_reading(run: Demo) -> str:
    from envelope.kernels.spread_speed import colonisation_spread_speed

    d = run.study.dispersal
    high = run.reach["high"]
    unreached = 1 - high["reached_share_of_gain"]
    years = run.last_horizon - run.study.climate.now_year
    speed = colonisation_spread_speed(d.kernel, d.rate, d.mean_distance_km).speed
    no_habitat = [run.reach[p]["area_km2"]["gained_no_habitat"] for p in run.pathways]
    return (f"Under `high`, {100 * unreached:.0f} % of the new climate space (a share of the gained area) is out "
            f"of reach by {run.last_horizon} under these dispersal assumptions. Most of it is far north of any "
            f"current population, and the front moves {high['front_advance_km']:.0f} km in {years:g} years "
            f"({high['spread_rate_km_per_decade']:.1f} km per decade; with colonisation rate {d.rate:g} the "
            f"kernel's spread speed c* at a mean distance of {d.mean_distance_km:g} km is {speed:.1f} km per "
            f"{d.step_years:g}-year step in full habitat, faster than the mean distance alone suggests). The habitat "
            f"there is also fragmented: open ground comes in small, scattered patches in the north (see "
            f"[Habitat](habitat.md) for fragmentation by latitude). Another {span(no_habitat, km2)} km² "
            f"(by pathway) becomes suitable where there is no open ground at all.")


@block("counterfactual")
def counterfactual(run: Demo) -> str:
    held = run.reach[HELD]
    occ0, occ1 = held["occupied_km2"]["start"], held["occupied_km2"]["horizon"]
    extra = {p: run.reach[p]["occupied_km2"]["horizon"] - occ1 for p in run.pathways}
    front = run.reach["high"]["front_advance_km"] - held["front_advance_km"]
    more = "; ".join(f"`{p}` {km2(v)} km²" for p, v in extra.items())
    return (f"Its occupied area still grows from {km2(occ0)} to {km2(occ1)} km², because the species keeps filling "
            f"climate that is already suitable today. That filling-in is ongoing spread, and would happen without "
            f"any climate change. **The difference between a pathway and the counterfactual is what the changing "
            f"climate itself adds.** By {run.last_horizon} it is this much more occupied area: {more} (medians over "
            f"runs); and under `high` a front {front:.0f} km further north "
            f"({run.reach['high']['front_advance_km']:.0f} − {held['front_advance_km']:.0f}).")


@block("held-front")
def held_front(run: Demo) -> str:
    return f"{run.reach[HELD]['front_advance_km']:.0f} km"


@block("held-edge")
def held_edge(run: Demo) -> str:
    held = run.reach[HELD]
    e, f = held["leading_edge_shift_km"], held["front_advance_km"]
    why = (": the warm south fills in too, which shifts the weight of the occupied area south, although the area "
           f"lost is {km2(held['area_km2']['lost'])} km²") if e < f else ""
    return f"In the counterfactual it moves {e:+.1f} km against a front advance of {f:+.1f} km{why}."


@block("partition")
def partition(run: Demo) -> str:
    t = pd.read_csv(run.layout.uncertainty_partition)
    lines = ["| quantity | source | share of the variance across runs (%) |", "|---|---|---|"]
    lines += [f"| {q} | {s.replace(':', ' × ')} | {100 * v:.1f} % |" for q, s, v in
              zip(t["quantity"], t["source"], t["share"])]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------- tutorial §8-§9
@block("arrival")
def arrival(run: Demo) -> str:
    from envelope.io.rasters import open_layer

    files = run.layout.reach("high")
    years = open_layer(files["arrival"]).values
    classes = open_layer(files["classes"], categorical=True).values
    reached = years[(classes == 3) & np.isfinite(years)]  # reach class 3: gained_reached
    return (f"Under `high`, the median arrival year over the cells of reached gains is {np.median(reached):.0f} "
            f"(the last horizon is {run.last_horizon}).")


@block("front-years")
def front_years(run: Demo) -> str:
    years = sorted({int(f["properties"]["year"]) for f in
                    json.loads(run.layout.reach("high")["front"].read_text())["features"]})
    step = years[1] - years[0] if len(years) > 1 else 0
    return f"every {step} years, from {years[0]} to {years[-1]}"


@block("distance-effect")
def distance_effect(run: Demo) -> str:
    rows, largest = [], 0.0
    for p in run.pathways:
        t = run.reach_runs(p).groupby("distance_km")["reached_share_of_gain"].median()
        rows.append(f"| {p} | " + " | ".join(pct(v) for v in t.values) + " |")
        dists, largest = t.index, max(largest, t.max())
    verdict = "\nMost of the gain stays out of reach at every distance tried.\n" if largest < 0.5 else ""
    return ("| reached share of the gain (% of the gained area; median over climate models) | "
            + " | ".join(f"{d:g} km per step" for d in dists) + " |\n" + "|---" * (len(dists) + 1) + "|\n"
            + "\n".join(rows) + "\n" + verdict)


# ---------------------------------------------------------------------- user guide
@block("guide-info")
def guide_info(run: Demo) -> str:
    return excerpt(run.commands["info"])


@block("guide-records")
def guide_records(run: Demo) -> str:
    return excerpt(run.commands["records"])


@block("guide-fit")
def guide_fit(run: Demo) -> str:
    return excerpt(run.commands["fit"])


@block("guide-inspect")
def guide_inspect(run: Demo) -> str:
    text = re.sub(r"created \S+", "created <date>", run.commands["inspect"].stdout)
    lines = ["…" if ln.startswith(("  records_dropped:", "  software:")) else ln for ln in text.splitlines()]
    text = "\n".join(ln for i, ln in enumerate(lines) if not (ln == "…" and i and lines[i - 1] == "…"))
    return excerpt(run.commands["inspect"], text)


@block("guide-project")
def guide_project(run: Demo) -> str:
    return excerpt(run.commands["project"])


@block("guide-project-batch")
def guide_project_batch(run: Demo) -> str:
    lines = run.commands["project-batch"].stdout.splitlines()
    rows = [ln for ln in lines if "novel climate" in ln]
    ens = [ln for ln in lines if ln.startswith("ensemble")]
    keep = [rows[0], "…", rows[-1], ens[0], "…", lines[-1]]
    return excerpt(run.commands["project-batch"], "\n".join(keep))


@block("guide-change")
def guide_change(run: Demo) -> str:
    return excerpt(run.commands["change"])


@block("guide-change-json")
def guide_change_json(run: Demo) -> str:
    s = json.loads(run.commands["change"].file)
    a = s["area_km2"]
    elev = "" if s.get("elevation_shift_m") is None else f" and `elevation_shift_m` {s['elevation_shift_m']:+.0f}"
    return (f"The JSON splits it (`area_km2.gained` {km2(a['gained'])}, `area_km2.gained_novel` "
            f"{km2(a['gained_novel'])}; km²). In this run it also gave `leading_edge_shift_km` "
            f"{s['leading_edge_shift_km']:.1f}{elev}.")


@block("guide-change-batch")
def guide_change_batch(run: Demo) -> str:
    return excerpt(run.commands["change-batch"])


@block("guide-reach")
def guide_reach(run: Demo) -> str:
    text = "\n".join(ln for ln in run.commands["reach"].stdout.splitlines() if not ln.startswith(("front:", "arrival:")))
    return excerpt(run.commands["reach"], text)


@block("guide-reach-start")
def guide_reach_start(run: Demo) -> str:
    kept = len(pd.read_csv(io.StringIO(run.commands["records"].file)))
    return f"This run started from the {kept:,} thinned records of the `records` example above"


@block("guide-run")
def guide_run(run: Demo) -> str:
    from envelope.cli.run import print_results

    return fence(f"$ envelope run sample_grids/study.toml --out {GUIDE_RUN}\n" + console(print_results, run.results(GUIDE_RUN)))


@block("guide-rerun")
def guide_rerun(run: Demo) -> str:
    return fence(f"$ envelope run sample_grids/study.toml --out {GUIDE_RUN}\n…\n{rerun_steps(run)}")


# ---------------------------------------------------------------------- pictures
@picture("tutorial-suitability-now.png")
def suitability_now_picture(run: Demo):
    from envelope import figures
    from envelope.io.rasters import open_layer

    return figures.map_continuous(open_layer(run.layout.now).load(), title="Demo: suitability today (fictional island)",
                                  label="suitability (relative)", vmin=0, vmax=1, land_mask=run.land,
                                  threshold_contour=round(run.fit["threshold"]["value"], 3))


@picture("tutorial-reach-high.png")
def reach_high_picture(run: Demo):
    from envelope import figures
    from envelope.io.rasters import open_layer
    from envelope.palettes import REACH_CLASS_COLOURS
    from envelope.reach import REACH_CLASSES

    classes = open_layer(run.layout.reach("high")["classes"], categorical=True).load()
    return figures.map_classes(classes.where(classes != 255), REACH_CLASSES, colours=REACH_CLASS_COLOURS,
                               title=f"Demo: reach classes by {run.last_horizon}, pathway high", land_mask=run.land)


@picture("tutorial-arrival-high.png")
def arrival_high_picture(run: Demo):
    from envelope import figures
    from envelope.io.rasters import open_layer

    return figures.map_arrival(open_layer(run.layout.reach("high")["arrival"]).load(),
                               title="Demo: first year occupied, pathway high", land_mask=run.land)


def pictures(run_dir, out_dir) -> dict:
    """Draw every picture from the demo run in ``run_dir`` into ``out_dir``; {file name: path}."""
    from envelope import figures

    run = Demo(run_dir)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    drawn = {}
    for name, draw in PICTURES.items():
        drawn[name] = out_dir / name
        drawn[name].write_bytes(figures.figure_to_png_bytes(draw(run), dpi=PICTURE_DPI))
    return drawn


def stale_pictures(drawn: dict) -> list:
    """The committed pictures that differ from the fresh drawings ``drawn`` (or are missing)."""
    from matplotlib.testing.compare import compare_images
    from matplotlib.testing.exceptions import ImageComparisonFailure

    stale = []
    for name, fresh in drawn.items():
        committed = IMG / name
        try:
            same = committed.exists() and compare_images(str(committed), str(fresh), PICTURE_TOLERANCE) is None
        except ImageComparisonFailure:  # another size
            same = False
        if not same:
            stale.append(f"img/{name}")
    return stale


NUMBER = re.compile(r"(?<![\w.])[-+]?\d+\.(\d+)(?![\w.])")


def same_but_round_off(old: str, new: str) -> bool:
    """True when ``old`` and ``new`` differ at most by one unit in the last printed digit of decimals.

    Fits by coordinate descent and BLAS sums can differ in the last bits between CPUs, which
    can move the fourth printed digit of a cross-validated AUC. Words, integers and the count
    of printed digits must be equal; a decimal may differ by one unit in its last place.
    """
    a, b = NUMBER.split(old), NUMBER.split(new)
    if len(a) != len(b) or NUMBER.sub("#", old) != NUMBER.sub("#", new):
        return False
    for x, y in zip(NUMBER.finditer(old), NUMBER.finditer(new)):
        unit = 10.0 ** -max(len(x.group(1)), len(y.group(1)))
        if abs(float(x.group(0)) - float(y.group(0))) > unit * 1.0001:
            return False
    return True


def blocks(run_dir) -> dict:
    """The text of every generated block and span, from the demo run in ``run_dir``."""
    run = Demo(run_dir)
    return {name: make(run) for name, make in GENERATORS.items()}


def rewrite(text: str, generated: dict) -> str:
    """``text`` with every generated block replaced by its text in ``generated``."""
    def put(m):
        name = m.group("name")
        if name not in generated:
            raise KeyError(f"docs block {name!r} has no generator; known: {sorted(generated)}")
        return m.group(1) + generated[name] + m.group(4)
    return BLOCK.sub(put, text)


def run_demo(out) -> Path:
    from envelope.study.demo import demo_dir
    from envelope.study.runner import run_study
    from envelope.study.schema import load_study

    run_study(load_study(demo_dir().parent / "study.toml"), out)
    return Path(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run-dir", type=Path, default=None)
    ap.add_argument("--check", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        run = args.run_dir or run_demo(Path(tmp) / "demo")
        generated = blocks(run)
        stale = []
        for page in PAGES:
            path = DOCS / page
            text = path.read_text(encoding="utf-8")
            new = rewrite(text, generated)
            if not same_but_round_off(text, new):
                stale.append(page)
                if not args.check:
                    path.write_text(new, encoding="utf-8")
        drawn = pictures(run, Path(tmp) / "img")
        for name in stale_pictures(drawn):
            stale.append(name)
            if not args.check:
                (DOCS / name).write_bytes(drawn[Path(name).name].read_bytes())
    if args.check and stale:
        print(f"out of date: {', '.join(stale)}; run python docs/figures.py", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
