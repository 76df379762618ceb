"""Benchmark: bioclim and ensemble statistics, blocks as read (map_cells) against the former apply_ufunc path.

Run as ``python bench/bench_bioclim.py``; prints medians, ratios and peak memory. Not a test.

The former path is kept here, and only here, for comparison: ``xarray.apply_ufunc`` with the
month (model) axis as a core dimension, which makes dask copy every block into a cell-major
layout, and the month-last kernel it called (as they were before issue 18). Inputs are dask
arrays over float32 grids held in memory (generated once, not timed); each run stores its
result into a preallocated array, so the time is the computation and the memory its working
set. Runs of the two paths alternate; both results are compared bit for bit at the end.
"""

from __future__ import annotations

import argparse
import os
import statistics
import threading
import time
import tracemalloc
import warnings

import dask
import dask.array as dsa
import numpy as np
import psutil
import xarray as xr

from envelope.bioclim import bioclim
from envelope.ensemble import DEFAULT_AGREEMENT, consensus_count, ensemble_statistics
from envelope.kernels.bioclim import variable_names


# ---- the former implementation (before issue 18), for comparison only -------------------
def _former_quarter_sums(monthly, *, wrap=True):
    sums = monthly + np.roll(monthly, -1, axis=-1) + np.roll(monthly, -2, axis=-1)
    return sums if wrap else sums[..., :10]


def _former_take(values, index):
    return np.take_along_axis(values, index[..., None], axis=-1)[..., 0]


def _former_kernel(tmin, tmax, prec, *, wrap=True, ddof=0, cv_plus_one=False, gdd_base=5.0):
    """The month-last kernel: (..., 12) arrays in, (..., 20) out."""
    arrays = [np.asarray(a, dtype=float) for a in (tmin, tmax, prec)]
    valid = np.all([np.isfinite(a).all(axis=-1) for a in arrays], axis=0)
    tmin, tmax, prec = (np.where(valid[..., None], a, 0.0) for a in arrays)
    tavg = (tmin + tmax) / 2.0
    out = np.empty(tmin.shape[:-1] + (19 + (gdd_base is not None),), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out[..., 0] = tavg.mean(axis=-1)
        out[..., 1] = (tmax - tmin).mean(axis=-1)
        out[..., 4] = tmax.max(axis=-1)
        out[..., 5] = tmin.min(axis=-1)
        out[..., 6] = out[..., 4] - out[..., 5]
        bio7 = out[..., 6]
        out[..., 2] = np.where(bio7 != 0, 100.0 * out[..., 1] / bio7, np.nan)
        out[..., 3] = 100.0 * tavg.std(axis=-1, ddof=ddof)
        q_temp = _former_quarter_sums(tavg, wrap=wrap) / 3.0
        q_prec = _former_quarter_sums(prec, wrap=wrap)
        wettest, driest = q_prec.argmax(axis=-1), q_prec.argmin(axis=-1)
        warmest, coldest = q_temp.argmax(axis=-1), q_temp.argmin(axis=-1)
        for column, index in ((7, wettest), (8, driest), (9, warmest), (10, coldest)):
            out[..., column] = _former_take(q_temp, index)
        out[..., 11] = prec.sum(axis=-1)
        out[..., 12] = prec.max(axis=-1)
        out[..., 13] = prec.min(axis=-1)
        p_cv = prec + 1.0 if cv_plus_one else prec
        p_mean = p_cv.mean(axis=-1)
        out[..., 14] = np.where(p_mean != 0, 100.0 * p_cv.std(axis=-1, ddof=ddof) / p_mean, np.nan)
        for column, index in ((15, wettest), (16, driest), (17, warmest), (18, coldest)):
            out[..., column] = _former_take(q_prec, index)
        if gdd_base is not None:
            days = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=float)
            out[..., 19] = (np.maximum(tavg - float(gdd_base), 0.0) * days).sum(axis=-1)
    out[~valid] = np.nan
    return out


def former_bioclim(tmin, tmax, prec):
    """The former grid wrapper: apply_ufunc with the month as core dimension."""
    arrays = [a.chunk({"month": -1}) for a in (tmin, tmax, prec)]
    args = [a.drop_vars([c for c in a.coords if c not in ("y", "x")]) for a in arrays]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        out = xr.apply_ufunc(lambda *b: _former_kernel(*b).astype(np.float32), *args,
                             input_core_dims=[["month"]] * 3, output_core_dims=[["variable"]],
                             dask="parallelized", output_dtypes=[np.float32],
                             dask_gufunc_kwargs={"output_sizes": {"variable": len(variable_names())}})
    return out.transpose("variable", "y", "x")


def _former_ensemble_block(S, threshold, needed, ddof):
    S = np.asarray(S, dtype=np.float64)
    n = S.shape[-1]
    valid = np.isfinite(S).all(axis=-1)
    mean = S.mean(axis=-1)
    sd = np.sqrt(((S - mean[..., None]) ** 2).sum(axis=-1) / (n - ddof))
    count = (S >= threshold).sum(axis=-1)
    consensus = (count >= needed).astype(np.uint8)
    count = np.where(valid, count, 255).astype(np.uint8)
    consensus = np.where(valid, consensus, 255).astype(np.uint8)
    return (mean.astype(np.float32), sd.astype(np.float32), count, consensus)


def former_ensemble(suitability, threshold, needed):
    """The former ensemble_statistics core: apply_ufunc with the model as core dimension."""
    return xr.apply_ufunc(_former_ensemble_block, suitability.chunk({"model": -1}),
                          kwargs={"threshold": threshold, "needed": needed, "ddof": 1},
                          input_core_dims=[["model"]], output_core_dims=[[], [], [], []],
                          dask="parallelized", output_dtypes=[np.float32, np.float32, np.uint8, np.uint8])
# ---- end of the former implementation ----------------------------------------------------


class PeakRSS:
    """Peak resident set above the level at entry, polled every 10 ms (psutil)."""

    def __enter__(self):
        self._process = psutil.Process()
        self.start = self._process.memory_info().rss
        self.peak = self.start
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()
        return self

    def _poll(self):
        while not self._stop.wait(0.01):
            self.peak = max(self.peak, self._process.memory_info().rss)

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self._process.memory_info().rss)

    @property
    def mib(self):
        return (self.peak - self.start) / 2 ** 20


def monthly_inputs(ny, nx, chunk, rng):
    """tmin, tmax, prec as (month, y, x) float32 dask arrays over in-memory grids, 0.1 % NaN."""
    tmin = rng.normal(0.0, 10.0, size=(12, ny, nx)).astype(np.float32)
    tmax = tmin + rng.uniform(0.0, 15.0, size=(12, ny, nx)).astype(np.float32)
    prec = rng.gamma(1.5, 40.0, size=(12, ny, nx)).astype(np.float32)
    tmin[rng.random((12, ny, nx), dtype=np.float32) < 0.001] = np.nan
    coords = {"month": np.arange(1, 13), "y": -np.arange(ny) * 0.01, "x": np.arange(nx) * 0.01}
    return [xr.DataArray(dsa.from_array(a, chunks=(12, chunk, chunk)), dims=("month", "y", "x"), coords=coords)
            for a in (tmin, tmax, prec)]


def model_stack(models, n, chunk, rng):
    """(model, y, x) float32 suitability, one chunk per model as the pipeline stacks its layers."""
    S = rng.random((models, n, n), dtype=np.float32)
    S[0, rng.random((n, n), dtype=np.float32) < 0.001] = np.nan
    coords = {"model": [f"m{i}" for i in range(models)], "y": -np.arange(n) * 0.01, "x": np.arange(n) * 0.01}
    return xr.DataArray(dsa.from_array(S, chunks=(1, chunk, chunk)), dims=("model", "y", "x"), coords=coords)


def touched(shape, dtype):
    """An output array whose pages are already resident, so that filling it raises no RSS."""
    out = np.empty(shape, dtype)
    out.fill(0)
    return out


def run_once(build, targets):
    """Wall time and peak RSS rise of building the graph and storing it into ``targets``."""
    with PeakRSS() as memory:
        t0 = time.perf_counter()
        dsa.store(build(), targets, lock=False)
        seconds = time.perf_counter() - t0
    return seconds, memory.mib


def traced_peak(build, targets):
    """Peak of the memory NumPy and Python allocate during one (untimed) run, MiB (tracemalloc)."""
    tracemalloc.start()
    dsa.store(build(), targets, lock=False)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2 ** 20


def compare(label, build_former, build_new, targets_former, targets_new, repeats):
    paths = {"former (apply_ufunc)": (build_former, targets_former),
             "blocks as read (map_cells)": (build_new, targets_new)}
    times = {name: [] for name in paths}
    rss = {name: [] for name in paths}
    for _ in range(repeats):  # alternate the two paths
        for name, (build, targets) in paths.items():
            seconds, rise = run_once(build, targets)
            times[name].append(seconds)
            rss[name].append(rise)
    traced = {name: traced_peak(build, targets) for name, (build, targets) in paths.items()}
    medians = {name: statistics.median(t) for name, t in times.items()}
    print(f"\n{label}")
    print(f"  {'path':<28s} {'median s':>9s}  {'runs s':<22s} {'traced peak MiB':>16s} {'RSS rise MiB':>13s}")
    for name in paths:
        runs = ", ".join(f"{x:.2f}" for x in times[name])
        print(f"  {name:<28s} {medians[name]:9.2f}  {runs:<22s} {traced[name]:16.0f} {max(rss[name]):13.0f}")
    former, new = medians.values()
    same = all(np.array_equal(a.view(f"u{a.dtype.itemsize}"), b.view(f"u{b.dtype.itemsize}"))
               for a, b in zip(targets_former, targets_new))
    print(f"  ratio former / new: {former / new:.2f}x; outputs bit-identical: {same}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=4000, help="bioclim grid is SIZE x SIZE (12 months x 3 variables)")
    parser.add_argument("--ensemble-size", type=int, default=5000, help="ensemble grid is N x N")
    parser.add_argument("--models", type=int, default=6)
    parser.add_argument("--chunk", type=int, default=1000, help="y/x chunk size of the dask inputs")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    print(f"nproc {os.cpu_count()}, load average {' '.join(f'{v:.2f}' for v in os.getloadavg())}, "
          f"dask {dask.__version__}, numpy {np.__version__}, xarray {xr.__version__}")
    print(f"median of {args.repeats}; y/x chunks {args.chunk}; traced peak = tracemalloc peak of one extra "
          "untimed run; RSS rise = largest rise of the resident set during a timed run (psutil, 10 ms)")
    rng = np.random.default_rng(0)

    inputs = monthly_inputs(args.size, args.size, args.chunk, rng)
    shape = (len(variable_names()), args.size, args.size)
    out_former, out_new = touched(shape, np.float32), touched(shape, np.float32)
    compare(f"bioclim: 12 months x 3 variables x {args.size} x {args.size} float32 -> {shape[0]} variables",
            lambda: former_bioclim(*inputs).data, lambda: bioclim(*inputs).data, out_former, out_new, args.repeats)
    del inputs, out_former, out_new

    stack = model_stack(args.models, args.ensemble_size, args.chunk, rng)
    n = args.ensemble_size
    targets = [[touched((n, n), dt) for dt in (np.float32, np.float32, np.uint8, np.uint8)] for _ in range(2)]
    needed = consensus_count(args.models, DEFAULT_AGREEMENT)

    def new_ensemble():
        ds = ensemble_statistics(stack, 0.5)
        return [ds[k].data for k in ("mean", "sd", "count", "consensus")]

    compare(f"ensemble statistics: {args.models} models x {n} x {n} float32 -> mean, sd, count, consensus",
            lambda: [o.data for o in former_ensemble(stack, 0.5, needed)], new_ensemble, targets[0], targets[1],
            args.repeats)
    print(f"\nload average at the end {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
