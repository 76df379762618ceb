"""The study file's ``[margins]`` table and the report's "Observed so far" section (margins and hindcast).

Kept apart from the schema and the report so the two can change independently: the schema
calls :func:`margins_section` and the report calls :func:`observed_so_far_html`.
"""

from __future__ import annotations

import html
from dataclasses import dataclass
from pathlib import Path

from envelope.errors import InputError

__all__ = ["MARGINS_KEYS", "MarginsSection", "margins_section", "observed_so_far_html"]

#: Keys allowed in ``[margins]``; each is named as the `envelope margins` option.
MARGINS_KEYS = ("periods", "species", "n_cells", "min_records", "bootstrap", "effort", "elevation",
                "effort_correction", "hindcast_climate")


@dataclass(frozen=True)
class MarginsSection:
    """``[margins]``: observed margin shifts between two recording periods, and an optional hindcast."""

    periods: tuple
    species: str | None = None
    n_cells: int = 10
    min_records: float = 5
    bootstrap: int = 1000
    effort: Path | None = None
    elevation: Path | None = None
    effort_correction: bool = True
    hindcast_climate: tuple[Path, Path] | None = None   # climate of the first and second period


def margins_section(checker, doc) -> MarginsSection | None:
    """Validate ``[margins]`` with the schema's checker (its messages name the file and dotted key)."""
    t = checker.table(doc, "margins", MARGINS_KEYS)
    if t is None:
        return None
    from envelope.margins import parse_periods

    raw = checker.required(t, "margins", "periods", 'two periods, e.g. "1970-1989,2000-2019" or [[1970, 1989], '
                                                     '[2000, 2019]]')
    try:
        periods = parse_periods(raw, where="margins.periods")
    except InputError as exc:
        raise InputError(f"{checker.source}: {exc}") from None
    species = t.get("species")
    if species is not None:
        checker.string("margins.species", species)
    n_cells = int(checker.number("margins.n_cells", t.get("n_cells", 10), integer=True, ge=1))
    min_records = float(checker.number("margins.min_records", t.get("min_records", 5), ge=0))
    bootstrap = int(checker.number("margins.bootstrap", t.get("bootstrap", 1000), integer=True, ge=0))
    effort = t.get("effort")
    effort = None if effort is None else checker.file("margins.effort", effort, what="an effort raster")
    elevation = t.get("elevation")
    elevation = None if elevation is None else checker.file("margins.elevation", elevation, what="an elevation raster")
    correction = checker.boolean("margins.effort_correction", t.get("effort_correction", True))
    hc = t.get("hindcast_climate")
    if hc is not None:
        if not isinstance(hc, list) or len(hc) != 2:
            checker.bad("margins.hindcast_climate", "two climate grid paths (first period, second period)", hc)
        hc = tuple(checker.file(f"margins.hindcast_climate[{i + 1}]", p, what="a climate grid")
                   for i, p in enumerate(hc))
    return MarginsSection(periods=tuple((p.first, p.last) for p in periods), species=species, n_cells=n_cells,
                          min_records=min_records, bootstrap=bootstrap, effort=effort, elevation=elevation,
                          effort_correction=correction, hindcast_climate=hc)


def _km(value) -> str:
    return "–" if value is None else f"{value:+.0f} km"


def observed_so_far_html(margins: dict | None, hindcast: dict | None = None) -> str:
    """The "Observed so far" report section: observed margin shifts and, when run, the hindcast.

    Empty string when there is nothing observed (the records do not span two periods).
    """
    if not margins:
        return ""
    a, b = margins["periods"]
    rows = []
    for side in ("poleward", "equatorward"):
        interval = margins.get(f"{side}_margin_shift_interval_km")
        text = "" if not interval else f" ({interval[0]:+.0f} to {interval[1]:+.0f})"
        rows.append(f"<tr><td>{side} margin</td><td>{_km(margins.get(f'{side}_margin_shift_km'))}{text}</td></tr>")
    if margins.get("elevation_shift_m") is not None:
        rows.append(f"<tr><td>mean elevation</td><td>{margins['elevation_shift_m']:+.0f} m</td></tr>")
    used = margins.get("n_cells_used", {})
    parts = ["<section><h2>Observed so far</h2>",
             f"<p>Margin shifts of the records between {html.escape(a)} and {html.escape(b)}: mean latitude "
             f"of the {margins.get('n_cells', 10)} most poleward (equatorward) occupied cells, km along the "
             f"meridian, positive = poleward, 95 % bootstrap interval in brackets; cells used "
             f"{used.get(a, '–')} and {used.get(b, '–')}"
             + ("" if (margins.get("effort_correction") or {}).get("applied") is False
                else ", only cells recorded well in both periods") + ".</p>",
             "<table>" + "".join(rows) + "</table>"]
    if hindcast:
        parts.append("<table><tr><th>model</th><th>AUC</th><th>Boyce</th><th>poleward shift predicted</th>"
                     "<th>observed</th></tr>")
        for key in ("forward", "backward"):
            r = hindcast[key]
            parts.append(f"<tr><td>fitted {html.escape(r['fit_period'])}, tested on "
                         f"{html.escape(r['projected_period'])}</td><td>{r['auc']:.3f}</td><td>{r['boyce']:.3f}</td>"
                         f"<td>{_km(r['predicted_poleward_margin_shift_km'])}</td>"
                         f"<td>{_km(r['observed_poleward_margin_shift_km'])}</td></tr>")
        parts.append("</table>")
    parts.append("<p>Records of two periods differ in effort and method; an observed shift is evidence to weigh "
                 "with local expertise and statutory guidance, not a forecast.</p></section>")
    return "\n".join(parts)
