"""One self-contained HTML report of a study: inline CSS, embedded PNG figures, no scripts, no requests."""

from __future__ import annotations

import base64
import datetime as _dt
import html
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from envelope.errors import InputError
from envelope.io.atomic import atomic_output

__all__ = ["Report", "FIXED_SECTIONS", "DEFAULT_CAUTIONS", "DEFAULT_REFERENCES", "records_table"]

#: The sections every study report has, in this order: (id, heading).
FIXED_SECTIONS = (
    ("findings", "Findings"),
    ("question", "The question"),
    ("data", "Records used"),
    ("skill", "Model skill"),
    ("maps", "Maps"),
    ("areas", "Areas by scenario"),
    ("cautions", "Cautions"),
    ("methods", "Methods"),
    ("references", "References"),
)

#: Custom sections are placed before this fixed section (so cautions, methods and
#: references always close the report).
_CUSTOM_BEFORE = "cautions"

#: Default text of the cautions section (our wording). The study runner may add to it.
DEFAULT_CAUTIONS = (
    "These maps show where the climate is predicted to suit the species, not where the "
    "species is. A model of this kind assumes that today's records show the species in "
    "balance with today's climate (equilibrium), and that the climate the species can live "
    "in will stay the same while the climate moves (niche conservatism). Neither is certain: "
    "a species held back by competitors, disease, dispersal or history occupies less than "
    "its climate allows, and populations may adapt or acclimatise.",
    "The future grids are scenarios, not forecasts. Each climate model and emission pathway "
    "carries its own uncertainty, and the spread between the climate models shown here is "
    "only part of it; the downscaling used to make the grids adds more.",
    "Where a scenario's climate lies outside the range met in the records, the model "
    "extrapolates. Predictors were held at the edge of their training range (clamped) "
    "there, which keeps predictions bounded but does not make them reliable. The novel-climate "
    "map (MESS) marks these places: treat any prediction where MESS is negative as unsupported "
    "by data.",
    "Records are seldom collected evenly: towns, roads and coasts are visited more often. "
    "Unless that sampling bias was modelled, part of what looks like climatic preference may "
    "be where people looked.",
    "Where the ensemble members disagree (see the agreement map), the result is uncertain; "
    "a cell suitable in only some members should not be read as suitable.",
    "Use these results as one line of evidence. Decisions on land, protection or management "
    "should be taken with local expertise, under the statutory guidance that applies, and "
    "with the advice of qualified, and where required licensed, professionals.",
)

#: References for what the report itself shows (palettes, MESS); the study adds its own.
DEFAULT_REFERENCES = (
    "Elith, J., Kearney, M. & Phillips, S. (2010). The art of modelling range-shifting "
    "species. Methods in Ecology and Evolution 1, 330-342. doi:10.1111/j.2041-210X.2010.00036.x",
    "Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make figures and "
    "presentations that are friendly to colorblind people. https://jfly.uni-koeln.de/color/",
    "Machado, G. M., Oliveira, M. M. & Fernandes, L. A. F. (2009). A physiologically-based "
    "model for simulation of color vision deficiency. IEEE Transactions on Visualization and "
    "Computer Graphics 15(6), 1291-1298. doi:10.1109/TVCG.2009.113",
    "Crameri, F., Shephard, G. E. & Heron, P. J. (2020). The misuse of colour in science "
    "communication. Nature Communications 11, 5444. doi:10.1038/s41467-020-19160-7",
)

_ID_RE = re.compile(r"^[a-z][a-z0-9_-]{0,63}$")
_PNG_URI = "data:image/png;base64,"
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
# Raw HTML handed to add_section must not reach outside the file or run code.
_FORBIDDEN_HTML = re.compile(
    r"<\s*(script|iframe|object|embed|link|base|meta)\b|\bon[a-z]+\s*=|"
    r"\b(src|href|srcset|action|poster|data)\s*=\s*[\"']?\s*(https?:|//|javascript:|file:)|"
    r"url\(\s*[\"']?\s*(https?:|//)|@import",
    re.IGNORECASE,
)

_CSS = """
:root { color-scheme: light; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #111;
  background: #fff; max-width: 62rem; margin: 0 auto; padding: 1.5rem 1.5rem 3rem;
  line-height: 1.5; font-size: 15px; }
header { border-bottom: 3px solid #111; margin-bottom: 1rem; }
h1 { font-size: 1.7rem; margin: 0 0 .2rem; }
.subtitle { font-size: 1.05rem; margin: 0 0 .6rem; color: #333; }
h2 { font-size: 1.3rem; border-bottom: 1px solid #555; padding-bottom: .15rem; margin-top: 2rem; }
nav.toc { border: 1px solid #555; padding: .4rem 1rem; margin: 1rem 0; }
nav.toc h2 { border: none; margin: .2rem 0; font-size: 1.05rem; }
nav.toc ol { margin: .2rem 0 .4rem; }
a { color: #0b4f8a; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .92rem; max-width: 100%; }
caption { text-align: left; font-weight: bold; padding-bottom: .2rem; }
th, td { border: 1px solid #444; padding: .2rem .55rem; vertical-align: top; overflow-wrap: anywhere; }
section#findings p { font-size: 1.05rem; }
th { background: #e8e8e8; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 1rem 0 1.4rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #bbb; }
figcaption { font-size: .92rem; margin-top: .25rem; }
figcaption .label { font-weight: bold; }
.empty { font-style: italic; color: #444; }
section#cautions { border: 2px solid #111; padding: .2rem 1rem .6rem; margin-top: 2rem; }
section#cautions h2 { border-bottom: none; }
section#cautions h2::before { content: "\\26A0\\FE0E  "; }
ol.references li { margin-bottom: .35rem; overflow-wrap: anywhere; }
footer { margin-top: 2.5rem; border-top: 1px solid #555; font-size: .85rem; color: #333; }
@media print {
  body { max-width: none; padding: 0; font-size: 11pt; }
  a { color: #000; text-decoration: none; }
  nav.toc { page-break-after: always; }
  h2 { page-break-after: avoid; }
  figure, table, section#cautions { page-break-inside: avoid; }
  th { background: none; border-bottom: 2px solid #000; }
}
"""


def records_table(kept: int, dropped: dict[str, int]) -> pd.DataFrame:
    """Table for the ``data`` section: records kept and dropped, by reason, with a total.

    Parameters
    ----------
    kept : int
        Records used in the fit.
    dropped : dict[str, int]
        Reason -> number of records dropped for it.
    """
    rows = [("kept", "used in the model", int(kept))]
    rows += [("dropped", str(reason), int(n)) for reason, n in dropped.items()]
    total = int(kept) + sum(int(n) for n in dropped.values())
    rows.append(("total", "records read", total))
    return pd.DataFrame(rows, columns=["status", "reason", "records"])


@dataclass
class _Section:
    id: str
    heading: str
    blocks: list[str] = field(default_factory=list)
    fixed: bool = False


def _format_cell(value) -> tuple[str, bool]:
    """Escaped text of a table cell and whether it is numeric (right-aligned)."""
    if isinstance(value, (bool, np.bool_)):
        return html.escape(str(bool(value))), False
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}", True
    if isinstance(value, (float, np.floating)):
        if not np.isfinite(value):
            return "–", True
        v = float(value)
        if v == round(v) and abs(v) >= 100:
            return f"{v:,.0f}", True
        return f"{v:,.3g}" if abs(v) < 100 else f"{v:,.1f}", True
    return html.escape(str(value)), False


def _table_html(table: pd.DataFrame, caption: str | None = None) -> str:
    if not isinstance(table, pd.DataFrame):
        raise InputError(f"table: found {type(table).__name__}, expected a pandas DataFrame")
    out = ["<table>"]
    if caption:
        out.append(f"<caption>{html.escape(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f'<th scope="col">{html.escape(str(c))}</th>'
                                         for c in table.columns) + "</tr></thead><tbody>")
    for row in table.itertuples(index=False, name=None):
        cells = []
        for value in row:
            text, numeric = _format_cell(value)
            cells.append(f'<td class="num">{text}</td>' if numeric else f"<td>{text}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _image_uri(image, where: str) -> str:
    """A checked ``data:image/png;base64,`` URI from a Figure, PNG bytes or a data URI."""
    from matplotlib.figure import Figure

    if isinstance(image, Figure):
        from envelope.figures import figure_to_data_uri

        return figure_to_data_uri(image)
    if isinstance(image, (bytes, bytearray)):
        if not bytes(image[:8]) == _PNG_MAGIC:
            raise InputError(f"{where}: found bytes that are not a PNG image, expected PNG bytes")
        return _PNG_URI + base64.b64encode(bytes(image)).decode("ascii")
    if isinstance(image, str):
        if not image.startswith(_PNG_URI):
            raise InputError(f"{where}: found {image[:40]!r}..., expected a Figure or a "
                             f"'{_PNG_URI}...' data URI (the report embeds every image)")
        try:
            raw = base64.b64decode(image[len(_PNG_URI):], validate=True)
        except ValueError as err:
            raise InputError(f"{where}: the data URI is not valid base64") from err
        if raw[:8] != _PNG_MAGIC:
            raise InputError(f"{where}: the data URI does not hold a PNG image")
        return image
    raise InputError(f"{where}: found {type(image).__name__}, expected a matplotlib Figure, "
                     "PNG bytes or a PNG data URI")


class Report:
    """Builder of a single self-contained HTML report.

    Every image is embedded as a PNG data URI and the CSS is inline, so the file opens
    anywhere offline and makes no request; there is no JavaScript. All text given as
    ``heading``, ``paragraphs``, captions and table cells is escaped; only ``html`` is
    taken as markup, and it is refused if it would load or link anything outside the file
    or run a script.

    Parameters
    ----------
    title : str
    subtitle : str, default=""
    generated : datetime or str, optional
        Shown in the footer; default the current UTC time. Pass a fixed value for
        byte-identical reports.

    Examples
    --------
    >>> r = Report("Range of the demo species", "baseline and two pathways")
    >>> r.add_section("question", paragraphs=["Where will the climate suit it in 2080?"])
    >>> "Where will the climate" in r.to_html()
    True
    """

    def __init__(self, title: str, subtitle: str = "", *, generated=None):
        if not str(title).strip():
            raise InputError("Report: title is empty; expected a title for the report")
        self.title = str(title)
        self.subtitle = str(subtitle or "")
        if generated is None:
            generated = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        self.generated = str(generated)
        self._sections: dict[str, _Section] = {
            sid: _Section(sid, heading, fixed=True) for sid, heading in FIXED_SECTIONS}
        self._figure_count = 0
        self._default_cautions = True
        self._references: list[str] = list(DEFAULT_REFERENCES)

    # -------------------------------------------------------------- building ----------
    def add_section(self, id: str, heading: str | None = None, html: str | None = None,
                    paragraphs=None, table: pd.DataFrame | None = None, figures=None, *,
                    table_caption: str | None = None) -> "Report":
        """Add content to a section (a fixed one such as ``"maps"``, or a new one).

        Parameters
        ----------
        id : str
            Section id (lower case letters, digits, ``-`` or ``_``; used as the anchor).
            A fixed id fills that section; an id already added appends to it; a new id
            makes a section placed before the cautions.
        heading : str, optional
            Heading; replaces a fixed section's default heading. Required for a new id.
        html : str, optional
            Trusted markup inserted as is (no scripts, no outside links or sources).
        paragraphs : str or list of str, optional
            Plain text, one paragraph each (escaped).
        table : DataFrame, optional
            Rendered as an HTML table (cells escaped, numbers right-aligned).
        figures : list of (Figure or PNG data URI or PNG bytes, caption), optional
            Figures are rendered to PNG and embedded; each is numbered.
        table_caption : str, optional

        Returns
        -------
        Report
            ``self``, for chaining.
        """
        if not isinstance(id, str) or not _ID_RE.match(id):
            raise InputError(f"section id {id!r}: expected lower-case letters, digits, '-' or '_' "
                             "starting with a letter (at most 64 characters)")
        section = self._sections.get(id)
        if section is None:
            if not heading:
                raise InputError(f"section {id!r}: a new section needs a heading")
            section = self._insert_custom(id, str(heading))
        elif heading:
            section.heading = str(heading)
        if id == "references" and paragraphs is not None:
            # paragraphs of the references section are citations: they join the list
            self.add_references(paragraphs)
            paragraphs = None
        blocks = []
        if html is not None:
            if _FORBIDDEN_HTML.search(str(html)):
                raise InputError(f"section {id!r}: html holds a script, an event handler or a link "
                                 "to something outside the report; the report must stay self-contained")
            blocks.append(str(html))
        if paragraphs is not None:
            if isinstance(paragraphs, str):
                paragraphs = [paragraphs]
            blocks.extend(f"<p>{_escape(p)}</p>" for p in paragraphs)
        if table is not None:
            blocks.append(_table_html(table, table_caption))
        for k, item in enumerate(figures or []):
            try:
                image, caption = item
            except (TypeError, ValueError) as err:
                raise InputError(f"section {id!r}: figures[{k}]: expected a pair (figure, caption)") from err
            uri = _image_uri(image, f"section {id!r}: figures[{k}]")
            self._figure_count += 1
            n = self._figure_count
            blocks.append(
                f'<figure id="figure-{n}"><img src="{uri}" alt="{_escape(caption)}">'
                f'<figcaption><span class="label">Figure {n}.</span> {_escape(caption)}'
                "</figcaption></figure>")
        section.blocks.extend(blocks)
        return self

    def set_default_cautions(self, keep: bool) -> "Report":
        """Keep (default) or drop the built-in cautions text."""
        self._default_cautions = bool(keep)
        return self

    def add_references(self, references) -> "Report":
        """Append citations (plain text, escaped; URLs are shown as text, not links)."""
        if isinstance(references, str):
            references = [references]
        for ref in references:
            text = str(ref).strip()
            if text and text not in self._references:
                self._references.append(text)
        return self

    def _insert_custom(self, sid: str, heading: str) -> _Section:
        new = _Section(sid, heading)
        items = list(self._sections.items())
        at = [k for k, _ in items].index(_CUSTOM_BEFORE)
        items.insert(at, (sid, new))
        self._sections = dict(items)
        return new

    @property
    def section_ids(self) -> list[str]:
        """Section ids in the order they appear."""
        return list(self._sections)

    # -------------------------------------------------------------- rendering ---------
    def _section_body(self, section: _Section) -> str:
        blocks = list(section.blocks)
        if section.id == "cautions" and self._default_cautions:
            blocks = [f"<p>{_escape(p)}</p>" for p in DEFAULT_CAUTIONS] + blocks
        if section.id == "references":
            items = "".join(f"<li>{_escape(r)}</li>" for r in self._references)
            blocks = ([f'<ol class="references">{items}</ol>'] if items else []) + blocks
        if not blocks:
            blocks = ['<p class="empty">Nothing was recorded for this section in this run.</p>']
        return "\n".join(blocks)

    def to_html(self) -> str:
        """The whole report as one HTML string."""
        from envelope import __version__

        toc = "".join(f'<li><a href="#{s.id}">{_escape(s.heading)}</a></li>'
                      for s in self._sections.values())
        body = "\n".join(
            f'<section id="{s.id}">\n<h2>{_escape(s.heading)}</h2>\n{self._section_body(s)}\n</section>'
            for s in self._sections.values())
        subtitle = f'<p class="subtitle">{_escape(self.subtitle)}</p>' if self.subtitle else ""
        return (
            "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{_escape(self.title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            f"<header><h1>{_escape(self.title)}</h1>{subtitle}</header>\n"
            f'<nav class="toc" aria-label="Contents"><h2>Contents</h2><ol>{toc}</ol></nav>\n'
            f"<main>\n{body}\n</main>\n"
            f"<footer><p>Made with envelope {_escape(__version__)} on {_escape(self.generated)}. "
            "This file is self-contained: it loads nothing from the network.</p></footer>\n"
            "</body>\n</html>\n")

    def write(self, path, overwrite: bool = False):
        """Write the report to ``path`` atomically (refuses to replace a file unless ``overwrite``).

        Returns
        -------
        pathlib.Path
        """
        text = self.to_html()  # render first: a failing figure leaves nothing behind
        with atomic_output(path, overwrite=overwrite) as tmp:
            tmp.write_text(text, encoding="utf-8")
        from pathlib import Path

        return Path(path)


def _escape(text) -> str:
    return html.escape(str(text), quote=True)
