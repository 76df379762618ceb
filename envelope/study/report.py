"""The study report: figures and tables of one run assembled into a self-contained HTML file."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd


def build_report(study, layout, *, fit_summary, suitability, change=True, reach_rows=()):
    """Write the run's report (``layout.report``): findings, question, data, skill, maps, areas, reach, cautions, ...

    ``layout`` is the run's :class:`envelope.study.layout.RunLayout`, ``suitability`` the rows
    of its suitability table (:func:`envelope.io.tables.read_scenarios`), ``reach_rows`` the
    runner's list of reach runs and their files.
    """
    from envelope import figures
    from envelope.io.rasters import open_layer
    from envelope.study.html import Report, records_table

    from envelope.study.findings import assumptions_table, findings, partition_frame

    rep = Report(study.study.name, f"Species: {study.study.species}" if study.study.species else "")
    summaries = {row["run"]: json.loads(Path(row["summary"]).read_text()) for row in reach_rows}
    pathway_summaries = {k: v for k, v in summaries.items() if k != "held-climate"}
    partition = (pd.read_csv(layout.uncertainty_partition) if layout.uncertainty_partition.exists() and reach_rows
                 else None)
    opening = findings(pathway_summaries, partition)
    if opening:
        rep.add_section("findings", paragraphs=[" ".join(opening)])
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
    horizon = int(suit_rows["horizon"].max())
    if study.outputs.figures:
        maps += _suitability_maps(layout, suit_rows, now, land, thr, horizon)
        maps += _per_model_maps(layout, suit_rows, land, horizon)
        maps += _reach_maps(reach_rows, summaries, land, horizon)
    rep.add_section("maps", figures=maps)

    tables = []
    if change and layout.change_table.exists():
        ct = pd.read_csv(layout.change_table)
        rep.add_section("areas", table=_change_frame(ct), table_caption="Range change by scenario (areas in km², "
                        "shifts in km, change in % of today's range); gained excludes gained in novel climate, "
                        "listed apart; stable in novel climate is part of stable")
        if study.outputs.figures and {"range_km2.future", "range_km2.now"} <= set(ct):
            tables.append((figures.plot_range_sizes(ct.rename(columns={"range_km2.future": "range_km2_future",
                                                                       "range_km2.now": "range_km2_now"})),
                           "Suitable range by pathway and horizon"))
    if reach_rows:
        rs = pd.DataFrame([_reach_row(run, s) for run, s in summaries.items()])
        # the habitat is the same in every run: its fragmentation table is taken from the first
        frag = next(iter(summaries.values())).get("fragmentation_by_latitude")
        if study.outputs.figures:
            split = pd.DataFrame([{"scenario": run, **{k: s["area_km2"][k] for k in
                                                      ("gained_reached", "gained_unreached", "gained_no_habitat")}}
                                  for run, s in summaries.items()])
            tables.append((figures.plot_gain_split(split), "Climatic gain reached, not reached, without habitat "
                                                           "(medians over runs)"))
            if frag and frag["bands"]:
                tables.append((figures.plot_mesh_size_by_latitude(pd.DataFrame(frag["bands"])),
                               f"Habitat (fraction >= {frag['habitat_threshold']:g}) by {frag['band_deg']:g}° "
                               "latitude band: effective mesh size (Jaeger 2000) and habitat share of land"))
        first = next(iter(summaries.values()))
        rep.add_section("reach", "Reachable gains", paragraphs=[
            "Each pathway's reach is run on every climate model's own suitability (not on their mean), at each "
            "assumed dispersal distance" + (" and for each modelling method" if len(study.model.methods) > 1 else "")
            + "; the table gives the median over these runs with the 5–95 % range across them. Suitability "
            "between the given horizons is interpolated linearly in time (an assumption). The held-climate run "
            "keeps today's climate: the difference between it and a pathway is what the changing climate opens, "
            "beyond what habitat and dispersal allow anyway.",
            *([f"Habitat fragmentation by latitude: {frag['statement']}."] if frag else [])],
            table=rs, figures=tables, table_caption="Reach by pathway: medians over runs, 5–95 % in brackets; "
                                                    "areas in km², shares in % of the climatic gain")
        rep.add_section("assumptions", "Dispersal assumptions", table=assumptions_table(study.dispersal, first),
                        table_caption="The assumptions every reach result rests on")
        if partition is not None and len(partition):
            rep.add_section("uncertainty", "Where the uncertainty comes from", paragraphs=[
                "The spread between runs split by source, as in an analysis of variance of the ensemble "
                "(Diniz-Filho et al. 2009; Buisson et al. 2010): each share is the part of the variance across runs "
                "(in % of the total) due to one source or interaction; the shares of one quantity add to 100 %. "
                "Sources with a single level in this study (one method, one distance) carry no share."],
                table=partition_frame(partition),
                figures=[(figures.plot_partition(partition), "Share of the variance across runs by source")]
                if study.outputs.figures else None, table_caption="Variance shares by source (% of the total)")
            rep.add_references([
                "Diniz-Filho, J. A. F. et al. (2009). Partitioning and mapping uncertainties in ensembles of "
                "forecasts of species turnover under climate change. Ecography 32, 897-906.",
                "Buisson, L. et al. (2010). Uncertainty in ensemble forecasting of species distribution. "
                "Global Change Biology 16, 1145-1157."])
    novel = suit_rows["novel_share"].max() if "novel_share" in suit_rows else None
    cautions = [
        f"Up to {novel:.1%} of the area has climate outside the training range (MESS < 0) in at least one scenario; "
        "predictions there are extrapolations." if novel is not None and np.isfinite(novel) else
        "Check the MESS maps for novel climate."]
    if reach_rows:
        cautions.append(
            "Dispersal: the reached share of the gain rests directly on the assumed kernel, distance per step, "
            "colonisation rate and persistence (see Dispersal assumptions), which for most species are poorly "
            "known. The intervals span only the runs made here (the climate models, distances and replicates "
            "listed), not every way dispersal could differ; take the values from field evidence where it exists.")
    observed = _observed_html(layout)
    if observed:
        rep.add_section("observed", "Observed so far", html=observed)
    rep.add_section("cautions", paragraphs=cautions)
    rep.add_section("methods", paragraphs=[
        "Presence/background point-process model (penalised logistic regression with weighted background, "
        "complementary log-log output), spatial block cross-validation, MESS against the training climate, "
        "habitat-gated integrodifference spread. Equations and references: docs/methods.md and docs/dispersal.md."])
    rep.write(layout.report, overwrite=True)
    return layout.report


_CHANGE_HEADERS = {"name": "Scenario", "pathway": "Pathway", "climate_model": "Climate model", "horizon": "Year",
                   "range_km2.now": "Range today (km²)", "range_km2.future": "Future range (km²)",
                   "range_change_pct": "Change", "area_km2.gained": "Gained (km²)",
                   "area_km2.gained_novel": "Gained, novel climate (km²)", "area_km2.stable_novel":
                   "Stable, novel climate (km²)", "area_km2.lost": "Lost (km²)",
                   "leading_edge_shift_km": "Leading edge shift (km)", "centroid_shift_km": "Centroid shift (km)"}


def _change_frame(ct: pd.DataFrame) -> pd.DataFrame:
    """The change table with human headers, whole km² with separators and the change in %."""
    from envelope.study.findings import format_km, format_km2

    out = {}
    for col, head in _CHANGE_HEADERS.items():
        if col not in ct:
            continue
        v = ct[col]
        if col == "range_change_pct":
            out[head] = [("–" if not np.isfinite(x) else f"{x:+.1f} %") for x in v.astype(float)]
        elif col.startswith(("range_km2", "area_km2")):
            out[head] = [format_km2(float(x)) for x in v]
        elif col.endswith("_km"):
            out[head] = [format_km(float(x)) for x in v]
        else:
            out[head] = v.astype(str).tolist()
    return pd.DataFrame(out)


def _with_interval(value, interval, fmt) -> str:
    if not interval or interval.get("p05") is None:
        return fmt(value)
    return f"{fmt(value)} ({fmt(interval['p05'])}–{fmt(interval['p95'])})"


def _reach_row(run: str, s: dict) -> dict:
    """One row of the reach table: medians with their 5–95 % interval, human headers."""
    from envelope.study.findings import format_km, format_km2, format_share

    iv = s.get("intervals", {})
    area = iv.get("area_km2", {})
    return {"Run": run,
            "Gained, reached (km²)": _with_interval(s["area_km2"]["gained_reached"], area.get("gained_reached"),
                                                    format_km2),
            "Gained, not reached (km²)": _with_interval(s["area_km2"]["gained_unreached"],
                                                        area.get("gained_unreached"), format_km2),
            "Gained, no habitat (km²)": _with_interval(s["area_km2"]["gained_no_habitat"],
                                                       area.get("gained_no_habitat"), format_km2),
            "Reached share of the gain": _with_interval(s["reached_share_of_gain"],
                                                        iv.get("reached_share_of_gain"), format_share),
            "Front advance (km)": _with_interval(s["front_advance_km"], iv.get("front_advance_km"), format_km),
            "Runs": f"{s.get('n_runs', 1):,}"}


def _suitability_maps(layout, suit_rows, now, land, thr, horizon) -> list:
    """Suitability today; per pathway the ensemble mean and the models' agreement at the last horizon."""
    from envelope import figures
    from envelope.io.rasters import open_layer

    maps = [(figures.map_continuous(now, title="Suitability today", label="suitability", vmin=0, vmax=1,
                                    land_mask=land, threshold_contour=thr), "Climatic suitability today")]
    for pathway in sorted(set(suit_rows["pathway"])):
        mean, count = layout.ensemble(pathway, horizon, "mean"), layout.ensemble(pathway, horizon, "count")
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
    return maps


def _per_model_maps(layout, suit_rows, land, horizon) -> list:
    """MESS and range change at the last horizon for every climate model, as small multiples per pathway."""
    from envelope import figures
    from envelope.io.rasters import open_layer
    from envelope.kernels.change import CHANGE_CLASSES
    from envelope.palettes import CHANGE_CLASS_COLOURS, change_cmap

    maps = []
    for pathway in sorted(set(suit_rows["pathway"])):
        rows = suit_rows[(suit_rows["pathway"] == pathway) & (suit_rows["horizon"] == horizon)]
        mess = {r["climate_model"]: open_layer(r["mess_path"], band=1) for _, r in rows.iterrows()
                if isinstance(r["mess_path"], (str, Path)) and Path(r["mess_path"]).exists()}
        if mess:
            values = np.concatenate([np.abs(np.asarray(m.values, dtype=float)).ravel() for m in mess.values()])
            limit = float(np.nanpercentile(values, 98)) or 1.0
            shares = "; ".join(f"{cm} {100 * r:.1f} %" for cm, r in zip(rows["climate_model"], rows["novel_share"])
                               if r is not None and np.isfinite(r))
            maps.append((figures.map_small_multiples(mess, cmap=change_cmap(), vmin=-limit, vmax=limit,
                                                     label="MESS (negative = novel climate)", land_mask=land,
                                                     zero_contour=True, title=f"Novel climate, {pathway} {horizon}"),
                         f"MESS for every climate model, pathway {pathway}, {horizon}; the black line is MESS = 0. "
                         f"Share of the land area in novel climate: {shares}"))
        change = {r["climate_model"]: open_layer(layout.change_map(r["name"]), categorical=True)
                  for _, r in rows.iterrows() if layout.change_map(r["name"]).exists()}
        if change:
            maps.append((figures.map_small_multiples({k: v.where(v != 255) for k, v in change.items()},
                                                     categories=CHANGE_CLASSES, colours=CHANGE_CLASS_COLOURS,
                                                     land_mask=land, title=f"Range change, {pathway} {horizon}"),
                         f"Climatic range change for every climate model, pathway {pathway}, {horizon}"))
    return maps


def _reach_maps(reach_rows, summaries, land, horizon) -> list:
    """Per reach run: classes with the fronts by year, the arrival years, and the probability of reach."""
    from envelope import figures
    from envelope.io.rasters import open_layer
    from envelope.palettes import REACH_CLASS_COLOURS, year_cmap
    from envelope.reach import REACH_CLASSES

    maps = []
    for row in reach_rows:
        run, n = row["run"], summaries[row["run"]].get("n_runs", 1)
        classes = open_layer(row["classes"], categorical=True)
        front = json.loads(Path(row["front"]).read_text())
        lines = [(f["properties"]["year"], [np.asarray(c) for c in f["geometry"]["coordinates"]])
                 for f in front["features"]]
        maps.append((figures.map_classes(classes.where(classes != 255), REACH_CLASSES,
                                         title=f"Reach by {horizon}: {run}", colours=REACH_CLASS_COLOURS,
                                         land_mask=land, front_lines=lines),
                     f"Reach classes (the class most of the {n} runs give each cell) and the expansion front by "
                     f"year (where half of the climate paths hold the cell) — {run}"))
        if Path(row["arrival"]).exists():
            arrival = open_layer(row["arrival"])
            if np.isfinite(np.asarray(arrival.values, dtype=float)).any():
                maps.append((figures.map_arrival(arrival, title=f"Arrival year: {run}", land_mask=land),
                             f"First year a cell is occupied (median over climate paths; blank = not reached) — {run}"))
        if row.get("probability") and Path(row["probability"]).exists():
            maps.append((figures.map_continuous(open_layer(row["probability"]), title=f"Probability of reach: {run}",
                                                label=f"share of the {n} runs reaching the cell", vmin=0, vmax=1,
                                                cmap=year_cmap().reversed(), land_mask=land),
                         f"Share of runs in which the cell is occupied by {horizon} — {run}"))
    return maps


def _observed_html(layout) -> str:
    """The "Observed so far" section from the run's margins (and hindcast) summaries, or ""."""
    from envelope.study.observed import observed_so_far_html

    if not layout.margins_summary.exists():
        return ""
    margins = json.loads(layout.margins_summary.read_text())
    hindcast = json.loads(layout.hindcast_summary.read_text()) if layout.hindcast_summary.exists() else None
    return observed_so_far_html(margins, hindcast)
