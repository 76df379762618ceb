"""Benchmark of the cell-piece size of the projection kernels, alone and two threads at once.

Run:  .venv/bin/python bench/bench_pieces.py [--pieces 16384,32768,65536,131072,262144,524288] [--repeats 8]

A streamed projection hands each kernel one (19, 512, 1024) window per dask task, and
the kernels walk it in pieces of ``block_cells`` cells, a few NumPy calls per variable and
piece. Two dask threads run two windows at once, and every NumPy call starts and ends
holding Python's GIL: with short pieces the threads spend their time waiting for each
other. This measures, per kernel and piece size, the wall time of one window alone
(``serial``) and of two windows on two threads started together (``pair``), and the
speed-up ``2 * serial / pair`` (2 = the cores are fully used, 1 = no gain from the second
thread). Data: the smooth fictional fields of ``bench_project.py`` (open ocean), a
point-process model, a percentile envelope and the MESS reference fitted as there.
Results: a table on stdout and ``bench/results/pieces.json`` (git-ignored).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_project import N_VARS, _fields, fit_models  # noqa: E402


def _timed(function, repeats):
    """Median wall time of ``function()`` alone and of two calls on two threads started together."""
    function()  # warm: tables built, pages touched
    alone = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        function()
        alone.append(time.perf_counter() - t0)
    pairs = []
    for _ in range(repeats):
        start = threading.Barrier(2)

        def run():
            start.wait()
            function()

        threads = [threading.Thread(target=run) for _ in range(2)]
        t0 = time.perf_counter()
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        pairs.append(time.perf_counter() - t0)
    return float(np.median(alone)), float(np.median(pairs))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pieces", default="16384,32768,65536,131072,262144,524288")
    ap.add_argument("--repeats", type=int, default=8)
    a = ap.parse_args()

    from envelope.io.modelfile import load_model
    from envelope.kernels.mess import MessReference, mess_layers
    from envelope.kernels.percentile import percentile_suitability
    from envelope.kernels.predict import suitability_table
    from envelope.bioclim import _bioclim_cells
    from envelope.ensemble import _ensemble_block
    from envelope.projection import _in_cell_batches, _members, training_range

    ny, nx = 512, 1024
    window = _fields(np.arange(1024, 1024 + ny), np.arange(1024, 1024 + nx), N_VARS)
    X = window.reshape(N_VARS, -1)
    with tempfile.TemporaryDirectory() as tmp:
        fit_models(tmp, 5000, 5000, N_VARS, only=["pointprocess", "envelope"])
        pp, manifest = load_model(Path(tmp) / "pointprocess.envm")
        env, _ = load_model(Path(tmp) / "envelope.envm")
    metadata = manifest.get("metadata") or manifest
    names = [v["name"] for v in metadata["variables"]]
    bounds = training_range(metadata)
    lower = np.array([bounds[v][0] for v in names])
    upper = np.array([bounds[v][1] for v in names])
    pp_table = _members(pp, lower, upper, np.float32)[0][1]
    env_table = _members(env, lower, upper, np.float32)[0][1]
    reference = MessReference.from_dict(metadata["mess_reference"])
    # six climate models' suitability, and 12 months of tmin / tmax / precipitation, from the same fields
    models = np.clip(window[:6] / 60.0 + 0.5, 0.0, 1.0).astype(np.float32)
    tmin = window[:12] - 5.0
    tmax = window[:12] + 5.0
    prec = np.abs(window[7:19]) * 10.0
    kernels = {
        "point process": lambda bc: suitability_table(pp_table, X, lower=lower, upper=upper, mask_unused=False,
                                                      block_cells=bc),
        "percentile envelope": lambda bc: percentile_suitability(env_table, X, block_cells=bc),
        "MESS": lambda bc: mess_layers(X, reference, block_cells=bc),
        # map_cells kernels, run on pieces of the block by _in_cell_batches
        "ensemble statistics": lambda bc: _in_cell_batches(models, function=_ensemble_block, batch_cells=bc,
                                                           threshold=0.3, needed=4, ddof=1),
        "bioclim": lambda bc: _in_cell_batches(tmin, tmax, prec, function=_bioclim_cells, batch_cells=bc,
                                               conventions={}),
    }
    rows = []
    print(f"one window: {N_VARS} x {ny} x {nx} float32; cpus {os.cpu_count()}, load average "
          f"{os.getloadavg()[0]:.2f}; medians of {a.repeats}")
    print(f"{'kernel':<22}{'piece':>8}{'serial ms':>11}{'pair ms':>10}{'speed-up':>10}")
    for name, kernel in kernels.items():
        for bc in (int(p) for p in a.pieces.split(",")):
            serial, pair = _timed(lambda: kernel(bc), a.repeats)
            rows.append({"kernel": name, "block_cells": bc, "serial_s": serial, "pair_s": pair,
                         "speedup": 2 * serial / pair})
            print(f"{name:<22}{bc:>8}{serial * 1e3:>11.1f}{pair * 1e3:>10.1f}{2 * serial / pair:>10.2f}")
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "pieces.json").write_text(json.dumps({"window": [N_VARS, ny, nx], "cpus": os.cpu_count(),
                                                 "load_average": os.getloadavg(), "rows": rows}, indent=2))


if __name__ == "__main__":
    main()
