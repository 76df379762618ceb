"""The cross-species summary of a multi-species run: one row per species, and the report page ranking them."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from envelope.io.atomic import atomic_output
from envelope.study.layout import RunLayout

__all__ = ["PATHWAY_COLUMNS", "build_species_report", "out_of_reach", "species_row", "species_summary_frame",
           "write_species_outputs"]

#: The columns given once per pathway, as ``<column>.<pathway>`` (values at the last horizon)
PATHWAY_COLUMNS = ("range_future_km2", "gained_km2", "reached_share", "reached_share_p05", "reached_share_p95",
                   "front_advance_km", "centroid_shift_km")


def _median(values) -> float:
    v = pd.to_numeric(pd.Series(values), errors="coerce").dropna()
    return float(v.median()) if len(v) else math.nan


def _number(value) -> float:
    return math.nan if value is None else float(value)


def species_row(name: str, layout: RunLayout, pathways) -> dict:
    """One species' row of ``species_summary.csv`` from its run folder ``layout``.

    Range today, and per pathway at the last horizon the future range, the climatic gain and
    the centroid shift are medians over the climate models of the change table (first
    method); the reached share of the gain with its 5 and 95 % interval and the front advance
    come from the pathway's reach summary (medians and ``intervals`` over its runs); ``cv_auc``
    is the mean AUC over the spatial cross-validation folds of the first method. ``method``
    names that first method and ``reach_methods`` the methods of the reach runs, so the table
    itself says where its two kinds of column come from.
    """
    fit = json.loads(layout.fit_summary().read_text())
    row = {"species": name, "range_now_km2": math.nan}
    change = pd.read_csv(layout.change_table) if layout.change_table.is_file() else None
    horizon = None
    reach_methods = set()
    if change is not None and len(change):
        horizon = int(change["horizon"].max())
        row["range_now_km2"] = _median(change["range_km2.now"])
    for p in pathways:
        last = change[(change["pathway"] == p) & (change["horizon"] == horizon)] if horizon is not None else None
        have = last is not None and len(last)
        row[f"range_future_km2.{p}"] = _median(last["range_km2.future"]) if have else math.nan
        row[f"gained_km2.{p}"] = _median(last["area_km2.gained_total"]) if have else math.nan
        summary_path = layout.reach_set(p)["summary"]
        s = json.loads(summary_path.read_text()) if summary_path.is_file() else {}
        reach_methods |= set(s.get("runs_by", {}).get("method", []))
        share_iv = s.get("intervals", {}).get("reached_share_of_gain") or {}
        row[f"reached_share.{p}"] = _number(s.get("reached_share_of_gain"))
        row[f"reached_share_p05.{p}"] = _number(share_iv.get("p05"))
        row[f"reached_share_p95.{p}"] = _number(share_iv.get("p95"))
        row[f"front_advance_km.{p}"] = _number(s.get("front_advance_km"))
        row[f"centroid_shift_km.{p}"] = _median(last["centroid_shift_km"]) if have else math.nan
    cv = fit["cv"]
    row.update({"method": str(fit.get("method", "")), "reach_methods": "+".join(sorted(reach_methods)),
                "cv_auc": _number(cv.get("auc_mean")), "cv_auc_sd": _number(cv.get("auc_sd")),
                "n_presences": int(fit["n_presences"]), "horizon": horizon if horizon is not None else math.nan,
                "folder": layout.run_dir.parent.name + "/" + layout.run_dir.name})
    return row


def species_summary_frame(names, layout: RunLayout, pathways) -> pd.DataFrame:
    """Every species' row (:func:`species_row`), in run order; column ``species`` first."""
    return pd.DataFrame([species_row(name, layout.species(name), pathways) for name in names])


def out_of_reach(frame: pd.DataFrame, pathways) -> pd.DataFrame:
    """Per species and pathway, the share of the climatic gain out of reach (1 - reached share) with
    its interval, and ``mean`` over the pathways; species ranked by it, largest first (NaN last)."""
    out = pd.DataFrame({"species": frame["species"]})
    for p in pathways:
        out[p] = 1.0 - frame[f"reached_share.{p}"]
        out[f"{p}.low"] = 1.0 - frame[f"reached_share_p95.{p}"]
        out[f"{p}.high"] = 1.0 - frame[f"reached_share_p05.{p}"]
    out["mean"] = out[list(pathways)].mean(axis=1, skipna=True) if len(pathways) else np.nan
    return out.sort_values("mean", ascending=False, na_position="last", kind="stable").reset_index(drop=True)


def _species_inputs(layout: RunLayout, names, pathways) -> list:
    files = []
    for name in names:
        sl = layout.species(name)
        files += [sl.fit_summary(), sl.change_table] + [sl.reach_set(p)["summary"] for p in pathways]
    return [str(f) for f in files if Path(f).is_file()]


def write_species_outputs(study, layout: RunLayout, cache, names, outcomes, say) -> dict:
    """The steps after every species ran: ``species_summary.csv`` and the study's report page."""
    pathways = sorted({s.pathway for s in study.scenarios})
    inputs = _species_inputs(layout, names, pathways)
    target = layout.species_summary

    def do_summary():
        say("cross-species summary")
        text = species_summary_frame(names, layout, pathways).to_csv(index=False)
        with atomic_output(target, overwrite=True) as tmp:
            tmp.write_text(text)

    cache.run("species_summary", {"species": list(names), "pathways": pathways}, inputs, [target], do_summary)
    results = {"species": {name: {"run_dir": out.get("run_dir"), "report": out.get("report"),
                                  "seconds": out.get("seconds"), "where": out.get("where", "local")}
                           for name, out in outcomes.items()},
               "species_summary": str(target)}
    if study.outputs.report:
        def do_report():
            say("species report")
            build_species_report(study, layout, pd.read_csv(target), pathways)

        cache.run("report", {"study": study.to_dict()["study"], "figures": study.outputs.figures,
                             "page": "species ranking"}, [str(target)], [layout.report], do_report)
        results["report"] = str(layout.report)
    return results


def build_species_report(study, layout: RunLayout, frame: pd.DataFrame, pathways) -> Path:
    """The study's report page (``layout.report``): species ranked by the share of their climatic
    gain out of reach, with the summary table, a figure and the cautions."""
    from envelope import figures
    from envelope.study.findings import format_km, format_km2, format_share
    from envelope.study.html import Report

    n = len(frame)
    rep = Report(study.study.name, f"{n} species, each in its own run folder under {layout.species_dir.name}/")
    ranked = out_of_reach(frame, pathways)
    horizon = frame["horizon"].dropna()
    by = f"by {int(horizon.max())}" if len(horizon) else "by the last horizon"
    known = ranked.dropna(subset=["mean"])
    findings = []
    if len(known):
        most = known.iloc[0]
        mostly = int((known["mean"] > 0.5).sum())
        findings.append(f"{mostly} of the {len(known)} species with a climatic gain and a reach run could reach less "
                        f"than half of that gain {by} (mean over the pathways). The largest share out of reach is "
                        f"{format_share(most['mean'])}, for {most['species']}.")
    findings.append("Each species' own report, with its maps and cautions, is in its run folder "
                    f"({layout.species_dir.name}/<species>/report.html).")
    rep.add_section("findings", paragraphs=findings)
    rep.add_section("question", paragraphs=[study.study.question or "Where will the climate suit each species, "
                                            "and which of those places can it reach?"])
    rep.add_section("data", paragraphs=["Records used per species (after cleaning), and the model's skill in "
                                        "spatial block cross-validation: see the table below."])
    rows = frame.set_index("species")
    table = []
    for _, r in ranked.iterrows():
        s = rows.loc[r["species"]]
        line = {"Species": r["species"], "Records": f"{int(s['n_presences']):,}",
                "CV AUC": "–" if not np.isfinite(s["cv_auc"]) else f"{s['cv_auc']:.3f}",
                "Range today (km²)": format_km2(s["range_now_km2"])}
        for p in pathways:
            iv = (f" ({format_share(r[f'{p}.low'])}–{format_share(r[f'{p}.high'])})"
                  if np.isfinite(r[f"{p}.low"]) and np.isfinite(r[f"{p}.high"]) else "")
            line[f"Gained, {p} (km²)"] = format_km2(s[f"gained_km2.{p}"])
            line[f"Out of reach, {p}"] = format_share(r[p]) + iv
            line[f"Front advance, {p} (km)"] = format_km(s[f"front_advance_km.{p}"])
            line[f"Centroid shift, {p} (km)"] = format_km(s[f"centroid_shift_km.{p}"])
        table.append(line)
    figs = []
    if study.outputs.figures and len(known):
        figs.append((figures.plot_species_ranking(ranked, pathways),
                     f"Share of each species' climatic gain out of reach {by}, per pathway (median over runs, "
                     "5–95 % range across them); species ranked by the mean over pathways"))
    rep.add_section("species", "Species ranked by the share of their gain out of reach", paragraphs=[
        "Out of reach: the part of the climatic gain (cells suitable at the last horizon that are not today) that "
        "the species does not occupy in the dispersal model, whether for lack of time or of habitat; 1 minus the "
        "reached share of species_summary.csv, whose columns hold every value of this table unrounded."],
        table=pd.DataFrame(table), figures=figs,
        table_caption="Species, largest share out of reach first; areas and shifts at the last horizon, medians "
                      "over climate models; shares with their 5–95 % range over the reach runs")
    rep.add_section("cautions", paragraphs=[
        "A ranking across species compares models fitted to records of different quantity and quality; a species "
        "with few records or a low cross-validated AUC ranks on weak ground. The reached share rests on dispersal "
        "assumptions (kernel, distance, colonisation rate) that the study gives alike to every species unless set "
        "otherwise, though species differ in how they move. Use the ranking to decide where to look closer, not "
        "as a list of priorities: defer to local expertise and to statutory guidance on status and action."])
    rep.add_section("methods", paragraphs=[
        "Every species runs the whole chain of a single-species study (fit, projection, range change, reach) "
        "with the same climate, scenarios, habitat and dispersal settings. Methods and references: "
        "docs/methods.md and docs/dispersal.md."])
    rep.write(layout.report, overwrite=True)
    return layout.report
