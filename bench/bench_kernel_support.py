"""Benchmark: cost of the reach kernel's support (domain-sized) against the former 1e-6 disc.

Run as ``python bench/bench_kernel_support.py [--n 1000] [--repeats 3]``; prints, per grid and
kernel, the kernel shape, the seconds to discretise it, the seconds per spread step (median)
and the truncated tail mass. Not a test.

Grids (fictional, open ocean): a projected n x n grid of 1 km cells, and a geographic grid of
n/2 x n/2 cells of 0.05 degrees from 30 to 30 + n/40 degrees N (several latitude bands).
"""

import argparse
import statistics
import time

import numpy as np
import rioxarray  # noqa: F401  (registers .rio)
import xarray as xr

from envelope.kernels import dispersal
from envelope.kernels.spread import SpreadOperator
from envelope.reach import DispersalSettings, kernels_for_grid


def projected(n):
    x = (np.arange(n) + 0.5) * 1000.0 - 6.0e6
    y = (np.arange(n)[::-1] + 0.5) * 1000.0
    return xr.DataArray(np.ones((n, n), dtype="float32"), dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(
        "+proj=laea +lat_0=40 +lon_0=-150 +datum=WGS84 +units=m")


def geographic(n, res=0.05, lat0=30.0):
    y = lat0 + res * n - res * (np.arange(n) + 0.5)
    x = -160.0 + res * (np.arange(n) + 0.5)
    return xr.DataArray(np.ones((n, n), dtype="float32"), dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(
        "EPSG:4326")


def former_kernels(grid, settings, geo):
    # the rule before: tail mass 1e-6, a disc capped at max(ny, nx) cells, renormalised
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    t = grid.rio.transform()
    if geo:
        return dispersal.latitude_band_kernels(settings.kernel, settings.mean_distance_km, settings.shape,
                                               lat_centres_deg=grid["y"].values, dlon_deg=abs(t.a),
                                               dlat_deg=abs(t.e), tail_tolerance=1e-6, max_radius_cells=max(ny, nx))
    return dispersal.discretise_kernel(settings.kernel, settings.mean_distance_km, settings.shape,
                                       cell_dx_km=abs(t.a) / 1000.0, cell_dy_km=abs(t.e) / 1000.0,
                                       tail_tolerance=1e-6, max_radius_cells=max(ny, nx))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    kernels = [DispersalSettings(kernel="exponential", mean_distance_km=4.0),
               DispersalSettings(kernel="2dt", mean_distance_km=4.0, shape=3.0)]
    print(f"{'grid':<28}{'kernel':<13}{'rule':<10}{'bands':>6}{'largest kernel':>16}{'discretise s':>14}"
          f"{'step s':>9}{'tail mass':>11}")
    for label, grid, geo in ((f"projected {args.n} x {args.n}, 1 km", projected(args.n), False),
                             (f"geographic {args.n // 2} x {args.n // 2}, 0.05°", geographic(args.n // 2), True)):
        shape = (grid.sizes["y"], grid.sizes["x"])
        rng = np.random.default_rng(0)
        occ = (rng.random(shape) < 0.2).astype(np.float64)
        ones = np.ones(shape)
        for settings in kernels:
            for rule in ("former", "domain"):
                t0 = time.perf_counter()
                if rule == "former":
                    k, tail = former_kernels(grid, settings, geo), float("nan")
                else:
                    k, tail = kernels_for_grid(grid, settings, None, geo)
                t_disc = time.perf_counter() - t0
                op = SpreadOperator(shape, k)
                times = []
                for _ in range(args.repeats):
                    t0 = time.perf_counter()
                    op.step(occ, ones, ones, 1.0, check=False)
                    times.append(time.perf_counter() - t0)
                bands = k if isinstance(k, list) else [(0, shape[0], k)]
                biggest = max((b[2] for b in bands), key=lambda a: a.size).shape
                print(f"{label:<28}{settings.kernel:<13}{rule:<10}{len(bands):>6}{str(biggest):>16}{t_disc:>14.2f}"
                      f"{statistics.median(times):>9.3f}{tail:>11.2e}")


if __name__ == "__main__":
    main()
