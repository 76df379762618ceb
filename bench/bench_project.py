"""Benchmark of `envelope project`: streamed projection against an in-memory predict and the bare I/O floor.

Run:  .venv/bin/python bench/bench_project.py [--ny 5000 --nx 5000] [--workdir /tmp/envelope-bench]

Every measurement runs in its own subprocess, which reports its wall time and its own
peak resident memory (``ru_maxrss``), so one run cannot inflate another's peak. The
fictional grid lies in open ocean (no real land) and is made of smooth analytic fields.
Results: a table on stdout and ``bench/results/project.json`` (git-ignored).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
N_VARS = 19
TILE = 512
WEST, NORTH, RES = -125.0, -30.0, 0.004  # fictional open-ocean placement


# ----------------------------------------------------------------------------- data
def _fields(rows, cols, n_vars):
    """Smooth, compressible climate-like fields (n_vars, len(rows), len(cols)), float32."""
    r = rows[:, None].astype(np.float64) / 1000.0
    c = cols[None, :].astype(np.float64) / 1000.0
    out = np.empty((n_vars, rows.size, cols.size), dtype=np.float32)
    for j in range(n_vars):
        a, b = 0.7 + 0.11 * j, 1.3 - 0.05 * j
        v = (10.0 * np.sin(a * r + 0.3 * j) + 8.0 * np.cos(b * c - 0.2 * j)
             + 3.0 * np.sin(0.5 * (r + c) * (1 + 0.1 * j)) + (j + 1) * 2.0 * r)
        out[j] = np.round(v, 2)
    return out


def make_stack(path, ny, nx, n_vars):
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    profile = dict(driver="GTiff", width=nx, height=ny, count=n_vars, dtype="float32", crs="EPSG:4326",
                   transform=from_origin(WEST, NORTH, RES * 5000 / max(nx, 1), RES * 5000 / max(ny, 1)),
                   tiled=True, blockxsize=TILE, blockysize=TILE, compress="DEFLATE", predictor=3, zlevel=1,
                   interleave="band", BIGTIFF="IF_SAFER", nodata=np.nan)
    with rasterio.open(path, "w", **profile) as dst:
        for i in range(n_vars):
            dst.set_band_description(i + 1, f"bio{i + 1}")
        for r0 in range(0, ny, TILE):
            h = min(TILE, ny - r0)
            block = _fields(np.arange(r0, r0 + h), np.arange(nx), n_vars)
            if r0 == 0:
                block[:, :8, :8] = np.nan  # a nodata corner
            dst.write(block, window=Window(0, r0, nx, h))
    return {"path": str(path), "cells": ny * nx, "bytes": os.path.getsize(path)}


# ----------------------------------------------------------------------------- models
def fit_models(out_dir, ny, nx, n_vars, only=None):
    from envelope.io.modelfile import save_model
    from envelope.kernels.mess import reference_from_training
    from envelope.models import (BoostedTrees, DownsampledForest, PercentileEnvelope, PointProcessModel,
                                 SkillWeightedEnsemble)

    rng = np.random.default_rng(0)
    n_bg = 5000
    rows, cols = rng.integers(0, ny, n_bg), rng.integers(0, nx, n_bg)
    X = np.stack([_fields(np.array([r]), np.array([c]), n_vars)[:, 0, 0] for r, c in zip(rows, cols)]).astype(np.float64)
    # virtual species: prefers mid bio1, low bio5
    z = (X - X.mean(0)) / X.std(0)
    p = 1.0 / (1.0 + np.exp(-(1.5 - 1.2 * z[:, 0] ** 2 - 0.8 * z[:, min(4, n_vars - 1)])))
    pres = X[rng.uniform(size=n_bg) < p * 0.15][:400]
    Xa = np.r_[pres, X]
    ya = np.r_[np.ones(len(pres)), np.zeros(n_bg)]
    names = [f"bio{i + 1}" for i in range(n_vars)]
    meta = {"variables": [{"name": n, "units": "", "min": float(Xa[:, j].min()), "max": float(Xa[:, j].max())}
                          for j, n in enumerate(names)],
            "threshold": {"value": 0.3, "rule": "fixed (benchmark)"},
            "mess_reference": reference_from_training(Xa).to_dict()}
    pp = PointProcessModel(C=10.0)  # default feature classes: auto -> all four with 400 presences
    brt = BoostedTrees(max_iter=100, early_stopping=False, random_state=0)
    models = {
        "pointprocess": pp,
        # a weakly penalised fit keeps many more features (150-odd of 589): the kernel's worst case
        "pointprocess-dense": PointProcessModel(C=1000.0),
        "envelope": PercentileEnvelope(),
        "brt": brt,
        "forest": DownsampledForest(n_estimators=50, random_state=0),
        "ensemble": SkillWeightedEnsemble(members=[("pointprocess", PointProcessModel(C=10.0)),
                                                   ("brt", BoostedTrees(max_iter=100, early_stopping=False,
                                                                        random_state=0))],
                                          weights_from={"pointprocess": 0.8, "brt": 0.8}),
    }
    info = {}
    for name, est in models.items():
        if only is not None and name not in only:
            continue
        est.fit(Xa, ya)
        save_model(Path(out_dir) / f"{name}.envm", est, meta, overwrite=True)
        info[name] = {"path": str(Path(out_dir) / f"{name}.envm")}
        if name.startswith("pointprocess"):
            info[name]["n_features"] = int(est.coef_.size)
            info[name]["n_nonzero"] = int(np.count_nonzero(est.coef_))
    return info


# ----------------------------------------------------------------------------- measurements
def _peak_mib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_floor(stack, out):
    """Read every tile of every band and write a same-size float32 band: no model."""
    from concurrent.futures import ThreadPoolExecutor

    import rasterio
    from rasterio.windows import Window

    t0 = time.perf_counter()
    with rasterio.open(stack) as src:
        profile = src.profile.copy()
        profile.update(count=1, interleave="band")
        ny, nx = src.height, src.width
        windows = [Window(c, r, min(1024, nx - c), min(1024, ny - r))
                   for r in range(0, ny, 1024) for c in range(0, nx, 1024)]

    def read(w):
        with rasterio.open(stack) as s:  # one handle per read: GDAL handles are not thread-safe
            return w, s.read(window=w)

    with rasterio.open(out, "w", **profile) as dst, ThreadPoolExecutor(2) as pool:
        for w, block in pool.map(read, windows):
            dst.write(block[0], 1, window=w)
    return {"seconds": time.perf_counter() - t0}


def run_project(model, stack, out, mess=None):
    """``project_file`` on a warm process: the one-off imports (scikit-learn, and skops,
    which lists every scikit-learn estimator when imported) are timed apart."""
    t0 = time.perf_counter()
    import skops.io  # noqa: F401

    import envelope.models  # noqa: F401
    from envelope.pipelines.project import project_file

    t1 = time.perf_counter()
    res = project_file(model, stack, out, mess_out=mess, overwrite=True)
    return {"seconds": time.perf_counter() - t1, "import_seconds": t1 - t0, "novel_share": res["novel_share"]}


def run_reference(model, stack, cells):
    """The estimator's own predict_proba on a stack loaded whole (features materialised)."""
    import rasterio
    from rasterio.windows import Window

    from envelope.io.modelfile import load_model

    est, _ = load_model(model)
    with rasterio.open(stack) as src:
        rows = int(np.ceil(cells / src.width))
        X = src.read(window=Window(0, 8, src.width, rows)).reshape(src.count, -1)[:, :cells].T.astype(np.float64)
    X = X[np.isfinite(X).all(axis=1)]
    t0 = time.perf_counter()
    s = est.predict_proba(X)[:, 1]
    return {"seconds": time.perf_counter() - t0, "cells": int(X.shape[0]), "checksum": float(s.sum())}


def worker(argv):
    kind, args = argv[0], json.loads(argv[1])
    fn = {"make": make_stack, "fit": fit_models, "floor": run_floor, "project": run_project,
          "reference": run_reference}[kind]
    result = fn(**args)
    result = result if isinstance(result, dict) else {}
    result["peak_mib"] = _peak_mib()
    print("RESULT " + json.dumps(result))


GDAL_CACHE_MB = None  # set from --gdal-cache-mb; the same for every worker, floor included


def call(kind, **args):
    env = dict(os.environ)
    if GDAL_CACHE_MB:
        # GDAL's block cache defaults to 5 % of RAM (1.2 GiB here) and counts in the peak
        env["GDAL_CACHEMAX"] = str(GDAL_CACHE_MB)
    proc = subprocess.run([sys.executable, __file__, "--worker", kind, json.dumps(args)],
                          capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"{kind} failed:\n{proc.stderr[-3000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[7:])


# ----------------------------------------------------------------------------- main
def repeated(kind, repeats, **args):
    """Run a measurement ``repeats`` times (fresh subprocess each); see :func:`_median_run`."""
    return _median_run([call(kind, **args) for _ in range(repeats)])


def _median_run(runs):
    """The run with the median wall time, with every time and the largest peak."""
    times = [r["seconds"] for r in runs]
    median = sorted(runs, key=lambda r: r["seconds"])[len(runs) // 2]
    return {**median, "seconds": float(np.median(times)), "all_seconds": times,
            "peak_mib": max(r["peak_mib"] for r in runs)}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ny", type=int, default=5000)
    ap.add_argument("--nx", type=int, default=5000)
    ap.add_argument("--workdir", default="/tmp/envelope-bench")
    ap.add_argument("--repeats", type=int, default=3, help="runs of the floor and of each streamed projection")
    ap.add_argument("--ref-cells", type=int, nargs=2, default=[250_000, 500_000],
                    help="two stack sizes for the in-memory point-process reference (memory is extrapolated)")
    ap.add_argument("--tree-ref-cells", type=int, default=2_000_000)
    ap.add_argument("--flat", type=int, nargs=2, default=[10_000_000, 100_000_000],
                    help="grid sizes of the memory-flatness run (2 variables, percentile envelope)")
    ap.add_argument("--methods", default="pointprocess,pointprocess-dense,envelope,brt,forest,ensemble")
    ap.add_argument("--gdal-cache-mb", type=int, default=256,
                    help="GDAL_CACHEMAX for every worker (0: GDAL's default of 5 %% of RAM)")
    a = ap.parse_args()
    global GDAL_CACHE_MB
    GDAL_CACHE_MB = a.gdal_cache_mb or None
    work = Path(a.workdir)
    work.mkdir(parents=True, exist_ok=True)
    t_start = time.perf_counter()
    stack = work / "stack19.tif"
    cells = a.ny * a.nx
    results = {"grid": {"ny": a.ny, "nx": a.nx, "cells": cells, "variables": N_VARS,
                        "format": "GeoTIFF, tiled 512, DEFLATE (zlevel 1, predictor 3), band-interleaved",
                        "cpus": os.cpu_count(), "gdal_cachemax_mb": a.gdal_cache_mb or "default",
                        "repeats": a.repeats, "load_average_start": os.getloadavg()}}
    if not stack.exists() or stack.stat().st_size == 0:
        t0 = time.perf_counter()
        results["grid"].update(call("make", path=str(stack), ny=a.ny, nx=a.nx, n_vars=N_VARS))
        results["grid"]["make_seconds"] = time.perf_counter() - t0
    results["grid"]["bytes"] = stack.stat().st_size
    models = call("fit", out_dir=str(work), ny=a.ny, nx=a.nx, n_vars=N_VARS)
    results["models"] = models
    floor = repeated("floor", a.repeats, stack=str(stack), out=str(work / "floor.tif"))
    floor["cells_per_s"] = cells / floor["seconds"]
    results["io_floor"] = floor
    rows = []
    for name in a.methods.split(","):
        model = models[name]["path"]
        sizes = a.ref_cells if name.startswith("pointprocess") or name == "ensemble" else \
            [a.tree_ref_cells // 2, a.tree_ref_cells]
        # streamed and in-memory runs alternate, so a drift in machine speed during the
        # benchmark hits both alike
        streamed, refs = [], []
        for _ in range(a.repeats):
            streamed.append(call("project", model=model, stack=str(stack), out=str(work / f"suit_{name}.tif")))
            refs.append(call("reference", model=model, stack=str(stack), cells=sizes[1]))
        r = _median_run(streamed)
        r.update(method=name, kind="streamed", cells=cells, cells_per_s=cells / r["seconds"])
        rows.append(r)
        if name == "pointprocess":
            r = repeated("project", a.repeats, model=model, stack=str(stack), out=str(work / "suit_pp_mess.tif"),
                         mess=str(work / "mess_pp.tif"))
            r.update(method=name + "+mess", kind="streamed", cells=cells, cells_per_s=cells / r["seconds"])
            rows.append(r)
        small = call("reference", model=model, stack=str(stack), cells=sizes[0])
        big = _median_run(refs)
        # peak(N) = base + slope * N, fitted through the two sizes, extrapolated to the full grid
        slope = (big["peak_mib"] - small["peak_mib"]) / (big["cells"] - small["cells"])
        base = big["peak_mib"] - slope * big["cells"]
        rows.append({"method": name, "kind": "in-memory predict_proba", "cells": big["cells"],
                     "seconds": big["seconds"], "all_seconds": big["all_seconds"],
                     "cells_per_s": big["cells"] / big["seconds"],
                     "peak_mib": big["peak_mib"], "peak_mib_full_grid_extrapolated": base + slope * cells,
                     "memory_formula": f"{base:.0f} MiB + {slope * 1e6:.1f} MiB per million cells",
                     "seconds_full_grid_extrapolated": cells / (big["cells"] / big["seconds"])})
        print(f"  done {name} ({time.perf_counter() - t_start:.0f} s)", file=sys.stderr, flush=True)
    results["runs"] = rows
    flat = []
    for n in a.flat:
        side = int(round(np.sqrt(n)))
        path = work / f"stack2_{side}.tif"
        if not path.exists():
            call("make", path=str(path), ny=side, nx=side, n_vars=2)
        two = work / "two"
        two.mkdir(exist_ok=True)
        if not (two / "envelope.envm").exists():
            call("fit", out_dir=str(two), ny=side, nx=side, n_vars=2, only=["envelope"])
        r = call("project", model=str(two / "envelope.envm"), stack=str(path), out=str(work / f"flat_{side}.tif"))
        r.update(cells=side * side, cells_per_s=side * side / r["seconds"])
        flat.append(r)
    results["memory_flatness"] = {"method": "envelope (percentile), 2 variables", "runs": flat}
    results["total_seconds"] = time.perf_counter() - t_start
    results["grid"]["load_average_end"] = os.getloadavg()
    _report(results)
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "project.json").write_text(json.dumps(results, indent=2))


def _report(res):
    g = res["grid"]
    print(f"grid: {g['ny']} x {g['nx']} = {g['cells'] / 1e6:.1f} M cells x {g['variables']} float32 variables, "
          f"{g['bytes'] / 2**30:.2f} GiB on disk ({g['format']}), {g['cpus']} CPUs, medians of {g['repeats']}; "
          f"load average {g['load_average_start'][0]:.2f} at start, {g['load_average_end'][0]:.2f} at end")
    f = res["io_floor"]
    print(f"I/O floor (rasterio: read every band of every window, write one DEFLATE band): {f['seconds']:.2f} s "
          f"(runs {', '.join(f'{t:.2f}' for t in f['all_seconds'])}), {f['cells_per_s'] / 1e6:.2f} M cells/s, "
          f"peak {f['peak_mib']:.0f} MiB")
    print(f"{'method':<20}{'kind':<26}{'cells':>10}{'s':>8}{'Mcells/s':>10}{'peak MiB':>10}{'x floor':>9}  note")
    streamed = {r["method"]: r for r in res["runs"] if r["kind"] == "streamed"}
    for r in res["runs"]:
        if r["kind"] == "streamed":
            ratio = f"{r['seconds'] / f['seconds']:>9.2f}"
            note = f"runs {', '.join(f'{t:.2f}' for t in r['all_seconds'])}; imports {r['import_seconds']:.1f} s apart"
        else:
            ratio = f"{'':>9}"
            s = streamed[r["method"]]
            note = (f"runs {', '.join(f'{t:.2f}' for t in r['all_seconds'])}; full grid ~{r['peak_mib_full_grid_extrapolated'] / 1024:.1f} GiB, ~{r['seconds_full_grid_extrapolated']:.0f} s "
                    f"({r['memory_formula']}); streamed is {s['cells_per_s'] / r['cells_per_s']:.1f}x the throughput "
                    f"at {s['peak_mib'] / r['peak_mib_full_grid_extrapolated']:.3f} of the memory")
        print(f"{r['method']:<20}{r['kind']:<26}{r['cells'] / 1e6:>9.2f}M{r['seconds']:>8.2f}"
              f"{r['cells_per_s'] / 1e6:>10.3f}{r['peak_mib']:>10.0f}{ratio}  {note}")
    for r in res["memory_flatness"]["runs"]:
        print(f"flatness {res['memory_flatness']['method']}: {r['cells'] / 1e6:.0f} M cells, {r['seconds']:.1f} s, "
              f"peak {r['peak_mib']:.0f} MiB")
    print(f"total benchmark time {res['total_seconds']:.0f} s")


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--worker":
        worker(sys.argv[2:])
    else:
        main()
