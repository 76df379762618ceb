"""Benchmark of one PointProcessModel fit (default L1 settings) on a fixed synthetic table.

Run:  .venv/bin/python bench/bench_pointprocess.py [--repeats N] [--presences N] [--background N] [--variables N]

The table is the one ``tests/models/test_pointprocess.py::test_l1_fit_converges_at_benchmark_size``
checks for convergence (that test used to carry a wall-clock bound, which belongs here):
by default 1,000 presences drawn from N(0.5, 0.6^2) and 10,000 background rows from N(0, 1)
in each of 8 variables, from ``numpy.random.default_rng(0)``. The estimator is
``PointProcessModel(random_state=0)``, fitted ``--repeats`` times on the same table (the
first fit also warms up imports and BLAS; every fit is reported). Prints the median and
all wall times, the solver's iterations, the chosen C and the number of features. Not a
test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time

import numpy as np


def make_table(n_presence, n_background, n_vars, seed=0):
    rng = np.random.default_rng(seed)
    P = rng.normal(size=(n_presence, n_vars)) * 0.6 + 0.5
    B = rng.normal(size=(n_background, n_vars))
    return np.r_[P, B], np.r_[np.ones(n_presence), np.zeros(n_background)]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5, help="timed fits (median reported)")
    ap.add_argument("--presences", type=int, default=1_000)
    ap.add_argument("--background", type=int, default=10_000)
    ap.add_argument("--variables", type=int, default=8)
    a = ap.parse_args()
    if a.repeats < 1:
        ap.error("--repeats must be at least 1")

    import sklearn

    from envelope.models import PointProcessModel

    X, y = make_table(a.presences, a.background, a.variables)
    times, model = [], None
    for _ in range(a.repeats):
        t0 = time.perf_counter()
        model = PointProcessModel(random_state=0).fit(X, y)
        times.append(time.perf_counter() - t0)

    print(f"PointProcessModel fit benchmark — {time.strftime('%Y-%m-%d %H:%M:%S', time.gmtime())} UTC, "
          f"{os.cpu_count()} CPUs, load average {[round(v, 2) for v in os.getloadavg()]}, "
          f"Python {platform.python_version()}, NumPy {np.__version__}, scikit-learn {sklearn.__version__}")
    print(f"{a.presences} presences x {a.background} background x {a.variables} variables, "
          f"default settings (L1, C chosen by the model), {a.repeats} fits")
    print(f"median {statistics.median(times):.2f} s; all: {', '.join(f'{t:.2f}' for t in times)} s")
    print(f"solver iterations {model.n_iter_} (cap {model.max_iter}), C = {model.C_:g}, "
          f"{model.coef_.size} features, {int(np.count_nonzero(model.coef_))} non-zero")


if __name__ == "__main__":
    main()
