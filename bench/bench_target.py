"""Benchmark of `envelope target` on the demo study: wall time, reach runs, seconds per run, gains vs baselines.

Run:  .venv/bin/python bench/bench_target.py [--run-dir DIR] [--repeats 3] [--patches 200]
      [--budget-km2 1500] [--objective mean] [--no-uncached]

Data: the fictional demo study (sample_grids/study.toml, 250 x 250 cells of 0.04°). Its
run folder (today's suitability, per-pathway ensemble means, fitted threshold) is made
with ``envelope.study.runner.run_study`` into ``--run-dir`` unless already there (the runner's
cache skips finished steps; not timed). The reach model is the study's: exponential
kernel, 5 km mean per 5-year step, rate 4, 10 years' persistence, 2020 -> 2050 -> 2080,
two climate paths (pathways low and high, ensemble means of three climate models), run
deterministically exactly as ``envelope target --study`` does
(``envelope.study.layout.reach_inputs_from_run``).

Candidates: a seeded (``numpy.random.default_rng(0)``) layout of ``--patches`` square
3 x 3-cell patches (about 130 km² each) on land with habitat fraction < 0.5, no two
touching (each patch is one 4-connected component), anywhere on the island -- behind the
front, at it and beyond it. Invented: it stands for restorable land marked by a planner.

Timed: one ``envelope.targeting.target_restoration`` call (patches, lazy-greedy passes,
10 random draws, the nearest-first baseline, the table), ``--repeats`` times; the median
wall time is printed with the reach runs, the seconds per reach run and the gains. One
more run with the patch-set cache off shows the reach runs the cache saves (skip it with
``--no-uncached``). Load average and core count are printed before and after: other
processes on the machine lengthen the wall times. Not a test.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
STUDY = HERE.parent / "sample_grids" / "study.toml"
SEED = 0
SIDE = 3  # patch side in cells


def ensure_run(run_dir: Path):
    """The demo study's run folder (made once; finished steps are skipped)."""
    from envelope.study.runner import run_study
    from envelope.study.schema import load_study

    study = load_study(STUDY)
    t0 = time.perf_counter()
    result = run_study(study, run_dir)
    print(f"study run folder {run_dir}: {len(result['ran'])} step(s) run, {len(result['skipped'])} skipped "
          f"({time.perf_counter() - t0:.1f} s, not part of the benchmark)")
    return study


def patch_layout(land, habitat, n_patches, rng):
    """``n_patches`` non-touching SIDE x SIDE blocks on land with habitat < 0.5, in seeded random order."""
    ok = land & (np.nan_to_num(habitat, nan=1.0) < 0.5)
    ny, nx = ok.shape
    taken = np.zeros_like(ok)   # patch cells and their 4-neighbours' ring: the next patch may not touch
    cand = np.zeros(ok.shape, dtype=np.float32)
    rows, cols = np.nonzero(ok[: ny - SIDE + 1, : nx - SIDE + 1])
    placed = 0
    for k in rng.permutation(rows.size):
        r, c = rows[k], cols[k]
        block = (slice(r, r + SIDE), slice(c, c + SIDE))
        if not ok[block].all() or taken[block].any():
            continue
        cand[block] = 1.0
        taken[max(r - 1, 0): r + SIDE + 1, max(c - 1, 0): c + SIDE + 1] = True
        placed += 1
        if placed == n_patches:
            break
    return cand


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--run-dir", type=Path, default=Path("/tmp/envelope-bench-target"))
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--patches", type=int, default=200)
    parser.add_argument("--budget-km2", type=float, default=1500.0)
    parser.add_argument("--objective", choices=("mean", "worst"), default="mean")
    parser.add_argument("--no-uncached", action="store_true", help="skip the run without the patch-set cache")
    args = parser.parse_args()

    from envelope.study.layout import reach_inputs_from_run
    from envelope.targeting import target_restoration

    print(f"{os.cpu_count()} cores, Python {platform.python_version()}, "
          f"NumPy {np.__version__}; load average {os.getloadavg()[0]:.2f} (1 min) at the start")
    study = ensure_run(args.run_dir)
    model = reach_inputs_from_run(study, args.run_dir)
    now = model["now"]
    cand = patch_layout(np.isfinite(now.values), np.asarray(model["habitat"].values), args.patches,
                        np.random.default_rng(SEED))
    cand_da = now.copy(data=cand)
    kw = dict(budget_km2=args.budget_km2, threshold=model["threshold"], settings=model["settings"],
              objective=args.objective, now_year=model["now_year"], step_years=model["step_years"],
              rate=model["rate"], persistence_years=model["persistence_years"], random_draws=10, seed=SEED)

    def run(cache=True):
        t0 = time.perf_counter()
        result = target_restoration(now, model["futures"], model["habitat"], model["start"], cand_da, cache=cache,
                                    **kw)
        return time.perf_counter() - t0, result

    times, result = [], None
    for _ in range(args.repeats):
        seconds, result = run()
        times.append(seconds)
    s = result.summary
    wall = statistics.median(times)
    paths = ", ".join(p["name"] for p in s["climate_paths"])
    print(f"\ngrid {now.sizes['y']} x {now.sizes['x']}, {s['n_candidate_patches']} candidate patches "
          f"({SIDE} x {SIDE} cells), budget {s['budget_km2']:,.0f} km², climate paths: {paths}, "
          f"objective {s['objective']}; {s['horizon_years'][-1] - model['now_year']:.0f} years in "
          f"{model['step_years']:g}-year steps")
    print(f"wall time, median of {args.repeats}: {wall:.1f} s   (runs: {', '.join(f'{t:.1f}' for t in times)})")
    print(f"patch sets evaluated {s['n_evaluations']}, reach runs {s['n_reach_runs']}, cache hits "
          f"{s['n_cache_hits']}; {wall / s['n_reach_runs'] * 1000:.1f} ms per reach run (wall / runs)")
    print(f"chosen {s['n_chosen']} patches, {s['chosen_area_km2']:,.0f} km², rule '{s['greedy_rule']}'")
    print(f"reachable gain {s['reachable_gain_km2']:,.0f} km²; random baseline {s['random_baseline_gain_km2']:,.0f} "
          f"km² (mean of {s['random_draws']} draws); nearest-first {s['nearest_baseline_gain_km2']:,.0f} km²")
    print("per climate path: " + ", ".join(f"{p['name']} {p['reachable_gain_km2']:,.0f} km² (without restoration "
                                           f"{p['baseline_gained_reached_km2']:,.0f})" for p in s["climate_paths"]))
    if not args.no_uncached:
        seconds, plain = run(cache=False)
        same = plain.summary["reachable_gain_km2"] == s["reachable_gain_km2"]
        print(f"without the cache: {plain.summary['n_reach_runs']} reach runs, {seconds:.1f} s "
              f"(same result: {same})")
    print(f"load average {os.getloadavg()[0]:.2f} (1 min) at the end")


if __name__ == "__main__":
    main()
