"""The findings of a study report: sentences and tables generated from the run's own numbers."""

from __future__ import annotations

import math

import pandas as pd

__all__ = ["SOURCE_NAMES", "assumptions_table", "findings", "format_km", "format_km2", "format_share",
           "partition_frame", "source_name"]

#: Human names of the partition's sources (factor columns of the reach runs).
SOURCE_NAMES = {"method": "modelling method", "climate_model": "climate model", "pathway": "pathway",
                "distance_km": "dispersal distance", "replicates": "replicates (chance in the spread)"}


def format_km2(value) -> str:
    """Area in km², whole km² with thousands separators (the unit is added by the caller)."""
    return "–" if value is None or not math.isfinite(value) else f"{value:,.0f}"


def format_km(value) -> str:
    """Distance in km, whole km."""
    return "–" if value is None or not math.isfinite(value) else f"{value:,.0f}"


def format_share(value) -> str:
    """A share 0-1 as a whole percentage."""
    return "–" if value is None or not math.isfinite(value) else f"{100 * value:.0f} %"


def source_name(source: str) -> str:
    """``climate_model:pathway`` -> ``climate model × pathway``."""
    return " × ".join(SOURCE_NAMES.get(part, part) for part in str(source).split(":"))


def _interval(summary, *keys):
    node = summary.get("intervals", {})
    for k in keys:
        node = (node or {}).get(k)
    return node or {}


def pathway_sentences(pathway: str, summary: dict) -> list:
    """Two sentences on one pathway: the gain, its reached share and front advance; what limits the rest."""
    a = summary["area_km2"]
    horizon = f"{summary['horizon_years'][-1]:g}"
    share, front = summary["reached_share_of_gain"], summary["front_advance_km"]
    si, fi = _interval(summary, "reached_share_of_gain"), _interval(summary, "front_advance_km")
    ri = _interval(summary, "area_km2", "gained_reached")
    n = summary.get("n_runs", 1)
    first = (f"Under pathway {pathway}, by {horizon} the species reaches {format_km2(a['gained_reached'])} km² of "
             f"newly suitable climate (median of {n} runs; 5–95 %: {format_km2(ri.get('p05'))}–"
             f"{format_km2(ri.get('p95'))} km²), {format_share(share)} of the gain (5–95 %: "
             f"{format_share(si.get('p05'))}–{format_share(si.get('p95'))}), and its front advances "
             f"{format_km(front)} km (5–95 %: {format_km(fi.get('p05'))}–{format_km(fi.get('p95'))} km).")
    unreached, no_habitat = a["gained_unreached"] or 0.0, a["gained_no_habitat"] or 0.0
    if unreached + no_habitat <= 0:
        limit = "nothing of the gain is left unreached."
    elif unreached >= no_habitat:
        limit = "dispersal, more than habitat, limits the rest."
    else:
        limit = "habitat, more than dispersal, limits the rest."
    second = (f"Of the gain not reached, {format_km2(unreached)} km² has habitat but lies beyond dispersal and "
              f"{format_km2(no_habitat)} km² has no habitat: {limit}")
    return [first, second]


def partition_sentence(partition: pd.DataFrame) -> str | None:
    """Which source holds the largest share of the variance of each quantity."""
    if partition is None or partition.empty:
        return None
    parts = []
    for quantity, what in (("reachable_gain_km2", "reachable gain"), ("range_change_km2", "range change")):
        rows = partition[partition["quantity"] == quantity]
        if len(rows):
            top = rows.loc[rows["share"].idxmax()]
            parts.append(f"{what} mostly on the {source_name(top['source'])} "
                         f"({format_share(float(top['share']))} of its variance across runs)")
    if not parts:
        return None
    return "The spread between runs rests for " + " and for ".join(parts) + "."


def findings(summaries: dict, partition: pd.DataFrame | None = None) -> list:
    """The report's opening sentences: two per pathway (``{pathway: reach summary}``), then the partition."""
    out = []
    for pathway, summary in summaries.items():
        out.extend(pathway_sentences(pathway, summary))
    sentence = partition_sentence(partition)
    if sentence:
        out.append(sentence)
    return out


def partition_frame(partition: pd.DataFrame) -> pd.DataFrame:
    """The partition as a report table: quantity, source (human names) and share in %."""
    what = {"reachable_gain_km2": "reachable gain (km²)", "range_change_km2": "range change (km²)"}
    return pd.DataFrame({"Quantity": [what.get(q, q) for q in partition["quantity"]],
                         "Source of variance": [source_name(s) for s in partition["source"]],
                         "Share of variance": [format_share(float(v)) for v in partition["share"]]})


def assumptions_table(dispersal, summary: dict) -> pd.DataFrame:
    """The dispersal assumptions of the reach runs, one row each (values as text with units)."""
    levels = summary.get("mean_distance_levels_km") or [summary["mean_distance_km"]]
    steps = math.ceil((summary["horizon_years"][-1] - summary["start_year"]) / summary["step_years"] - 1e-9)
    kernel = summary["kernel"] + (f" (shape {summary['shape']:g})" if summary.get("shape") else "")
    rows = [
        ("Dispersal kernel", kernel),
        ("Mean dispersal distance per step", ", ".join(f"{d:g}" for d in levels) + " km"),
        ("Years per step", f"{summary['step_years']:g}"),
        ("Steps", f"{steps:,} ({summary['start_year']:g}–{summary['horizon_years'][-1]:g})"),
        ("Colonisation rate per step", f"{summary['rate']:g}"),
        ("Persistence in unsuitable climate", f"{summary['persistence_years']:g} years"),
        ("Replicates per setting", "none (deterministic expected occupancy)" if not dispersal.replicates
         else f"{dispersal.replicates:,} stochastic"),
        ("Runs per pathway", f"{summary.get('n_runs', 1):,}"),
    ]
    return pd.DataFrame(rows, columns=["Assumption", "Value"])
