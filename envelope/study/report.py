"""The study report: figures and tables of one run assembled into a self-contained HTML file."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd


def build_report(study, layout, *, fit_summary, suitability, change=True, reach_rows=()):
    """Write the run's report (``layout.report``): question, data, skill, maps, areas, cautions, methods, references.

    ``layout`` is the run's :class:`envelope.study.layout.RunLayout`, ``suitability`` the rows
    of its suitability table (:func:`envelope.io.tables.read_scenarios`), ``reach_rows`` the
    runner's list of reach runs and their files.
    """
    from envelope import figures
    from envelope.io.rasters import open_layer
    from envelope.palettes import CHANGE_CLASS_COLOURS, REACH_CLASS_COLOURS
    from envelope.reach import REACH_CLASSES
    from envelope.study.html import Report, records_table

    rep = Report(study.study.name, f"Species: {study.study.species}" if study.study.species else "")
    rep.add_section("question", paragraphs=[study.study.question or "Where will the climate suit the species, "
                                            "and which of those places can it reach?"])
    rec = fit_summary["records"]
    rep.add_section("data", paragraphs=[f"{rec['read']} records read, {rec['kept']} kept after cleaning; "
                                        f"{fit_summary['n_background']} background cells."],
                    table=records_table(rec["kept"], rec["dropped"]), table_caption="Records dropped, by reason")

    cv = fit_summary["cv"]
    skill = pd.DataFrame([{"metric": k, "mean": cv.get(f"{k}_mean"), "sd": cv.get(f"{k}_sd")}
                          for k in ("auc", "tss", "kappa", "boyce", "omission_p10")])
    folds_csv = layout.fit_folds(fit_summary["method"])
    figs = []
    if study.outputs.figures:
        if folds_csv.exists():
            figs.append((figures.plot_cv_folds(pd.read_csv(folds_csv)), "Skill per spatial cross-validation fold"))
        curves = {k: (np.asarray(v["value"]), np.asarray(v["suitability"]))
                  for k, v in fit_summary.get("response_curves", {}).items()}
        if curves:
            figs.append((figures.plot_response_curves(curves), "Response curves (other variables at their median)"))
    block = f"{cv['block_km']:.0f} km blocks" if cv.get("block_km") else "random folds"
    rep.add_section("skill", paragraphs=[
        f"Method {fit_summary['method']}; {cv['n_folds']}-fold {cv['scheme']} cross-validation ({block}). "
        f"Threshold {fit_summary['threshold']['value']:.3f} by rule {fit_summary['threshold']['rule']}.",
        *(f"Collinear predictors: {p['a']} and {p['b']} (r = {p['r']:.2f})." for p in fit_summary["collinear_pairs"])],
        table=skill, figures=figs, table_caption="Cross-validated skill (mean and SD over folds)")

    maps = []
    now = open_layer(layout.now)
    land = np.isfinite(now)
    thr = fit_summary["threshold"]["value"]
    suit_rows = pd.DataFrame([{"name": s.name, "pathway": s.pathway, "climate_model": s.climate_model,
                               "horizon": s.horizon, "mess_path": s.mess_path, "novel_share": s.novel_share}
                              for s in suitability])
    if study.outputs.figures:
        maps.append((figures.map_continuous(now, title="Suitability today", label="suitability", vmin=0, vmax=1,
                                            land_mask=land, threshold_contour=thr), "Climatic suitability today"))
        horizon = int(suit_rows["horizon"].max())
        for pathway in sorted(set(suit_rows["pathway"])):
            mean = layout.ensemble(pathway, horizon, "mean")
            count = layout.ensemble(pathway, horizon, "count")
            if mean.exists():
                maps.append((figures.map_continuous(open_layer(mean), title=f"{pathway} {horizon}: ensemble mean",
                                                    label="suitability", vmin=0, vmax=1, land_mask=land,
                                                    threshold_contour=thr),
                             f"Mean suitability across climate models, pathway {pathway}, {horizon}"))
            if count.exists():
                n_models = int((suit_rows["pathway"] == pathway).sum() / suit_rows["horizon"].nunique())
                maps.append((figures.map_agreement(open_layer(count), n_models,
                                                   title=f"{pathway} {horizon}: models calling a cell suitable"),
                             "Agreement among climate models"))
            worst = suit_rows[(suit_rows["pathway"] == pathway) & (suit_rows["horizon"] == horizon)]
            mess_col = worst["mess_path"].dropna() if "mess_path" in worst else []
            if len(mess_col):
                maps.append((figures.map_mess(open_layer(mess_col.iloc[0], band=1), land_mask=land),
                             f"Novel climate (MESS < 0), scenario {worst['name'].iloc[0]}"))
        from envelope.kernels.change import CHANGE_CLASSES

        for pathway in sorted(set(suit_rows["pathway"])):
            rows = suit_rows[(suit_rows["pathway"] == pathway) & (suit_rows["horizon"] == horizon)]
            if len(rows) and layout.change_map(rows["name"].iloc[0]).exists():
                name = rows["name"].iloc[0]
                ch = open_layer(layout.change_map(name), categorical=True)
                maps.append((figures.map_classes(ch.where(ch != 255), CHANGE_CLASSES, title=f"Range change: {name}",
                                                 colours=CHANGE_CLASS_COLOURS, land_mask=land),
                             f"Climatic range change, scenario {name} (one climate model)"))
        for row in reach_rows:
            classes = open_layer(row["classes"], categorical=True)
            front = json.loads(Path(row["front"]).read_text())
            lines = [(f["properties"]["year"], [np.asarray(c) for c in f["geometry"]["coordinates"]])
                     for f in front["features"]]
            maps.append((figures.map_classes(classes.where(classes != 255), REACH_CLASSES,
                                             title=f"Reach by {horizon}: {row['run']}",
                                             colours=REACH_CLASS_COLOURS, land_mask=land, front_lines=lines,
                                             arrival=open_layer(row["arrival"]) if Path(row["arrival"]).exists()
                                             else None),
                         f"Reach classes and expansion front (0.5 occupancy) — {row['run']}"))
    rep.add_section("maps", figures=maps)

    tables = []
    if change and layout.change_table.exists():
        ct = pd.read_csv(layout.change_table)
        cols = [c for c in ("name", "pathway", "climate_model", "horizon", "range_km2.now", "range_km2.future",
                            "range_change_pct", "area_km2.gained", "area_km2.gained_novel", "area_km2.lost", "leading_edge_shift_km",
                            "centroid_shift_km") if c in ct]
        shown = ct[cols].round(1)
        shown["horizon"] = shown["horizon"].astype(str)  # a year, not a quantity
        rep.add_section("areas", table=shown, table_caption="Range change by scenario (km², km, %); gained "
                        "excludes gained in novel climate, listed apart")
        if study.outputs.figures and {"range_km2.future", "range_km2.now"} <= set(ct):
            tables.append((figures.plot_range_sizes(ct.rename(columns={"range_km2.future": "range_km2_future",
                                                                       "range_km2.now": "range_km2_now"})),
                           "Suitable range by pathway and horizon"))
    if reach_rows:
        rs = []
        for row in reach_rows:
            s = json.loads(Path(row["summary"]).read_text())
            rs.append({"scenario": row["run"], **s["area_km2"], "reached_share_of_gain": s["reached_share_of_gain"],
                       "front_advance_km": s["front_advance_km"],
                       "spread_rate_km_per_decade": s["spread_rate_km_per_decade"]})
        rs = pd.DataFrame(rs)
        # the habitat is the same in every run: its fragmentation table is taken from the first
        frag = json.loads(Path(reach_rows[0]["summary"]).read_text()).get("fragmentation_by_latitude")
        if study.outputs.figures:
            tables.append((figures.plot_gain_split(rs), "Climatic gain reached, not reached, without habitat"))
            if frag and frag["bands"]:
                tables.append((figures.plot_mesh_size_by_latitude(pd.DataFrame(frag["bands"])),
                               f"Habitat (fraction >= {frag['habitat_threshold']:g}) by {frag['band_deg']:g}° "
                               "latitude band: effective mesh size (Jaeger 2000) and habitat share of land"))
        rep.add_section("reach", "Reachable gains", paragraphs=[
            "Reach runs step habitat-gated dispersal through the ensemble-mean suitability of each pathway; "
            "suitability between the given horizons is interpolated linearly in time (an assumption). "
            "The held-climate run keeps today's climate: the difference between it and a pathway is what the "
            "changing climate opens, beyond what habitat and dispersal allow anyway.",
            *([f"Habitat fragmentation by latitude: {frag['statement']}."] if frag else [])],
            table=rs.round(3), figures=tables, table_caption="Reach by pathway (km²)")
    novel = suit_rows["novel_share"].max() if "novel_share" in suit_rows else None
    rep.add_section("cautions", paragraphs=[
        f"Up to {novel:.1%} of the area has climate outside the training range (MESS < 0) in at least one scenario; "
        "predictions there are extrapolations." if novel is not None and np.isfinite(novel) else
        "Check the MESS maps for novel climate."])
    rep.add_section("methods", paragraphs=[
        "Presence/background point-process model (penalised logistic regression with weighted background, "
        "complementary log-log output), spatial block cross-validation, MESS against the training climate, "
        "habitat-gated integrodifference spread. Equations and references: docs/methods.md and docs/dispersal.md."])
    rep.write(layout.report, overwrite=True)
    return layout.report
