"""The demo run's report: renders in headless Chromium without horizontal overflow at 1280 px,
its findings quote the summary JSON, and the tutorial's quoted figures match a fresh run."""

import importlib.util
import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from envelope.study.demo import demo_dir
from envelope.study.findings import format_km, format_km2, format_share
from envelope.study.runner import run_study
from envelope.study.schema import load_study

ROOT = Path(__file__).resolve().parents[2]
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    run_study(load_study(demo_dir().parent / "study.toml"), out)
    return out


def findings_text(run):
    html = (run / "report.html").read_text(encoding="utf-8")
    section = re.search(r'<section id="findings">(.*?)</section>', html, re.S).group(1)
    return re.sub(r"<[^>]+>", " ", section).replace("&#x27;", "'")


def test_findings_numbers_equal_the_summary_json(demo_run):
    # Common practice, no source: every number in the findings is one of the summary's values
    # (medians and 5-95 % interval ends) in the report's formatting, and each pathway's are all there.
    text = findings_text(demo_run)
    expected = set()
    for path in sorted((demo_run / "reach").glob("*_reach.json")):
        s = json.loads(path.read_text())
        if s["run"] == "held-climate":
            continue
        iv = s["intervals"]
        want = [format_km2(s["area_km2"]["gained_reached"]), format_km2(iv["area_km2"]["gained_reached"]["p05"]),
                format_km2(iv["area_km2"]["gained_reached"]["p95"]), format_share(s["reached_share_of_gain"]),
                format_share(iv["reached_share_of_gain"]["p05"]), format_share(iv["reached_share_of_gain"]["p95"]),
                format_km(s["front_advance_km"]), format_km(iv["front_advance_km"]["p05"]),
                format_km(iv["front_advance_km"]["p95"]), format_km2(s["area_km2"]["gained_unreached"]),
                format_km2(s["area_km2"]["gained_no_habitat"]), str(s["n_runs"])]
        sentence = text[text.index(f"pathway {s['run']},"):]
        for w in want:
            assert w.replace(" %", "") in sentence, (s["run"], w)
        expected |= {w.replace(" %", "") for w in want}
        expected.add(f"{s['horizon_years'][-1]:g}")
    import pandas as pd

    part = pd.read_csv(demo_run / "uncertainty_partition.csv")
    expected |= {format_share(v).replace(" %", "") for v in part["share"]}
    numbers = re.findall(r"\d[\d,]*(?:\.\d+)?", text.replace("5–95", ""))
    assert numbers and set(numbers) <= expected, set(numbers) - expected
    # the contract: the report opens with 3-6 sentences
    sentences = re.split(r"(?<=\.)\s+(?=[A-Z])", " ".join(text.split()))
    assert 3 <= len(sentences) <= 6, sentences


def test_partition_shares_sum_to_one_per_quantity(demo_run):
    # Analytic: the ANOVA terms of a balanced design add up to the total sum of squares.
    import pandas as pd

    part = pd.read_csv(demo_run / "uncertainty_partition.csv")
    assert list(part.columns) == ["quantity", "source", "share"]
    assert set(part["quantity"]) == {"reachable_gain_km2", "range_change_km2"}
    for _, g in part.groupby("quantity"):
        assert g["share"].sum() == pytest.approx(1.0, abs=1e-5)
    assert (demo_run / "reach" / "high_probability.tif").is_file()


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (.ci/run installs it)")
def test_report_renders_in_chromium_without_horizontal_overflow(demo_run, tmp_path):
    # Common practice, no source: the page's scroll width equals the viewport (no horizontal
    # scroll bar) and no table or image reaches past the right edge at 1280 px.
    html = (demo_run / "report.html").read_text(encoding="utf-8")
    probe = """<script>
    window.addEventListener('load', function () {
      var w = document.documentElement.clientWidth, worst = 0, what = '';
      document.querySelectorAll('table, img, figure, p, pre').forEach(function (e) {
        var r = e.getBoundingClientRect().right;
        if (r > worst) { worst = r; what = e.tagName; }
      });
      var out = document.createElement('div');
      out.id = 'probe';
      out.textContent = JSON.stringify({scroll: document.documentElement.scrollWidth, client: w,
                                        right: worst, tag: what,
                                        images: document.images.length,
                                        broken: Array.from(document.images).filter(function (i) {
                                          return !(i.complete && i.naturalWidth > 0); }).length});
      document.body.appendChild(out);
    });
    </script>"""
    page = tmp_path / "probe.html"
    page.write_text(html.replace("</body>", probe + "</body>"), encoding="utf-8")
    done = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--window-size=1280,900",
                           "--virtual-time-budget=10000", "--dump-dom", page.as_uri()],
                          capture_output=True, text=True, timeout=120)
    found = re.search(r'<div id="probe">(.*?)</div>', done.stdout)
    assert found, done.stderr[-2000:]
    got = json.loads(found.group(1).replace("&quot;", '"'))
    assert got["client"] == 1280 or got["client"] > 1200
    assert got["scroll"] <= got["client"], got
    assert got["right"] <= got["client"], got
    assert got["images"] >= 10 and got["broken"] == 0, got


def test_tutorial_figures_match_a_fresh_run(demo_run):
    # Common practice, no source: the docs' generated blocks are what docs/figures.py makes
    # from a fresh demo run (regenerate with `python docs/figures.py`), up to one unit in the
    # last printed digit of a decimal (CPUs differ in the last bits of a fit).
    spec = importlib.util.spec_from_file_location("docs_figures", ROOT / "docs" / "figures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    generated = mod.blocks(demo_run)
    used = set()
    for page in mod.PAGES:
        text = (ROOT / "docs" / page).read_text(encoding="utf-8")
        assert "<!-- generated:" in text
        used |= {m.group("name") for m in mod.BLOCK.finditer(text)}
        assert mod.same_but_round_off(text, mod.rewrite(text, generated)), \
            f"docs/{page} is out of date: run python docs/figures.py"
    # every generator feeds a page, so no figure is made and then quoted by hand elsewhere
    assert used == set(generated), f"generators no page uses: {sorted(set(generated) - used)}"


def test_tutorial_pictures_match_a_fresh_run(demo_run, tmp_path):
    # Common practice, no source: the committed pictures in docs/img are what docs/figures.py
    # draws from a fresh demo run (compared with matplotlib.testing.compare.compare_images, RMS
    # tolerance PICTURE_TOLERANCE), and every picture a page shows is one it draws.
    spec = importlib.util.spec_from_file_location("docs_figures", ROOT / "docs" / "figures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    drawn = mod.pictures(demo_run, tmp_path)
    assert mod.stale_pictures(drawn) == [], "docs/img is out of date: run python docs/figures.py"
    shown = set()
    for page in (ROOT / "docs").glob("*.md"):
        shown |= set(re.findall(r"!\[[^\]]*\]\(img/([^)]+)\)", page.read_text(encoding="utf-8")))
    assert shown == set(drawn), f"pictures shown but not drawn: {sorted(shown - set(drawn))}; " \
                                f"drawn but not shown: {sorted(set(drawn) - shown)}"


def test_docs_check_tolerates_only_last_digit_round_off():
    # Common practice, no source: the docs check lets a decimal move by one unit in its last
    # printed place (fits differ in the last bits between CPUs) and nothing else.
    spec = importlib.util.spec_from_file_location("docs_figures", ROOT / "docs" / "figures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    same = mod.same_but_round_off
    assert same("AUC 0.8663 ± 0.008403  C 316.2", "AUC 0.8662 ± 0.008404  C 316.2")
    assert same("share 0.866 of it", "share 0.8661 of it")
    assert not same("AUC 0.8663", "AUC 0.8653")        # a real change in the fourth digit
    assert not same("AUC 0.8663", "TSS 0.8663")        # a word changed
    assert not same("cells 1204, AUC 0.8", "cells 1205, AUC 0.8")  # integers must be equal
    assert not same("AUC 0.8663", "AUC 0.8663 ± 0.01")  # text added
