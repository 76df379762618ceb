"""Ensemble statistics of suitability across climate models: mean, SD, suitable count and consensus."""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.rowwise import sum_rows
from envelope.projection import map_cells

# Cells per call of the statistics kernel inside one dask block. Alone, runs of 16 384 were
# fastest (KERNEL_CELLS); but two dask threads run two blocks at once, and with short runs
# they wait on each other for Python's GIL between NumPy calls: bench/bench_pieces.py
# measured two 6-model blocks of 512 x 1024 cells on two threads in 39.7 ms in runs of
# 16 384 and 20.6 ms in runs of 65 536 (one block alone: 12.2 and 12.5 ms).
ENSEMBLE_CELLS = 65_536

__all__ = ["CONSENSUS_CATEGORIES", "COUNT_NODATA", "DEFAULT_AGREEMENT", "ENSEMBLE_STATISTICS", "consensus_count",
           "ensemble_statistics"]

# Default consensus level: a cell is in consensus when at least two thirds of the climate
# models call it suitable (a common "likely" agreement level; our choice, no source).
DEFAULT_AGREEMENT = 2.0 / 3.0
COUNT_NODATA = 255  # uint8 nodata of the count and consensus rasters
ENSEMBLE_STATISTICS = ("mean", "sd", "count", "consensus")
CONSENSUS_CATEGORIES = {0: "no consensus", 1: "suitable in consensus"}


def consensus_count(n_models: int, agreement: float) -> int:
    """Fewest models that must call a cell suitable for consensus: ceil(agreement × n).

    A small tolerance keeps 2/3 of 3 models at 2, not 3, despite rounding of 2/3.
    """
    if not 0.0 < agreement <= 1.0:
        raise InputError(f"agreement: got {agreement!r}; expected a share of models in (0, 1]")
    return max(1, math.ceil(agreement * n_models - 1e-9))


def _ensemble_block(S, threshold, needed, ddof):
    """Kernel on one block: ``S`` is (model, ...); returns mean, sd, count, consensus.

    Models first, as the stack is read: each step works on one model's cells at a time,
    and the sums over models are :func:`envelope.kernels.rowwise.sum_rows` (the bits of
    NumPy's sums along a model-last axis). A cell with NaN in any model gets NaN mean/SD
    and the nodata code in count/consensus.
    """
    S = np.asarray(S, dtype=np.float64)
    n = S.shape[0]
    valid = np.isfinite(S).all(axis=0)
    mean = sum_rows(S) / n
    if n - ddof > 0:
        with np.errstate(invalid="ignore"):  # inf - inf in a cell that is nodata anyway
            sd = np.sqrt(sum_rows((S - mean) ** 2) / (n - ddof))
    else:
        sd = np.full(mean.shape, np.nan)
    count = (S >= threshold).sum(axis=0)
    consensus = (count >= needed).astype(np.uint8)
    count = np.where(valid, count, COUNT_NODATA).astype(np.uint8)
    consensus = np.where(valid, consensus, COUNT_NODATA).astype(np.uint8)
    return (mean.astype(np.float32), sd.astype(np.float32), count, consensus)


def ensemble_statistics(suitability: xr.DataArray, threshold: float, *,
                        agreement: float = DEFAULT_AGREEMENT, ddof: int = 1) -> xr.Dataset:
    """Mean, SD, suitable count and consensus of suitability across climate models (lazy).

    Parameters
    ----------
    suitability : DataArray (model, y, x)
        One suitability layer per climate model of one pathway and horizon.
    threshold : float
        A model calls a cell suitable when suitability >= threshold (the model file's
        threshold).
    agreement : float, default=2/3
        Share of models needed for consensus: a cell is 1 in ``consensus`` when at least
        ``ceil(agreement × n_models)`` models call it suitable.
    ddof : int, default=1
        SD denominator ``n - ddof``: 1 treats the climate models as a sample (SD is NaN
        with a single model); 0 gives the population SD.

    Returns
    -------
    Dataset with ``mean``, ``sd`` (float32) and ``count``, ``consensus`` (uint8, 255 =
    nodata where any model has no value), dims (y, x); attrs ``n_models``,
    ``threshold``, ``agreement``, ``consensus_min_models``.
    """
    if set(suitability.dims) != {"model", "y", "x"}:
        raise InputError(f"suitability: dims {suitability.dims}; expected (model, y, x)")
    n = suitability.sizes["model"]
    needed = consensus_count(n, agreement)
    # models first and one chunk: each block is used as read (see envelope.projection.map_cells)
    stack = suitability.transpose("model", "y", "x")
    mean, sd, count, consensus = map_cells(_ensemble_block, stack, dtypes=(np.float32, np.float32, np.uint8, np.uint8),
                                           batch_cells=ENSEMBLE_CELLS, threshold=float(threshold), needed=needed,
                                           ddof=int(ddof))
    # each statistic keeps the layers' attributes, as xarray.apply_ufunc did before
    ds = xr.Dataset({name: layer.assign_attrs(suitability.attrs) for name, layer in
                     zip(ENSEMBLE_STATISTICS, (mean, sd, count, consensus))})
    ds.attrs = {"n_models": n, "threshold": float(threshold), "agreement": float(agreement),
                "consensus_min_models": needed, "sd_ddof": int(ddof)}
    crs = suitability.rio.crs
    if crs is not None:
        ds = ds.rio.write_crs(crs)
    return ds
