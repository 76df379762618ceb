"""Benchmark: one SpreadOperator.step against one scipy.signal.fftconvolve on a 4000 x 4000 grid.

Run as ``python bench/bench_spread.py``; prints medians, ratios and peak memory. Not a test.
"""

import statistics
import time
import tracemalloc

import numpy as np
import psutil
from scipy import signal

from envelope.kernels.dispersal import discretise_kernel
from envelope.kernels.spread import SpreadOperator

N = 4000
REPEATS = 5


def median_time(fn):
    times = []
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def peak_mib(fn):
    tracemalloc.start()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2 ** 20


def main():
    rng = np.random.default_rng(0)
    occupancy = (rng.random((N, N)) < 0.2).astype(np.float64)
    habitat = rng.random((N, N))
    suitable = np.ones((N, N))
    print(f"grid {N} x {N}, median of {REPEATS} repeats, RSS at start {psutil.Process().memory_info().rss / 2**20:.0f} MiB")
    for label, mean_cells in (("exponential, mean 3 cells", 3.0), ("exponential, mean 15 cells", 15.0)):
        kernel = discretise_kernel("exponential", mean_cells, cell_dx_km=1.0, cell_dy_km=1.0)
        ref = median_time(lambda: signal.fftconvolve(occupancy, kernel, mode="same"))
        ref_mem = peak_mib(lambda: signal.fftconvolve(occupancy, kernel, mode="same"))
        print(f"\n{label}: kernel {kernel.shape[0]} x {kernel.shape[1]}")
        print(f"  scipy.signal.fftconvolve(mode='same')     {ref:7.3f} s   peak {ref_mem:6.0f} MiB")
        for dtype in (np.float64, np.float32):
            op = SpreadOperator((N, N), kernel, dtype=dtype, workers=2)
            occ = occupancy.astype(dtype)
            hab, suit = habitat.astype(dtype), suitable.astype(dtype)
            for check in (True, False):
                t = median_time(lambda: op.step(occ, hab, suit, 2.0, check=check))
                mem = peak_mib(lambda: op.step(occ, hab, suit, 2.0, check=check))
                name = f"SpreadOperator.step {np.dtype(dtype).name}{'' if check else ', check=False'}"
                print(f"  {name:<41s}{t:7.3f} s   peak {mem:6.0f} MiB   ratio {t / ref:5.2f}x")
            t = median_time(lambda: op.pressure(occ))
            print(f"  {'SpreadOperator.pressure ' + np.dtype(dtype).name:<41s}{t:7.3f} s   ratio {t / ref:5.2f}x")
    print(f"\nRSS at end {psutil.Process().memory_info().rss / 2**20:.0f} MiB")


if __name__ == "__main__":
    main()
