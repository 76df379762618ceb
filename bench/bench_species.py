"""Benchmark of a multi-species study: wall time per species and in total, locally and on a LocalCluster.

Run:  .venv/bin/python bench/bench_species.py [--species 20] [--workers 2] [--keep DIR]

The species are virtual: each is a random 60 % of the fictional demo presences
(``numpy.random.default_rng(species number)``) under an invented name (``Virtualis alpha``,
``Virtualis beta``, ...), all in one records file, so each has its own fit and range. The
study is the demo study cut down (one method, 1,500 background cells, 3-fold block CV, two
pathways x one climate model x two horizons, reach with the counterfactual, no figures), with
``records.species = "all"``.

The same study is run twice, each into a fresh run folder: locally (species one after the
other, dask's threaded scheduler) and on ``distributed.LocalCluster(processes=True,
n_workers=--workers, threads_per_worker=1)`` (each species a task). The outputs of the two
runs are compared file by file (raster pixels, tables), and the wall time of each species
(from the run folder's manifest) and of the whole run are printed and written to
``bench/results/species.json`` (git-ignored). Not a test.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import platform
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

EPITHETS = ("alpha", "beta", "gamma", "delta", "epsilon", "zeta", "eta", "theta", "iota", "kappa", "lambda", "mu",
            "nu", "xi", "omicron", "pi", "rho", "sigma", "tau", "upsilon", "phi", "chi", "psi", "omega")


def make_study(folder: Path, n: int) -> Path:
    import numpy as np
    import pandas as pd

    from envelope.study.demo import demo_dir

    demo = demo_dir()
    table = pd.read_csv(demo / "presences.csv", dtype=str, keep_default_na=False)
    parts = []
    for i in range(n):
        pick = np.random.default_rng(i).random(len(table)) < 0.6
        part = table[pick].copy()
        part["scientificName"] = f"Virtualis {EPITHETS[i % len(EPITHETS)]}" + ("" if i < len(EPITHETS) else f"{i}")
        parts.append(part)
    records = folder / "virtual_species.csv"
    pd.concat(parts).to_csv(records, index=False)
    grids = "\n".join(f'[[scenarios.grid]]\nname = "{p}_{h}"\npathway = "{p}"\nclimate_model = "model-a"\n'
                      f'horizon = {h}\npath = "{demo / "scenarios" / f"{p}_model-a_{h}.tif"}"\n'
                      for p in ("low", "high") for h in (2050, 2080))
    text = f"""[study]
name = "Virtual species benchmark"

[records]
path = "{records}"
species = "all"
max_uncertainty_m = 2000

[climate]
baseline = "{demo / 'baseline.tif'}"
variables = ["bio5", "bio6", "bio12", "gdd5"]

[model]
background = 1500
folds = 3
blocks_km = 60
threshold_rule = "p10"

[scenarios]
agreement = 0.5
{grids}
[habitat]
path = "{demo / 'habitat.tif'}"

[dispersal]
kernel = "exponential"
mean_distance_km = 5.0
step_years = 10
rate = 4.0

[outputs]
figures = false
"""
    path = folder / "study.toml"
    path.write_text(text)
    return path


def digests(run_dir: Path) -> dict:
    import rasterio

    out = {}
    for p in sorted(run_dir.rglob("*")):
        if not p.is_file() or p.name in ("manifest.json", "report.html") or p.suffix == ".envm":
            continue
        h = hashlib.sha256()
        if p.suffix == ".tif":
            with rasterio.open(p) as src:
                h.update(src.read().tobytes())
        else:
            h.update(p.read_text().replace(str(run_dir), "RUN").encode())
        out[str(p.relative_to(run_dir))] = h.hexdigest()
    return out


def timed_run(study_path: Path, out: Path, client=None) -> dict:
    from envelope.study.runner import run_study
    from envelope.study.schema import load_study

    start = time.perf_counter()
    run_study(load_study(study_path), out, client=client)
    total = time.perf_counter() - start
    manifest = json.loads((out / "manifest.json").read_text())
    per = {name: s["seconds"] for name, s in manifest["species"].items()}
    return {"total_s": round(total, 2), "species_s": per, "median_species_s": round(statistics.median(per.values()), 2),
            "sum_species_s": round(sum(per.values()), 2)}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--species", type=int, default=20)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--keep", type=Path, default=None, help="keep the study and both run folders here")
    args = ap.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="envelope-species-")) if args.keep is None else args.keep
    folder.mkdir(parents=True, exist_ok=True)
    study = make_study(folder, args.species)
    local = timed_run(study, folder / "run-local")
    from distributed import Client, LocalCluster

    start = time.perf_counter()
    with LocalCluster(processes=True, n_workers=args.workers, threads_per_worker=1, dashboard_address=None,
                      silence_logs=40) as cluster, Client(cluster) as client:
        up = time.perf_counter() - start
        cluster_run = timed_run(study, folder / "run-cluster", client=client)
    cluster_run["cluster_start_s"] = round(up, 2)
    same = digests(folder / "run-local") == digests(folder / "run-cluster")
    result = {"species": args.species, "workers": args.workers, "machine": platform.machine(),
              "cpus": __import__("os").cpu_count(), "local": local, "cluster": cluster_run, "outputs_equal": same}
    for name, r in (("local", local), (f"LocalCluster({args.workers} processes x 1 thread)", cluster_run)):
        print(f"{name}: total {r['total_s']:.1f} s, per species median {r['median_species_s']:.1f} s "
              f"(sum {r['sum_species_s']:.1f} s)")
    print(f"cluster start-up {up:.1f} s; outputs equal: {same}")
    results = ROOT / "bench" / "results"
    results.mkdir(exist_ok=True)
    (results / "species.json").write_text(json.dumps(result, indent=2))
    if args.keep is None:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
