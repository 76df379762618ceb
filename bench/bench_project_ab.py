"""Benchmark of `envelope project` against an earlier commit, the two alternated in one run, with the I/O floor.

Run:  git worktree add /tmp/envelope-old <commit>
      .venv/bin/python bench/bench_project_ab.py --old-tree /tmp/envelope-old [--rounds 5]

On a shared machine the speed drifts by more than a code change is worth, so figures taken
in two runs cannot be compared. Here every round runs the floor of ``bench_project.py``
once and then each projection (point process, point process + MESS, percentile envelope)
with the old tree's code and with this tree's, in subprocesses through
``bench_project.py``'s own workers (the old tree's script and package for the old runs;
the order of the two swaps every round). Grid and models are those of bench_project.py,
made in ``--workdir`` by this tree's code when missing. Prints medians and every run, and
writes ``bench/results/project_ab.json`` (git-ignored).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
RUNS = (("pointprocess", "pointprocess", False), ("pointprocess+mess", "pointprocess", True),
        ("envelope", "envelope", False))


def _call(tree: Path, kind: str, gdal_cache_mb: int, **args) -> dict:
    env = dict(os.environ, GDAL_CACHEMAX=str(gdal_cache_mb))
    env["PYTHONPATH"] = str(tree)  # ahead of the editable install of this tree
    # run from a neutral folder: the current folder must not put another tree's package first
    proc = subprocess.run([sys.executable, str(tree / "bench" / "bench_project.py"), "--worker", kind,
                           json.dumps(args)], capture_output=True, text=True, env=env, cwd="/")
    if proc.returncode != 0:
        raise RuntimeError(f"{tree}: {kind} failed:\n{proc.stderr[-3000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[7:])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--old-tree", required=True, help="a checkout (git worktree) of the commit to compare against")
    ap.add_argument("--workdir", default="/tmp/envelope-bench")
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--ny", type=int, default=5000)
    ap.add_argument("--nx", type=int, default=5000)
    ap.add_argument("--gdal-cache-mb", type=int, default=256)
    a = ap.parse_args()
    old, new, work = Path(a.old_tree).resolve(), HERE.parent, Path(a.workdir)
    if not (old / "bench" / "bench_project.py").is_file() or not (old / "envelope").is_dir():
        sys.exit(f"--old-tree {old}: expected a checkout of this repository (bench/bench_project.py, envelope/)")
    work.mkdir(parents=True, exist_ok=True)
    stack = work / "stack19.tif"
    if not stack.is_file():
        _call(new, "make", a.gdal_cache_mb, path=str(stack), ny=a.ny, nx=a.nx, n_vars=19)
    if not all((work / f"{m}.envm").is_file() for _, m, _ in RUNS):
        _call(new, "fit", a.gdal_cache_mb, out_dir=str(work), ny=a.ny, nx=a.nx, n_vars=19,
              only=sorted({m for _, m, _ in RUNS}))
    times = {"floor": []}
    load_start = os.getloadavg()
    for r in range(a.rounds):
        times["floor"].append(_call(new, "floor", a.gdal_cache_mb, stack=str(stack),
                                    out=str(work / "floor.tif"))["seconds"])
        for label, tree in (("old", old), ("new", new)) if r % 2 == 0 else (("new", new), ("old", old)):
            for name, model, mess in RUNS:
                res = _call(tree, "project", a.gdal_cache_mb, model=str(work / f"{model}.envm"), stack=str(stack),
                            out=str(work / f"ab_{label}.tif"), mess=str(work / f"ab_{label}_mess.tif") if mess else None)
                times.setdefault(f"{name} {label}", []).append(res["seconds"])
        print(f"round {r + 1}: " + ", ".join(f"{k} {v[-1]:.2f}" for k, v in times.items()), file=sys.stderr, flush=True)
    floor = float(np.median(times["floor"]))
    print(f"old tree {old}, new tree {new}; {a.rounds} rounds, cpus {os.cpu_count()}, load average "
          f"{load_start[0]:.2f} at the start and {os.getloadavg()[0]:.2f} at the end")
    print(f"{'run':<26}{'median s':>9}{'x floor':>9}  runs")
    for k, v in times.items():
        print(f"{k:<26}{np.median(v):>9.2f}{np.median(v) / floor:>9.2f}  {', '.join(f'{x:.2f}' for x in v)}")
    for name, _, _ in RUNS:
        o, n = np.median(times[f"{name} old"]), np.median(times[f"{name} new"])
        print(f"{name}: new / old = {n / o:.3f}")
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "project_ab.json").write_text(json.dumps({"old_tree": str(old), "rounds": a.rounds, "times": times,
                                                     "load_average_start": load_start,
                                                     "load_average_end": os.getloadavg()}, indent=2))


if __name__ == "__main__":
    main()
