"""Benchmark: one reach run on a large grid (default 10,000 x 10,000 cells, 60 one-year steps): wall time and peak memory.

Run:  .venv/bin/python bench/bench_reach_scale.py [--size 10000] [--steps 60] [--precision auto]

The landscape is fictional: a geographic grid (EPSG:4326, 0.005 degree cells) over open
North Pacific water (lon -170.., lat 20..), suitable today in its southern fifth and, by
the horizon, in its southern half; habitat 1 except a random 20 % of cells; occupied today
in its southern fifth (all of today's range). Exponential kernel, mean 1 km per step, rate 3, snapshots every
10 years. The peak resident set size is the process's maximum (``resource.getrusage``),
so it includes building the inputs. Not a test; prints one line of figures and writes
bench/results/reach_scale.json (git-ignored).
"""

from __future__ import annotations

import argparse
import json
import platform
import resource
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=60)
    ap.add_argument("--precision", default="auto", choices=["auto", "float64", "float32"])
    args = ap.parse_args()
    import rioxarray  # noqa: F401
    import xarray as xr

    from envelope.reach import DispersalSettings, simulate_reach

    n, res = args.size, 0.005
    y = 20.0 + res * n - res * (np.arange(n) + 0.5)
    x = -170.0 + res * (np.arange(n) + 0.5)

    def layer(values):
        # in place: write_crs otherwise deep-copies the grid and leaves the original to the
        # garbage collector (an accessor cycle), 0.4 GB a layer at 10,000 x 10,000
        return xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs("EPSG:4326",
                                                                                           inplace=True)

    rows = np.arange(n, dtype=np.float32)[:, None]
    now = layer(np.broadcast_to((rows >= 0.8 * n).astype(np.float32), (n, n)).copy())
    future = layer(np.broadcast_to((rows >= 0.5 * n).astype(np.float32), (n, n)).copy())
    rng = np.random.default_rng(0)
    habitat = layer((rng.random((n, n), dtype=np.float32) >= 0.2).astype(np.float32))
    start = np.zeros((n, n), dtype=np.float32)
    start[int(0.8 * n):] = 1.0
    t0 = time.perf_counter()
    result = simulate_reach(now, [(2020 + args.steps, future)], habitat, start, threshold=0.5,
                            settings=DispersalSettings(kernel="exponential", mean_distance_km=1.0),
                            now_year=2020, step_years=1.0, rate=3.0, precision=args.precision,
                            fragmentation_band_deg=None)
    wall = time.perf_counter() - t0
    peak_gib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20  # KiB on Linux
    s = result.summary
    out = {"size": n, "cells": n * n, "steps": args.steps, "precision": s["precision"], "wall_s": round(wall, 1),
           "peak_rss_gib": round(peak_gib, 2), "front_advance_km": s["front_advance_km"],
           "gained_reached_km2": s["area_km2"]["gained_reached"], "machine": platform.machine(),
           "load_average": list(__import__("os").getloadavg())}
    print(json.dumps(out))
    (HERE / "results").mkdir(exist_ok=True)
    (HERE / "results" / "reach_scale.json").write_text(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
