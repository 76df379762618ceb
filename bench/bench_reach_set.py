"""Benchmark: a reach run set (several climate paths of one pathway) combined as the paths finish, against all paths held then combined: wall time and peak memory.

Run:  .venv/bin/python bench/bench_reach_set.py [--size 3000] [--paths 9] [--repeats 1]

``streamed`` is what :func:`envelope.pipelines.reach.run_reach_set` does:
each :func:`envelope.reach.simulate_reach` result goes to a
:class:`envelope.reach_runs.ReachRunCombiner` and is dropped. ``held`` keeps every result in
a list and calls :func:`envelope.reach_runs.combine_reach_runs` at the end, as
run_reach_set did before. Each mode runs in its own subprocess (peak RSS =
``resource.getrusage`` maximum, inputs included), the modes alternate, and both must give
the same combination (checked here on every output grid and on the summary).

The landscape is fictional: a geographic grid (EPSG:4326, 0.01 degree cells) over open
North Pacific water (lon -170.., lat 20..); suitable today in its southern fifth and, by
2080, in a southern part that grows with the path number (the paths stand for climate
models × dispersal distances: mean 1, 2 or 3 km per 5-year step); habitat 1 except a random
20 % of cells; occupied today in its southern fifth. Not a test; prints one line per run
and writes bench/results/reach_set.json (git-ignored).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def _paths(n: int, count: int):
    import rioxarray  # noqa: F401
    import xarray as xr

    res = 0.01
    y = 20.0 + res * n - res * (np.arange(n) + 0.5)
    x = -170.0 + res * (np.arange(n) + 0.5)

    def layer(values):
        return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs("EPSG:4326", inplace=True)

    rows = np.arange(n, dtype=np.float32)[:, None]
    now = layer(np.broadcast_to((rows >= 0.8 * n).astype(np.float32), (n, n)).copy())
    habitat = layer((np.random.default_rng(0).random((n, n), dtype=np.float32) >= 0.2).astype(np.float32))
    start = np.zeros((n, n), dtype=np.float32)
    start[int(0.8 * n):] = 1.0
    for k in range(count):
        model, distance = divmod(k, 3)
        edge = 0.6 - 0.05 * model
        mid = layer(np.broadcast_to((rows >= (0.8 + edge) / 2 * n).astype(np.float32), (n, n)).copy())
        future = layer(np.broadcast_to((rows >= edge * n).astype(np.float32), (n, n)).copy())
        yield now, [(2050, mid), (2080, future)], habitat, start, 1.0 + distance, {"climate_model": f"m{model}",
                                                                                  "distance_km": 1.0 + distance}


def _child(mode: str, n: int, count: int, out: Path) -> None:
    from envelope.reach import DispersalSettings, simulate_reach
    from envelope.reach_runs import ReachRunCombiner, combine_reach_runs

    t0 = time.perf_counter()
    combiner, held, labels = ReachRunCombiner(), [], []
    for now, futures, habitat, start, distance, label in _paths(n, count):
        result = simulate_reach(now, futures, habitat, start, threshold=0.5,
                                settings=DispersalSettings(kernel="exponential", mean_distance_km=distance),
                                now_year=2020, step_years=5.0, rate=3.0, fragmentation_band_deg=None)
        if mode == "streamed":
            combiner.add(result, label)
        else:
            held.append(result)
            labels.append(label)
        del result
    combined = combiner.result() if mode == "streamed" else combine_reach_runs(held, labels)
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20  # KiB on Linux
    np.savez(out, classes=combined.classes.values, probability=combined.probability.values,
             arrival=combined.arrival_year.values)
    out.with_suffix(".json").write_text(json.dumps({"wall_s": wall, "peak_rss_gib": peak,
                                                    "summary": combined.summary, "front": combined.front},
                                                   default=str))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=3000)
    ap.add_argument("--paths", type=int, default=9)
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--out", type=Path, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        _child(args.child, args.size, args.paths, args.out)
        return
    results = {"streamed": [], "held": []}
    (HERE / "results").mkdir(exist_ok=True)
    outputs = {}
    scratch = Path(tempfile.mkdtemp(prefix="reach_set_"))
    for r in range(args.repeats):
        for mode in ("held", "streamed") if r % 2 == 0 else ("streamed", "held"):
            out = scratch / f"{mode}.npz"
            subprocess.run([sys.executable, __file__, "--child", mode, "--size", str(args.size), "--paths",
                            str(args.paths), "--out", str(out)], check=True)
            got = json.loads(out.with_suffix(".json").read_text())
            results[mode].append({"wall_s": round(got["wall_s"], 1), "peak_rss_gib": round(got["peak_rss_gib"], 2)})
            with np.load(out) as grids:
                outputs[mode] = ({k: grids[k] for k in grids.files}, got)
            print(mode, results[mode][-1], flush=True)
    (a, ja), (b, jb) = outputs["held"], outputs["streamed"]
    shutil.rmtree(scratch)
    same = all(np.array_equal(a[k], b[k], equal_nan=True) for k in a) and ja["summary"] == jb["summary"] \
        and ja["front"] == jb["front"]
    line = {"size": args.size, "cells": args.size ** 2, "paths": args.paths, "same_outputs": same,
            **{m: {"median_wall_s": statistics.median(x["wall_s"] for x in v),
                   "median_peak_rss_gib": statistics.median(x["peak_rss_gib"] for x in v), "runs": v}
               for m, v in results.items()},
            "machine": platform.machine(), "cores": os.cpu_count(), "load_average": list(os.getloadavg())}
    print(json.dumps(line))
    (HERE / "results" / "reach_set.json").write_text(json.dumps(line, indent=1))


if __name__ == "__main__":
    main()
