"""Benchmark of `envelope fit`: wall time and peak memory of spatial block CV plus the final fit, per method.

Run:  .venv/bin/python bench/bench_fit.py [--repeats N] [--methods a,b] [--ensemble-repeats N]
      [--ensemble-full]

The data are a fictional 400 x 400 geographic grid (EPSG:4326, 0.05 degree cells, lon
-160..-140, lat 30..50: open North Pacific, no land) of 8 smooth random predictor fields;
1,000 presences are drawn from a known niche (a Gaussian response to 3 of the variables)
and 10,000 background cells uniformly, all from ``numpy.random.default_rng(0)``.

Each fit follows ``envelope.pipelines.fit.fit_model`` step for step from the sampled table on:
block size from the predictors' autocorrelation (``default_block_km``, as when
``--blocks-km`` is not given), ``spatial_blocks`` + ``assign_block_folds`` (5 folds),
``cross_validate`` with ``build_estimator`` / ``_group_params``, then the final fit on all
records. Reading records, drawing background, permutation importance and response curves
are not timed.

The ensemble is slow: each of its fits cross-validates and refits its three members, so its
full pipeline (5 CV fits + final fit) takes well over 10 minutes on 2 cores. By default it
gets 1 repeat of the final fit alone, with the full time estimated; ``--ensemble-full``
runs its CV too.

Every method runs in its own subprocess, so one method's memory cannot inflate another's.
Within it: ``--repeats`` timed fits (the median is reported) while a thread samples the
resident set size (psutil) every 10 ms; then one extra final fit under ``tracemalloc``
(the largest single fit of the pipeline; skipped for the ensemble) for the peak of
Python-visible allocations (NumPy buffers included; native allocations inside
scikit-learn's Cython/OpenMP code are not seen, which is why RSS is reported too).
Results: a table on stdout and ``bench/results/fit.json`` (git-ignored). Not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import threading
import time
import tracemalloc
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
METHODS = ("pointprocess", "envelope", "brt", "forest", "ensemble")
NY = NX = 400
RES = 0.05
WEST, NORTH = -160.0, 50.0  # fictional open-ocean placement: lon -160..-140, lat 30..50
N_VARS = 8
N_PRESENCE = 1_000
N_BACKGROUND = 10_000
N_FOLDS = 5
NICHE = {0: (0.6, 0.7), 2: (-0.4, 0.8), 5: (0.9, 0.6)}  # variable index -> (optimum, width) in SD units
SEED = 0


# ----------------------------------------------------------------------------- data
def make_table():
    """The sampled table the pipeline would build: X, y, point x/y, and the climate stack.

    Predictors: white noise smoothed with a Gaussian filter (sigma 6 to 20 cells, so the
    fields have autocorrelation ranges of tens to hundreds of km), standardised, then
    shifted and scaled to climate-like ranges. Suitability = prod_k exp(-(z_k - mu_k)^2 /
    (2 w_k^2)) over the 3 niche variables (Gaussian response); presences are cells drawn
    without replacement with probability proportional to suitability.
    """
    import rioxarray  # noqa: F401  (registers .rio)
    import xarray as xr
    from scipy.ndimage import gaussian_filter

    from envelope.records import values_at

    rng = np.random.default_rng(SEED)
    z = np.empty((N_VARS, NY, NX))
    for j in range(N_VARS):
        f = gaussian_filter(rng.standard_normal((NY, NX)), sigma=6.0 + 2.0 * j, mode="reflect")
        z[j] = (f - f.mean()) / f.std()
    suit = np.ones((NY, NX))
    for j, (mu, w) in NICHE.items():
        suit *= np.exp(-((z[j] - mu) ** 2) / (2.0 * w ** 2))
    offsets = 5.0 + 3.0 * np.arange(N_VARS)
    scales = 1.0 + 0.5 * np.arange(N_VARS)
    values = (offsets[:, None, None] + scales[:, None, None] * z).astype(np.float32)

    xs = WEST + RES * (np.arange(NX) + 0.5)
    ys = NORTH - RES * (np.arange(NY) + 0.5)
    names = [f"var{j + 1:02d}" for j in range(N_VARS)]
    climate = xr.DataArray(values, dims=("variable", "y", "x"), name="climate",
                           coords={"variable": names, "y": ys, "x": xs}).rio.write_crs("EPSG:4326")

    cells = NY * NX
    pres = rng.choice(cells, size=N_PRESENCE, replace=False, p=(suit / suit.sum()).ravel())
    back = rng.choice(cells, size=N_BACKGROUND, replace=False)
    pr, pc = np.divmod(pres, NX)
    br, bc = np.divmod(back, NX)
    X_pres = values_at(climate, pr, pc)
    X_bg = values_at(climate, br, bc)
    X = np.vstack([X_pres, X_bg])
    y = np.r_[np.ones(N_PRESENCE, dtype=int), np.zeros(N_BACKGROUND, dtype=int)]
    px = np.r_[xs[pc], xs[bc]]
    py = np.r_[ys[pr], ys[br]]
    return {"X": X, "y": y, "px": px, "py": py, "X_bg": X_bg, "names": names, "crs": climate.rio.crs}


# ----------------------------------------------------------------------------- one fit
def make_folds(d):
    """Block size, blocks and folds as ``fit_model`` makes them; seconds of each step."""
    import envelope.evaluation as evaluation

    y, px, py = d["y"], d["px"], d["py"]
    t0 = time.perf_counter()
    block_km, _ = evaluation.default_block_km(px[y == 0], py[y == 0], d["X_bg"], crs=d["crs"],
                                              names=d["names"], seed=SEED)
    t1 = time.perf_counter()
    blocks = evaluation.spatial_blocks(px, py, crs=d["crs"], block_km=block_km)
    folds = evaluation.assign_block_folds(blocks, y == 1, N_FOLDS, seed=SEED)
    t2 = time.perf_counter()
    return folds, {"block_km": block_km, "n_blocks": int(np.unique(blocks).size),
                   "block_size_s": t1 - t0, "folds_s": t2 - t1}


def final_fit(method, d, folds):
    """The last step of ``fit_model``: a fresh estimator fitted on every record."""
    from envelope.pipelines.fit import _group_params, build_estimator

    estimator = build_estimator(method, SEED)
    estimator.fit(d["X"], d["y"], **_group_params(method, folds))
    return estimator


def fit_once(method, d, *, with_cv=True):
    """One fit exactly as ``fit_model`` does it from the sampled table; stage seconds and CV AUC.

    ``with_cv=False`` skips the cross-validation (used for the slow ensemble by default).
    """
    import envelope.evaluation as evaluation
    from envelope.models.ensemble import clear_member_fits
    from envelope.models.tuning import clear_path_cache
    from envelope.pipelines.fit import _group_params, build_estimator

    X, y = d["X"], d["y"]
    clear_path_cache()  # each repeat starts cold: no tuning solve remembered from the last one
    clear_member_fits()  # nor an ensemble member fit
    folds, out = make_folds(d)
    t2 = time.perf_counter()
    cv = {"auc_mean": None, "auc_sd": None, "tss_mean": None}
    prefit_s = None
    if with_cv and method == "ensemble":
        # as fit_model does: every member fit of the nested CV first, in worker processes
        from envelope.models.ensemble import prefit_members

        prefit_members(build_estimator(method, SEED), X, y, folds, groups=folds)
        prefit_s = time.perf_counter() - t2
    parallel = with_cv and method != "ensemble"
    if parallel:
        # as fit_model does: the fold fits and the final fit side by side in worker processes
        _, cv, estimator = evaluation.cross_validate(lambda: build_estimator(method, SEED), X, y, folds,
                                                     threshold_rule="max-sss", fit_params=_group_params(method, folds),
                                                     n_jobs=os.cpu_count() or 1, final_fit=True)
    elif with_cv:
        _, cv = evaluation.cross_validate(lambda: build_estimator(method, SEED), X, y, folds,
                                          threshold_rule="max-sss", fit_params=_group_params(method, folds))
    t3 = time.perf_counter()
    if not parallel:
        estimator = final_fit(method, d, folds)
    t4 = time.perf_counter()
    out.update(cv_s=(t3 - t2) if with_cv else None, final_fit_s=t4 - t3, prefit_s=prefit_s,
               seconds=out["block_size_s"] + out["folds_s"] + (t3 - t2) + (t4 - t3),
               cv_auc_mean=cv["auc_mean"], cv_auc_sd=cv["auc_sd"], cv_tss_mean=cv["tss_mean"])
    # what the final model settled on: a check that the timings belong to sensible fits
    for attr in ("C_", "n_iter_", "weights_"):
        if hasattr(estimator, attr):
            v = getattr(estimator, attr)
            out[f"final_{attr.rstrip('_')}"] = v.tolist() if hasattr(v, "tolist") else v
    return out


class RSSSampler:
    """Peak resident set size (psutil) seen by a 10 ms polling thread while active."""

    def __init__(self, interval=0.01):
        import psutil

        self.proc = psutil.Process()
        self.interval = interval
        self.peak = 0
        self._stop = threading.Event()

    def rss(self):
        return self.proc.memory_info().rss

    def __enter__(self):
        self.peak = self.rss()
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        return self

    def _run(self):
        while not self._stop.wait(self.interval):
            self.peak = max(self.peak, self.rss())

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self.rss())


def worker(method, repeats, with_cv):
    """Run in a subprocess: ``repeats`` timed fits, then one traced final fit; prints a RESULT line."""
    import gc

    from threadpoolctl import threadpool_info

    import envelope.evaluation  # noqa: F401  (imports outside the timed region)
    import envelope.models  # noqa: F401

    d = make_table()
    runs, rss_deltas = [], []
    sampler = RSSSampler()
    baseline = sampler.rss()
    for _ in range(repeats):
        gc.collect()
        before = sampler.rss()
        with sampler:
            runs.append(fit_once(method, d, with_cv=with_cv))
        rss_deltas.append(sampler.peak - before)
    traced_peak = traced_s = None
    if method != "ensemble":
        # tracemalloc slows allocation-heavy code (up to ~2x here), so it gets its own run;
        # the final fit (all records) is the largest single fit of the pipeline
        from envelope.models.ensemble import clear_member_fits
        from envelope.models.tuning import clear_path_cache

        clear_path_cache()  # a cold fit, as in the timed runs
        clear_member_fits()
        folds, _ = make_folds(d)
        gc.collect()
        tracemalloc.start()
        t0 = time.perf_counter()
        final_fit(method, d, folds)
        traced_s = time.perf_counter() - t0
        traced_peak = tracemalloc.get_traced_memory()[1] / 2 ** 20
        tracemalloc.stop()

    def med(k):
        vals = [r[k] for r in runs]
        return None if vals[0] is None else statistics.median(vals)

    out = {"method": method, "repeats": repeats, "with_cv": with_cv, "seconds_median": med("seconds"),
           "seconds_all": [r["seconds"] for r in runs],
           "stages_median_s": {k: med(k) for k in ("block_size_s", "folds_s", "cv_s", "final_fit_s")},
           "rss_before_mib": baseline / 2 ** 20,
           "rss_peak_delta_mib": max(rss_deltas) / 2 ** 20,
           "rss_peak_delta_mib_all": [v / 2 ** 20 for v in rss_deltas],
           "tracemalloc_peak_mib_final_fit": traced_peak, "traced_final_fit_seconds": traced_s,
           **{k: v for k, v in runs[0].items() if k not in ("seconds", "block_size_s", "folds_s", "cv_s",
                                                            "final_fit_s")},
           "threadpools": [{k: p.get(k) for k in ("user_api", "internal_api", "num_threads")}
                           for p in threadpool_info()]}
    if not with_cv:
        # sum over folds of training rows = (K - 1) n, so with cost linear in rows the K CV
        # fits cost about (K - 1) final fits: a rough estimate, labelled as such
        s = out["stages_median_s"]
        out["seconds_estimated_full"] = s["block_size_s"] + s["folds_s"] + N_FOLDS * s["final_fit_s"]
    print("RESULT " + json.dumps(out), flush=True)


# ----------------------------------------------------------------------------- main
def machine():
    import psutil
    import sklearn

    return {"date_utc": time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime()), "nproc": os.cpu_count(),
            "affinity_cpus": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
            "memory_gib": round(psutil.virtual_memory().total / 2 ** 30, 1),
            "python": platform.python_version(), "numpy": np.__version__, "scikit-learn": sklearn.__version__,
            "loadavg_start": [round(v, 2) for v in os.getloadavg()]}


def _f(v, fmt):
    return "—" if v is None else format(v, fmt)


def report(results):
    m = results["machine"]
    print(f"\nenvelope fit benchmark — {m['date_utc']} UTC, {m['nproc']} CPUs, {m['memory_gib']} GiB, "
          f"load average at start {m['loadavg_start']} / end {m['loadavg_end']}")
    print(f"{N_PRESENCE} presences, {N_BACKGROUND} background, {N_VARS} variables, {N_FOLDS}-fold spatial "
          f"block CV (block {results['runs'][0]['block_km']:.0f} km) + final fit\n")
    head = (f"{'method':<14}{'reps':>5}{'median s':>10}{'blocks':>8}{'CV s':>8}{'final s':>9}"
            f"{'RSS Δ MiB':>11}{'tracemalloc MiB':>17}{'CV AUC':>16}")
    print(head)
    print("-" * len(head))
    notes = []
    for r in results["runs"]:
        s = r["stages_median_s"]
        name, total = r["method"], r["seconds_median"]
        if not r["with_cv"]:
            name += " *"
            notes.append(f"* {r['method']}: final fit only (CV not run; --ensemble-full runs it); "
                         f"full pipeline estimated at ~{r['seconds_estimated_full']:.0f} s "
                         f"(blocks + {N_FOLDS} x final fit, cost taken as linear in rows)")
        auc = "—" if r["cv_auc_mean"] is None else f"{r['cv_auc_mean']:.3f} ±{r['cv_auc_sd']:.3f}"
        print(f"{name:<14}{r['repeats']:>5}{total:>10.2f}{s['block_size_s'] + s['folds_s']:>8.2f}"
              f"{_f(s['cv_s'], '.2f'):>8}{s['final_fit_s']:>9.2f}{r['rss_peak_delta_mib']:>11.0f}"
              f"{_f(r['tracemalloc_peak_mib_final_fit'], '.1f'):>17}{auc:>16}")
    for n in notes:
        print(n)
    print(f"\ntotal {results['total_seconds']:.0f} s. median s = block size + blocks/folds + CV + final fit.")
    print("RSS Δ = psutil peak resident set (10 ms polling) during a timed fit minus RSS just before it, "
          "max over repeats.\ntracemalloc = peak Python-visible allocations (NumPy buffers included) in one "
          "extra untimed final fit on all records; not run for the ensemble.")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3, help="timed fits per method (median reported)")
    ap.add_argument("--ensemble-repeats", type=int, default=1,
                    help="timed fits for 'ensemble', which is slow (default 1)")
    ap.add_argument("--ensemble-full", action="store_true",
                    help="also run the ensemble's cross-validation (about 5x its final fit; over 10 min on 2 cores)")
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--no-cv", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.repeats < 1 or a.ensemble_repeats < 1:
        ap.error("--repeats and --ensemble-repeats must be at least 1")
    if a.worker:
        worker(a.worker, a.repeats, with_cv=not a.no_cv)
        return
    methods = [m.strip() for m in a.methods.split(",") if m.strip()]
    unknown = [m for m in methods if m not in METHODS]
    if unknown:
        ap.error(f"--methods: unknown {', '.join(unknown)}; expected some of {', '.join(METHODS)}")

    t_start = time.perf_counter()
    results = {"machine": machine(),
               "data": {"grid": [NY, NX], "resolution_deg": RES, "crs": "EPSG:4326",
                        "extent": [WEST, NORTH - NY * RES, WEST + NX * RES, NORTH],
                        "n_variables": N_VARS, "n_presence": N_PRESENCE, "n_background": N_BACKGROUND,
                        "niche_variables": [f"var{j + 1:02d}" for j in NICHE], "seed": SEED,
                        "n_folds": N_FOLDS, "threshold_rule": "max-sss"},
               "runs": []}
    for method in methods:
        repeats = a.ensemble_repeats if method == "ensemble" else a.repeats
        cmd = [sys.executable, __file__, "--worker", method, "--repeats", str(repeats)]
        if method == "ensemble" and not a.ensemble_full:
            cmd.append("--no-cv")
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode != 0:
            raise RuntimeError(f"{method} failed:\n{proc.stderr[-3000:]}")
        line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
        results["runs"].append(json.loads(line[7:]))
        print(f"  done {method} ({time.perf_counter() - t_start:.0f} s)", file=sys.stderr, flush=True)
    results["machine"]["loadavg_end"] = [round(v, 2) for v in os.getloadavg()]
    results["total_seconds"] = time.perf_counter() - t_start
    report(results)
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "fit.json").write_text(json.dumps(results, indent=2))
    print(f"wrote {out / 'fit.json'}")


if __name__ == "__main__":
    main()
