"""Ensemble statistics of suitability across climate models: mean, SD, suitable count and consensus."""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from envelope.errors import InputError

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
    """Kernel on one chunk: ``S`` is (..., model); returns mean, sd, count, consensus.

    A cell with NaN in any model gets NaN mean/SD and the nodata code in count/consensus.
    """
    S = np.asarray(S, dtype=np.float64)
    n = S.shape[-1]
    valid = np.isfinite(S).all(axis=-1)
    mean = S.mean(axis=-1)
    if n - ddof > 0:
        sd = np.sqrt(((S - mean[..., None]) ** 2).sum(axis=-1) / (n - ddof))
    else:
        sd = np.full(mean.shape, np.nan)
    count = (S >= threshold).sum(axis=-1)
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
    if "model" not in suitability.dims:
        raise InputError(f"suitability: dims {suitability.dims}; expected a 'model' dimension")
    n = suitability.sizes["model"]
    needed = consensus_count(n, agreement)
    if suitability.chunks is not None:
        suitability = suitability.chunk({"model": -1})
    mean, sd, count, consensus = xr.apply_ufunc(
        _ensemble_block, suitability,
        kwargs={"threshold": float(threshold), "needed": needed, "ddof": int(ddof)},
        input_core_dims=[["model"]], output_core_dims=[[], [], [], []],
        dask="parallelized", output_dtypes=[np.float32, np.float32, np.uint8, np.uint8],
    )
    ds = xr.Dataset({"mean": mean, "sd": sd, "count": count, "consensus": consensus})
    ds = ds.drop_vars([c for c in ds.coords if c not in ("y", "x", "spatial_ref")])
    ds.attrs = {"n_models": n, "threshold": float(threshold), "agreement": float(agreement),
                "consensus_min_models": needed, "sd_ddof": int(ddof)}
    crs = suitability.rio.crs
    if crs is not None:
        ds = ds.rio.write_crs(crs)
    return ds
