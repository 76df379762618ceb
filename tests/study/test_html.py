"""Tests of envelope.study.html: a self-contained, escaped HTML report, atomic writes, Chromium render."""

import base64
import io
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from PIL import Image

from envelope import figures
from envelope.errors import InputError, OutputExistsError
from envelope.study.html import DEFAULT_CAUTIONS, FIXED_SECTIONS, Report, records_table

EVIL = '<script>alert("x")</script> & <img src="https://example.org/x.png">'


class Collect(HTMLParser):
    """Tags, attributes and the text of each section, from the stdlib HTML parser."""

    def __init__(self):
        super().__init__()
        self.tags, self.sections, self.h2 = [], [], []
        self._in_h2 = False
        self._section = None
        self.text_by_section = {}

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "section":
            self._section = attrs.get("id")
            self.sections.append(self._section)
        self._in_h2 = tag == "h2"

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False
        if tag == "section":
            self._section = None

    def handle_data(self, data):
        if self._in_h2:
            self.h2.append(data.strip())
        self.text_by_section.setdefault(self._section, []).append(data)


def parse(text):
    p = Collect()
    p.feed(text)
    return p


def small_figure():
    fig = Figure(figsize=(2, 1.5))
    ax = fig.subplots()
    ax.plot([0, 1], [1, 0])
    return fig


def build_report():
    r = Report("Demo <range> study", "baseline & 2080", generated="2026-01-01")
    r.add_section("question", paragraphs=["Where will the climate suit the species?", EVIL])
    r.add_section("data", table=records_table(440, {"outside the grid": 8, "duplicate cell": 10}),
                  table_caption="Records <kept> and dropped")
    r.add_section("skill", table=pd.DataFrame({"fold": [1, 2], "auc": [0.81, 0.9], "note": ["<b>", "a&b"]}))
    r.add_section("maps", figures=[(small_figure(), "Suitability <now>"),
                                   (figures.figure_to_data_uri(small_figure()), "Change & gain")])
    r.add_section("areas", table=pd.DataFrame({"scenario": ["low 2050"], "range_km2": [12345.678]}))
    r.add_section("dispersal", "Dispersal <check>", paragraphs="Fronts move 2 km/yr.")
    r.add_section("cautions", paragraphs=["Extra caution from the study."])
    r.add_section("methods", html="<p>Fitted with <em>our</em> point-process model.</p>")
    r.add_references(["Someone, A. (2020). A paper. https://doi.org/10.0000/x"])
    return r


def test_self_contained():
    text = build_report().to_html()
    doc = parse(text)
    imgs = [a for t, a in doc.tags if t == "img"]
    assert len(imgs) == 2
    for attrs in imgs:
        src = attrs["src"]
        assert src.startswith("data:image/png;base64,")
        # Source: PIL — the embedded bytes are a valid PNG
        img = Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1])))
        img.verify()
        assert img.format == "PNG"
    for tag, attrs in doc.tags:
        for key in ("src", "href", "srcset", "action"):
            value = attrs.get(key)
            if value is not None:
                assert not value.lower().startswith(("http:", "https:", "//", "javascript:")), (tag, attrs)
                assert value.startswith(("#", "data:image/png;base64,")), (tag, attrs)
        assert tag not in ("script", "link", "iframe", "object", "embed")
    # URLs appear only inside the references text
    outside = "".join("".join(v) for k, v in doc.text_by_section.items() if k != "references")
    assert "https://doi.org" not in outside
    assert "https://doi.org/10.0000/x" in "".join(doc.text_by_section["references"])
    # the user's would-be external image survives only as escaped text, never as markup
    assert 'src="https://example.org' not in text and "&lt;img src=&quot;https://example.org" in text


def test_sections_toc_and_order():
    r = build_report()
    doc = parse(r.to_html())
    fixed = [sid for sid, _ in FIXED_SECTIONS]
    # the custom section sits before the cautions; every section once, in order
    assert doc.sections == fixed[:6] + ["dispersal"] + fixed[6:]
    assert r.section_ids == doc.sections
    toc = [a["href"] for t, a in doc.tags if t == "a"]
    assert toc == ["#" + s for s in doc.sections]
    assert "Dispersal <check>" in doc.h2 and "Cautions" in doc.h2
    cautions = "".join(doc.text_by_section["cautions"])
    assert DEFAULT_CAUTIONS[0][:40] in cautions and "Extra caution from the study." in cautions
    for phrase in ("equilibrium", "niche conservatism", "clamped", "MESS", "sampling bias",
                   "ensemble", "local expertise", "statutory guidance", "licensed"):
        assert phrase in cautions, phrase


def test_empty_sections_say_so():
    doc = parse(Report("Empty", generated="x").to_html())
    assert doc.sections == [sid for sid, _ in FIXED_SECTIONS]
    assert "Nothing was recorded" in "".join(doc.text_by_section["maps"])


def test_text_is_escaped():
    text = build_report().to_html()
    # Source: Python html.escape — user text appears only in its escaped form
    assert "<script>" not in text and "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt;" in text
    assert "<title>Demo &lt;range&gt; study</title>" in text
    assert "<td>&lt;b&gt;</td>" in text and "<td>a&amp;b</td>" in text
    assert "Records &lt;kept&gt; and dropped" in text and "Suitability &lt;now&gt;" in text
    assert "<em>our</em>" in text  # trusted html is kept as markup
    assert '<td class="num">12,346</td>' in text or '<td class="num">12,345.7</td>' in text


def test_records_table():
    table = records_table(440, {"outside the grid": 8, "duplicate cell": 10})
    # Analytic: total = kept + every dropped record
    assert table["records"].tolist() == [440, 8, 10, 458]
    assert table["status"].tolist() == ["kept", "dropped", "dropped", "total"]


def test_bad_input():
    r = Report("t")
    with pytest.raises(InputError, match="section id 'Bad Id'"):
        r.add_section("Bad Id", "x")
    with pytest.raises(InputError, match="needs a heading"):
        r.add_section("newone")
    with pytest.raises(InputError, match="self-contained"):
        r.add_section("methods", html='<img src="https://example.org/a.png">')
    with pytest.raises(InputError, match="self-contained"):
        r.add_section("methods", html="<script>1</script>")
    with pytest.raises(InputError, match="self-contained"):
        r.add_section("methods", html='<p onclick="x()">a</p>')
    with pytest.raises(InputError, match="data URI"):
        r.add_section("maps", figures=[("https://example.org/a.png", "c")])
    with pytest.raises(InputError, match="not hold a PNG"):
        r.add_section("maps", figures=[("data:image/png;base64," + base64.b64encode(b"GIF89a....").decode(), "c")])
    with pytest.raises(InputError, match="expected a pandas DataFrame"):
        r.add_section("areas", table=[1, 2])
    with pytest.raises(InputError, match="title is empty"):
        Report("  ")


def test_write_atomic_and_refuses_overwrite(tmp_path):
    out = tmp_path / "report.html"
    r = build_report()
    assert r.write(out) == out
    first = out.read_text(encoding="utf-8")
    assert first.startswith("<!DOCTYPE html>") and first == r.to_html()
    with pytest.raises(OutputExistsError, match="add --overwrite"):
        Report("other").write(out)
    assert out.read_text(encoding="utf-8") == first
    Report("other", generated="y").write(out, overwrite=True)
    assert "<h1>other</h1>" in out.read_text(encoding="utf-8")
    with pytest.raises(InputError, match="does not exist"):
        r.write(tmp_path / "missing" / "r.html")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]  # no temp files left


def _chromium():
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


def test_chromium_render(tmp_path):
    browser = _chromium()
    if browser is None:
        pytest.skip("Chromium not found (/usr/bin/chromium, chromium or chromium-browser on PATH); "
                    "install it with `apt-get install -y chromium` to run the render test")
    page = tmp_path / "report.html"
    build_report().write(page)
    shot = tmp_path / "shot.png"
    common = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              "--disable-dev-shm-usage", f"--user-data-dir={tmp_path / 'profile'}"]
    run = subprocess.run(common + [f"--screenshot={shot}", "--window-size=1200,3000", page.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert shot.is_file(), run.stderr[-2000:]
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape == (3000, 1200)
    assert pixels.var() > 0  # not a blank page
    dom = subprocess.run(common + ["--dump-dom", page.as_uri()], capture_output=True, text=True,
                         timeout=120).stdout
    doc = parse(dom)
    # Source: Chromium's own parse of the file — the headings and images it rendered
    for _, heading in FIXED_SECTIONS:
        assert heading in doc.h2
    assert "Dispersal <check>" in doc.h2
    assert len([a for t, a in doc.tags if t == "img" and a["src"].startswith("data:image/png;base64,")]) == 2
