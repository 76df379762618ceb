"""Benchmark of the monthly climatology of CF series: envelope's reader against xarray's own groupby-mean.

Run:  .venv/bin/python bench/bench_climatology.py [--size 1000] [--years 30] [--repeats 1] [--keep DIR]

The data are fictional: three variables (tasmin, tasmax in K, pr in kg m-2 s-1) of a
``--years`` monthly series on a ``--size`` x ``--size`` geographic grid with 0-360 longitudes
(165..195 E, 30..45 N: open North Pacific across the 180° meridian),
noleap calendar, each variable split into one file per decade (as climate-model archives
deliver them), written uncompressed to a temporary folder (``--keep`` keeps them there).
Values are smooth random fields (``numpy.random.default_rng(0)``) plus a seasonal cycle.

Two ways of computing the 1991-2020 climatology of the three variables, each run in its own
subprocess (so one cannot inflate the other's memory), with dask's threaded scheduler on 2
workers:

- ``envelope``: :func:`envelope.io.series.open_monthly_series` per variable (one year of
  months per chunk, day-weighted temperature means, pr converted to mm per month), each
  result computed into memory;
- ``xarray``: ``xr.open_mfdataset(files, chunks={"time": 12})``, ``.sel(time=period)``,
  ``.groupby("time.month").mean()`` computed (no unit conversion and no day weights: on a
  noleap calendar every calendar month has the same days each year, so the temperature
  means agree; the pr means differ by the unit factor alone, which is checked).

Wall time (median of ``--repeats``, the methods alternated) and peak resident set size (psutil, sampled every
10 ms, minus the subprocess's RSS before the work) are printed and written to
``bench/results/climatology.json`` (git-ignored). Not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
VARIABLES = ("tasmin", "tasmax", "pr")
FIRST_YEAR = 1991
NOLEAP_DAYS = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=float)


def write_series(folder: Path, size: int, years: int) -> dict:
    """One file per variable and decade, written one year at a time (netCDF4, uncompressed)."""
    import netCDF4

    rng = np.random.default_rng(0)
    field = rng.normal(size=(size, size)).astype(np.float32)
    lat = np.linspace(45.0, 30.0, size)
    lon = np.linspace(165.0, 195.0, size)   # 0-360 longitudes over the 180 deg meridian, open North Pacific
    files = {v: [] for v in VARIABLES}
    for start in range(FIRST_YEAR, FIRST_YEAR + years, 10):
        stop = min(start + 10, FIRST_YEAR + years)
        for var in VARIABLES:
            path = folder / f"{var}_{start}-{stop - 1}.nc"
            with netCDF4.Dataset(path, "w") as nc:
                nc.createDimension("time", None)
                nc.createDimension("lat", size)
                nc.createDimension("lon", size)
                t = nc.createVariable("time", "f8", ("time",))
                t.units, t.calendar = "days since 1850-01-01", "noleap"
                nc.createVariable("lat", "f8", ("lat",))[:] = lat
                nc.createVariable("lon", "f8", ("lon",))[:] = lon
                nc["lat"].units, nc["lon"].units = "degrees_north", "degrees_east"
                v = nc.createVariable(var, "f4", ("time", "lat", "lon"), chunksizes=(1, size, size))
                v.units = "kg m-2 s-1" if var == "pr" else "K"
                step = 0
                for year in range(start, stop):
                    for month in range(12):
                        day = (year - 1850) * 365 + NOLEAP_DAYS[:month].sum() + 14
                        t[step] = day
                        season = np.float32(10.0 * np.sin(2 * np.pi * month / 12))
                        if var == "pr":
                            v[step] = np.float32(3e-5) * (1.5 + 0.5 * np.tanh(field)) * (1.0 + 0.1 * season / 10)
                        else:
                            v[step] = np.float32(280.0 + (5.0 if var == "tasmax" else 0.0)) + season + field
                        step += 1
            files[var].append(str(path))
    return files


def _sampler(stop, peak, proc):
    while not stop.is_set():
        peak[0] = max(peak[0], proc.memory_info().rss)
        time.sleep(0.01)


def run_one(method: str, files: dict, years: int) -> dict:
    """In the subprocess: time the climatology of the three variables, sampling RSS."""
    import dask
    import psutil
    import xarray as xr

    from envelope.io.series import open_monthly_series   # imported before the baseline RSS is taken

    proc = psutil.Process()
    dask.config.set(scheduler="threads", num_workers=2)
    period = (FIRST_YEAR, FIRST_YEAR + years - 1)
    base = proc.memory_info().rss
    peak = [base]
    stop = threading.Event()
    thread = threading.Thread(target=_sampler, args=(stop, peak, proc), daemon=True)
    thread.start()
    t0 = time.perf_counter()
    out = {}
    if method == "envelope":
        for var in VARIABLES:
            kind = "precipitation" if var == "pr" else "temperature"
            out[var] = open_monthly_series(files[var], name=var, units=kind, period=period).values
    else:
        for var in VARIABLES:
            ds = xr.open_mfdataset(files[var], chunks={"time": 12}, combine="by_coords",
                                   decode_times=xr.coders.CFDatetimeCoder(use_cftime=True))
            sel = ds[var].sel(time=slice(f"{period[0]}-01-01", f"{period[1]}-12-31"))
            out[var] = sel.groupby("time.month").mean().values
            ds.close()
    wall = time.perf_counter() - t0
    stop.set()
    thread.join()
    summary = {"wall_s": wall, "peak_rss_mb": (peak[0] - base) / 2 ** 20,
               "checksum": {v: float(np.nanmean(a[:, ::97, ::89])) for v, a in out.items()}}
    return summary


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--years", type=int, default=30)
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--keep", type=Path, default=None, help="write (or re-use) the files in this folder")
    parser.add_argument("--worker", nargs=2, metavar=("METHOD", "FILES_JSON"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        method, files_json = args.worker
        print(json.dumps(run_one(method, json.loads(Path(files_json).read_text()), args.years)))
        return 0

    folder = args.keep or Path(tempfile.mkdtemp(prefix="bench_climatology_"))
    folder.mkdir(parents=True, exist_ok=True)
    listing = folder / "files.json"
    t0 = time.perf_counter()
    if listing.is_file() and json.loads(listing.read_text()).get("shape") == [args.size, args.years]:
        files = json.loads(listing.read_text())["files"]
    else:
        files = write_series(folder, args.size, args.years)
        listing.write_text(json.dumps({"shape": [args.size, args.years], "files": files}))
    written = time.perf_counter() - t0
    sizes = sum(os.path.getsize(f) for fs in files.values() for f in fs)
    (folder / "only_files.json").write_text(json.dumps(files))
    results = {}
    try:
        runs = {"envelope": [], "xarray": []}
        env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE.parent), os.environ.get("PYTHONPATH", "")]))
        for _ in range(args.repeats):
            for method in runs:   # alternated, so a busy machine slows both alike
                done = subprocess.run([sys.executable, __file__, "--years", str(args.years), "--worker", method,
                                       str(folder / "only_files.json")], capture_output=True, text=True, env=env,
                                      check=True)
                runs[method].append(json.loads(done.stdout.strip().splitlines()[-1]))
        for method, rs in runs.items():
            results[method] = {"wall_s": statistics.median(r["wall_s"] for r in rs),
                               "wall_all_s": [round(r["wall_s"], 2) for r in rs],
                               "peak_rss_mb": max(r["peak_rss_mb"] for r in rs), "checksum": rs[0]["checksum"]}
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)
    env_c, xr_c = results["envelope"]["checksum"], results["xarray"]["checksum"]
    # K -> degC on temperature; pr: kg m-2 s-1 -> mm/month (x 86400 x days) is month dependent, so only
    # the temperatures are compared directly
    agree = all(abs(env_c[v] - (xr_c[v] - 273.15)) < 1e-3 for v in ("tasmin", "tasmax"))
    report = {"size": args.size, "years": args.years, "variables": list(VARIABLES),
              "files": sum(len(f) for f in files.values()), "bytes_on_disk": sizes, "write_s": written,
              "results": results, "temperatures_agree": agree,
              "ratio_wall_envelope_over_xarray": results["envelope"]["wall_s"] / results["xarray"]["wall_s"],
              "ratio_peak_envelope_over_xarray": (results["envelope"]["peak_rss_mb"]
                                                   / max(results["xarray"]["peak_rss_mb"], 1e-9)),
              "machine": {"python": platform.python_version(), "cpus": os.cpu_count()}}
    print(f"climatology of {args.years} years x 12 months, {args.size} x {args.size} cells, 3 variables "
          f"({report['files']} files, {sizes / 2 ** 30:.2f} GiB; written in {written:.0f} s)")
    print(f"{'method':10s} {'wall s':>8s} {'peak RSS MB':>12s}")
    for method, r in results.items():
        print(f"{method:10s} {r['wall_s']:8.1f} {r['peak_rss_mb']:12.0f}")
    print(f"ratio envelope / xarray: wall {report['ratio_wall_envelope_over_xarray']:.2f}, "
          f"peak memory {report['ratio_peak_envelope_over_xarray']:.2f}; temperatures agree: {agree}")
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "climatology.json").write_text(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
