"""Fits remembered by the content of their inputs, and independent fits run side by side in worker processes."""

from __future__ import annotations

import hashlib
import os
import threading
from collections import OrderedDict

import numpy as np

__all__ = ["BoundedMemory", "content_key", "fit_in_parallel", "usable_cores"]


class BoundedMemory:
    """A thread-safe mapping that keeps the ``size`` most recently used entries."""

    def __init__(self, size: int):
        self.size = int(size)
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key):
        """The value under ``key`` (now the most recently used), or None."""
        with self._lock:
            if key not in self._items:
                return None
            self._items.move_to_end(key)
            return self._items[key]

    def put(self, key, value) -> None:
        """Remember ``value`` under ``key``, forgetting the least recently used beyond ``size``."""
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def __contains__(self, key) -> bool:
        with self._lock:
            return key in self._items

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)

    def clear(self) -> None:
        with self._lock:
            self._items.clear()


def content_key(settings: str, *arrays) -> str:
    """Hash of ``settings`` and of the dtype, shape and bytes of every array (None marked as such)."""
    h = hashlib.blake2b(digest_size=20)
    h.update(settings.encode())
    for a in arrays:
        if a is None:
            h.update(b"none")
            continue
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def usable_cores() -> int:
    """The cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _fit_alone(estimator, X, y, kw, tolerate):
    """One fit in a pool worker, BLAS and OpenMP on one thread (the pool keeps the cores busy);
    with ``tolerate`` a failing fit gives None."""
    from threadpoolctl import threadpool_limits

    try:
        with threadpool_limits(limits=1):
            return estimator.fit(X, y, **kw)
    except Exception:  # noqa: BLE001 - the caller fits again serially and reports the failure there
        if tolerate:
            return None
        raise


def fit_in_parallel(jobs, *, n_jobs: int, progress=None, tolerate: bool = False) -> list:
    """``estimator.fit(X, y, **kw)`` for every ``(estimator, X, y, kw)`` of ``jobs``, ``n_jobs``
    at a time in loky worker processes (one thread each); the fitted estimators, in order.

    The fits are independent; a seeded fit gives the same model in a worker as in this
    process (each liblinear solve seeds its own generator, scikit-learn's trees draw from
    their ``random_state``), so results equal the serial ones (tested). With ``tolerate``
    a fit that fails gives None instead of raising.
    """
    from joblib import Parallel, delayed

    out = []
    results = Parallel(n_jobs=max(1, min(n_jobs, len(jobs))), backend="loky", return_as="generator")(
        delayed(_fit_alone)(est, X, y, kw, tolerate) for est, X, y, kw in jobs)
    for i, est in enumerate(results, start=1):
        out.append(est)
        if progress is not None:
            progress(i, len(jobs))
    return out
