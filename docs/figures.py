"""The figures the tutorial quotes, generated from a run of the demo study so that the docs cannot drift.

    python docs/figures.py                 # run the demo into a temporary folder, rewrite the blocks
    python docs/figures.py --run-dir DIR   # use a finished demo run
    python docs/figures.py --check         # exit 1 when the docs differ from a fresh run

Every generated block in a docs page sits between ``<!-- generated: NAME -->`` and
``<!-- end generated -->``; :func:`blocks` makes each block's text from a run folder and
:func:`rewrite` puts it in place. tests/study/test_report_render.py checks the committed
pages against a fresh run.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import tempfile
from pathlib import Path

import pandas as pd

DOCS = Path(__file__).resolve().parent
PAGES = ("tutorial.md",)
_BLOCK = re.compile(r"(<!-- generated: (?P<name>[a-z0-9-]+) -->\n)(?P<body>.*?)(<!-- end generated -->)", re.S)


def _km2(v):
    return "–" if v is None else f"{v:,.0f}"


def _pct(v):
    return "–" if v is None else f"{100 * v:.0f} %"


def _iv(s, *keys, fmt):
    node = s.get("intervals", {})
    for k in keys:
        node = node.get(k, {})
    return f"{fmt(node.get('p05'))}–{fmt(node.get('p95'))}" if node.get("p05") is not None else "–"


def blocks(run_dir) -> dict:
    """The text of every generated block, from the demo run in ``run_dir``."""
    run = Path(run_dir)
    fit = json.loads((run / "models" / "pointprocess.fit.json").read_text())
    rec = fit["records"]
    reach = {p.name[:-len("_reach.json")]: json.loads(p.read_text()) for p in sorted((run / "reach").glob("*_reach.json"))}
    order = [k for k in ("high", "low", "held-climate") if k in reach]
    out = {}
    out["records"] = (f"Of the {rec['read']:,} rows in `presences.csv`, the model kept {rec['kept']:,} (a count of "
                      f"records). The other {rec['read'] - rec['kept']:,} were dropped:\n")
    suit = pd.read_csv(run / "projection" / "scenarios" / "suitability_table.csv")
    lines = ["| share of the land area (%) | " + " | ".join(f"{h} {p}" for p in ("low", "high") for h in (2050, 2080))
             + " |", "|---" * 5 + "|"]
    for model in sorted(set(suit["climate_model"])):
        cells = []
        for p in ("low", "high"):
            for h in (2050, 2080):
                row = suit[(suit["climate_model"] == model) & (suit["pathway"] == p) & (suit["horizon"] == h)]
                cells.append(f"{100 * float(row['novel_share'].iloc[0]):.1f} %" if len(row) else "–")
        lines.append(f"| {model} | " + " | ".join(cells) + " |")
    out["novel-share"] = "\n".join(lines) + "\n"
    first = reach[order[0]]
    head = "| | " + " | ".join(order) + " |\n|---" + "|---" * len(order) + "|\n"
    rows = [
        ("gained, reached (km², median; 5–95 % over runs)", lambda s: f"{_km2(s['area_km2']['gained_reached'])} "
         f"({_iv(s, 'area_km2', 'gained_reached', fmt=_km2)})"),
        ("gained, not reached (km², habitat present, dispersal-limited)",
         lambda s: _km2(s["area_km2"]["gained_unreached"])),
        ("gained, no habitat (km²)", lambda s: _km2(s["area_km2"]["gained_no_habitat"])),
        ("reached share of the gain (% of the gained area; 5–95 %)",
         lambda s: f"{_pct(s['reached_share_of_gain'])} ({_iv(s, 'reached_share_of_gain', fmt=_pct)})"),
        ("front advance (km, median; 5–95 %)", lambda s: f"{s['front_advance_km']:+.0f} "
         f"({_iv(s, 'front_advance_km', fmt=lambda v: f'{v:.0f}')})" if s["front_advance_km"] is not None else "–"),
        ("runs (climate models × distances)", lambda s: f"{s['n_runs']:,}"),
    ]
    body = head + "".join(f"| {name} | " + " | ".join(f(reach[k]) for k in order) + " |\n" for name, f in rows)
    out["reach-table"] = body
    out["start-cells"] = (f"The spread starts from the {first['n_start_cells']:,} cells holding a record "
                          f"({_km2(first['occupied_km2']['start'])} km²).\n")
    n_fig = (run / "report.html").read_text(encoding="utf-8").count("<figure ")
    out["report-figures"] = f"The report holds {n_fig} figures.\n"
    part = run / "uncertainty_partition.csv"
    if part.exists():
        t = pd.read_csv(part)
        lines = ["| quantity | source | share of the variance across runs (%) |", "|---|---|---|"]
        lines += [f"| {q} | {s.replace(':', ' × ')} | {100 * v:.1f} % |" for q, s, v in
                  zip(t["quantity"], t["source"], t["share"])]
        out["partition"] = "\n".join(lines) + "\n"
    return out


def rewrite(text: str, generated: dict) -> str:
    """``text`` with every generated block replaced by its text in ``generated``."""
    def put(m):
        name = m.group("name")
        if name not in generated:
            raise KeyError(f"docs block {name!r} has no generator; known: {sorted(generated)}")
        return m.group(1) + generated[name] + m.group(4)
    return _BLOCK.sub(put, text)


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
            if new != text:
                stale.append(page)
                if not args.check:
                    path.write_text(new, encoding="utf-8")
    if args.check and stale:
        print(f"out of date: {', '.join(stale)}; run python docs/figures.py", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
