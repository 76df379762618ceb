"""Projecting a fitted model onto a climate stack, chunk by chunk, with MESS (grid wrapper)."""

from __future__ import annotations

import functools
import operator

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.grids import georeferenced_like, match_variables
from envelope.kernels.percentile import PercentileTable, compile_percentile, percentile_suitability
from envelope.kernels.predict import (AdditiveTable, compile_pointprocess, predict_cells,
                                      suitability_table)

# Cells per call of a generic estimator inside one dask chunk: bounds the feature matrix
# the estimator materialises (cells x features x 8 bytes) whatever the chunk size. The
# estimators that take this path expand no features (point-process models use the exact
# table), so 65 536 rows of the model's variables is a few MiB. Measured once on 2 cores:
# boosted trees predicted 1 M cells in 2.4 s in such batches, 2.8 s in batches of 16 384.
CELL_BATCH = 65_536
MESS_BANDS = ("mess", "most_dissimilar")
# Cells per call of a row-by-row kernel (months or climate models first) inside one dask
# block, through map_cells(batch_cells=...): its float64 temporaries (about 1 kB a cell for
# bioclim) then stay near the caches. Measured once on 2 cores (bench/README.md): bioclim
# took 0.070 s on 200 000 cells in runs of 4 096, 0.071 s in 16 384, 0.084 s in 65 536 and
# 0.087 s in one call; ensemble statistics of 6 models on 1 M cells 23 ms in runs of 16 384,
# 34 ms in 65 536 and 60 ms in one call (tracemalloc peak 11 MiB against 108 MiB).
KERNEL_CELLS = 16_384


def training_range(metadata: dict) -> dict:
    """``{name: (min, max)}`` of the training data from a model file's metadata.

    Raises InputError naming the variable when a bound is missing.
    """
    out = {}
    for v in metadata.get("variables", []):
        lo, hi = v.get("min"), v.get("max")
        if lo is None or hi is None:
            raise InputError(f"model metadata: variable {v.get('name')!r} has no training min/max; "
                             "expected both to clamp (or use --no-clamp)")
        out[str(v["name"])] = (float(lo), float(hi))
    return out


def pointprocess_table(estimator) -> AdditiveTable | None:
    """The exact fast-path table of a fitted PointProcessModel, else None.

    A model fitted with recording effort as a covariate predicts at its common reference
    effort: the constant ``effort_coef_ * log(effort_reference_)`` (``effort_term_``) is
    part of the table's constant, exactly as in the model's own linear predictor.
    """
    from envelope.models import PointProcessModel

    if type(estimator) is not PointProcessModel:
        return None
    ex = estimator.expander_
    # getattr: model files written before the effort term existed have none
    effort_term = getattr(estimator, "effort_term_", 0.0)
    return compile_pointprocess(ex.mean_, ex.scale_, ex.knots_, ex.classes_used_, estimator.coef_,
                                estimator.intercept_ + effort_term + estimator.offset_)


def _as_cells(block: np.ndarray) -> tuple[np.ndarray, tuple]:
    """(variable, y, x) block -> (variable, cells) view: each variable's cells stay one
    contiguous row, the layout the kernels are fastest on."""
    return block.reshape(block.shape[0], -1), block.shape[1:]


def _in_cell_batches(*blocks, function, batch_cells, **kwargs):
    """``function`` on runs of ``batch_cells`` cells of (leading, y, x) blocks, reassembled.

    ``function`` gets (leading, cells) arrays (each row a contiguous run of one variable,
    month or model) and returns (cells,) or (bands, cells) arrays, or a tuple of them.
    """
    shape = blocks[0].shape[1:]
    rows = [b.reshape(b.shape[0], -1) for b in blocks]
    n_cells = rows[0].shape[1]
    out = together = None
    for start in range(0, max(n_cells, 1), batch_cells):  # an empty block still gets one call
        cells = slice(start, start + batch_cells)
        part = function(*(r[:, cells] for r in rows), **kwargs)
        together = isinstance(part, tuple)
        parts = part if together else (part,)
        if out is None:
            out = [np.empty(p.shape[:-1] + (n_cells,), dtype=p.dtype) for p in parts]
        for o, p in zip(out, parts):
            o[..., cells] = p
    out = [o.reshape(o.shape[:-1] + shape) for o in out]
    return tuple(out) if together else out[0]


def map_cells(function, *stacks: xr.DataArray, bands=None, dtypes=None, batch_cells=None, **kwargs):
    """Apply ``function(*blocks, **kwargs)`` to each (leading, y, x) block of ``stacks``.

    ``stacks`` share their (y, x) grid; their leading axis (variables, months, climate
    models) is one chunk and stays first, so a block is handed over exactly as it was
    read. Going through ``xarray.apply_ufunc`` with a core dimension would move it last,
    which dask does by copying every block into a cell-major layout that makes the
    per-variable kernels several times slower. Lazy when a stack is dask-backed.

    ``function`` returns a float32 (y, x) block, or (bands, y, x) when ``bands`` is given;
    with ``dtypes`` it returns a tuple of (y, x) blocks of those dtypes, and map_cells a
    list of DataArrays, computed together (one call per block). With ``batch_cells`` it
    is called instead on (leading, cells) runs of at most that many cells of a block and
    returns (cells,) / (bands, cells) arrays (or a tuple of them): a row-by-row kernel's
    temporaries then stay near the caches whatever the chunk size (:data:`KERNEL_CELLS`).
    """
    import dask.array as dsa

    if batch_cells is not None:
        kwargs = {"function": function, "batch_cells": batch_cells, **kwargs}
        function = _in_cell_batches
    datas = [s.data for s in stacks]
    if any(isinstance(d, dsa.Array) for d in datas):
        from dask.array.core import unify_chunks

        # one chunk along each leading axis, and the same y/x chunks for all
        datas = [dsa.asarray(d).rechunk({0: -1}) for d in datas]
        _, datas = unify_chunks(*(x for i, d in enumerate(datas) for x in (d, (f"lead{i}", "y", "x"))))
        if dtypes is not None:
            # dask's own apply_gufunc pattern: one task per block returns the tuple, and
            # each output takes its item from it (a band axis of length 1 again, dropped by
            # indexing, for the reason below)
            one = ((1,),) + datas[0].chunks[1:]
            together = dsa.map_blocks(_one_band_each, *datas, band_kernel=function, chunks=one, dtype=object,
                                      meta=np.empty((0, 0, 0), object), **kwargs)
            out = [together.map_blocks(operator.getitem, i, chunks=one, dtype=dt, meta=np.empty((0, 0, 0), dt))[0]
                   for i, dt in enumerate(dtypes)]
        elif bands is None:
            # a band axis of length 1, dropped by indexing: map_blocks(drop_axis=0) would first
            # copy every input block (all its variables) through dask's concatenate
            out = dsa.map_blocks(_one_band, *datas, band_kernel=function, chunks=((1,),) + datas[0].chunks[1:],
                                 dtype=np.float32, meta=np.empty((0, 0, 0), np.float32), **kwargs)[0]
        else:
            out = dsa.map_blocks(function, *datas, chunks=((bands,),) + datas[0].chunks[1:], dtype=np.float32,
                                 meta=np.empty((0, 0, 0), np.float32), **kwargs)
    else:
        out = function(*(np.asarray(d) for d in datas), **kwargs)
    coords = {"y": stacks[0]["y"].values, "x": stacks[0]["x"].values}
    if dtypes is not None:
        return [xr.DataArray(o, dims=("y", "x"), coords=coords) for o in out]
    return xr.DataArray(out, dims=("y", "x") if bands is None else ("variable", "y", "x"), coords=coords)


def _one_band(*blocks, band_kernel, **kwargs):
    return band_kernel(*blocks, **kwargs)[None]


def _one_band_each(*blocks, band_kernel, **kwargs):
    return tuple(b[None] for b in band_kernel(*blocks, **kwargs))


@functools.cache
def _openmp_controller():
    """One threadpoolctl controller (building one scans the loaded libraries)."""
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def _suitability_block(block, members, lower, upper, flag_infinite=False):
    """Suitability (float32, NaN where a variable is not finite) of one (variable, y, x) block;
    with ``flag_infinite``, also a uint8 flag of the cells with a ±inf variable."""
    X, shape = _as_cells(block)
    total = None
    for weight, table, predict_proba in members:
        if isinstance(table, PercentileTable):
            s = percentile_suitability(table, X)  # clamping is compiled into the table
        elif table is not None:
            # non-finite cells are masked below, so the kernel's own masking is skipped
            s = suitability_table(table, X, lower=lower, upper=upper, mask_unused=False)
        else:
            # dask already runs one block per core: an estimator's own OpenMP threads
            # (scikit-learn's tree ensembles) would only oversubscribe the cores
            with _openmp_controller().limit(limits=1, user_api="openmp"):
                s = predict_cells(predict_proba, X, lower=lower, upper=upper, batch_cells=CELL_BATCH)
        total = s if weight is None else (weight * s if total is None else total + weight * s)
    total = total.astype(np.float32)
    # clamping would turn ±inf into the training bounds: a non-finite climate value is nodata
    missing, infinite = nonfinite_cells(X)
    total[missing] = np.nan
    if not flag_infinite:
        return total.reshape(shape)
    flags = np.zeros(total.size, np.uint8)
    flags[infinite] = 1
    return total.reshape(shape), flags.reshape(shape)


def nonfinite_cells(X) -> tuple:
    """Indices of the cells (columns of ``X``, shape (variables, cells)) with a NaN or ±inf
    variable, and of those with a ±inf variable.

    One sum over the variables finds the suspects (NaN and ±inf propagate through it; a
    sum that overflows is only a suspect), and only they are checked one by one: a single
    pass over ``X`` where ``isfinite(X).all(axis=0)`` takes two and a (variables, cells) mask.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        probe = X.sum(axis=0)
    suspects = np.flatnonzero(~np.isfinite(probe))
    if not suspects.size:
        return suspects, suspects
    cells = X[:, suspects]
    return (suspects[~np.isfinite(cells).all(axis=0)], suspects[np.isinf(cells).any(axis=0)])


def percentile_table(estimator, lower=None, upper=None, dtype=np.float32) -> PercentileTable | None:
    """The exact fast-path table of a fitted PercentileEnvelope for ``dtype`` inputs,
    clamping into ``[lower, upper]`` included, else None."""
    from envelope.models import PercentileEnvelope

    if type(estimator) is not PercentileEnvelope:
        return None
    return compile_percentile(estimator.variable_score, estimator.presence_values_, lower=lower, upper=upper,
                              dtype=dtype)


def _members(estimator, lower=None, upper=None, dtype=np.float32) -> list:
    """``[(weight, table, predict_proba)]``: how to evaluate ``estimator`` on cells of ``dtype``.

    ``table`` is a point-process model's :class:`AdditiveTable` or a percentile
    envelope's :class:`PercentileTable` (clamped into ``[lower, upper]``), else None and
    ``predict_proba`` is used. A skill-weighted ensemble is its weighted sum of member
    suitabilities, so each such member still takes its exact table path; weight None =
    a lone model.
    """
    from envelope.models import SkillWeightedEnsemble

    def table_of(model):
        table = pointprocess_table(model)
        return table if table is not None else percentile_table(model, lower, upper, dtype)

    if type(estimator) is SkillWeightedEnsemble:
        members = []
        for w, (_, m) in zip(estimator.weights_, estimator.members_):
            table = table_of(m)
            members.append((float(w), table, None if table is not None else m.predict_proba))
        return members
    table = table_of(estimator)
    return [(None, table, None if table is not None else _predict_proba_of(estimator))]


def _layer_like(result: xr.DataArray, stack: xr.DataArray, name: str, attrs: dict) -> xr.DataArray:
    result = result.rename(name)
    result.attrs = attrs
    return georeferenced_like(result, stack)


def _predict_proba_of(estimator):
    """predict_proba on plain arrays, even for an estimator fitted on a named table."""
    names = getattr(estimator, "feature_names_in_", None)
    if names is None:
        return estimator.predict_proba
    import pandas as pd

    cols = [str(n) for n in names]
    return lambda X: estimator.predict_proba(pd.DataFrame(X, columns=cols))


def project_suitability(estimator, stack: xr.DataArray, variables, training_range, *, clamp=True,
                        count_infinite=False):
    """Suitability (0–1, float32, NaN off the valid area) of ``stack`` under ``estimator``.

    A PointProcessModel (alone or as a member of a SkillWeightedEnsemble) is evaluated
    with the exact piecewise-quadratic table of :mod:`envelope.kernels.predict` (no
    feature matrix is built), a PercentileEnvelope with the exact per-variable score
    tables of :mod:`envelope.kernels.percentile`; any other estimator through its own
    ``predict_proba`` in batches of :data:`CELL_BATCH` cells.

    Parameters
    ----------
    estimator : fitted classifier with ``predict_proba(X)[:, 1]`` = suitability
    stack : DataArray (variable, y, x)
    variables : list of str, the model's variables in training order
    training_range : mapping name -> (min, max); values are clamped into it when ``clamp``
        (the default), so the model is not asked to extrapolate its response curves
        beyond the training data (Elith, Kearney & Phillips 2010 discuss the choice).
    clamp : bool, default=True
    count_infinite : bool, default=False
        Also return the number of cells with a ±inf variable (nodata in the suitability),
        counted by the same tasks (lazy like the layer; :func:`infinite_cells` counts it
        in a pass of its own).

    Returns
    -------
    DataArray (y, x), lazy when ``stack`` is dask-backed, CRS kept; with
    ``count_infinite``, ``(layer, count)``.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) The art of modelling range-shifting
    species. Methods in Ecology and Evolution 1: 330–342.
    """
    stack = match_variables(stack, variables)
    lower = upper = None
    if clamp:
        lower = np.array([training_range[v][0] for v in variables], dtype=np.float64)
        upper = np.array([training_range[v][1] for v in variables], dtype=np.float64)
    dtype = np.float32 if stack.dtype == np.float32 else np.float64
    members = _members(estimator, lower, upper, dtype)
    if count_infinite:
        result, flags = map_cells(_suitability_block, stack, dtypes=(np.float32, np.uint8), members=members,
                                  lower=lower, upper=upper, flag_infinite=True)
        count = flags.sum(dtype=np.int64).data
    else:
        result = map_cells(_suitability_block, stack, members=members, lower=lower, upper=upper)
    layer = _layer_like(result, stack, "suitability", {"long_name": "climatic suitability", "units": "1"})
    return (layer, count) if count_infinite else layer


def _mess_block(block, reference):
    from envelope.kernels.mess import mess_layers

    X, shape = _as_cells(block)
    # the kernel writes both float32 layers, NaN where a variable is NaN or ±inf (nodata,
    # as for suitability), with no whole-block temporaries
    return mess_layers(X, reference).reshape((2,) + shape)


def project_mess(stack: xr.DataArray, variables, reference) -> xr.DataArray:
    """MESS and most-dissimilar variable of every cell against the training reference (lazy).

    Parameters
    ----------
    stack : DataArray (variable, y, x)
    variables : list of str, the model's variables in training order
    reference : MessReference or dict
        The training reference of :func:`envelope.kernels.mess.reference_from_training`,
        or its ``to_dict()`` form as stored in a model file's ``mess_reference``.

    Returns
    -------
    DataArray (variable, y, x) float32, layer ``mess`` (MESS, negative = novel climate) and
    ``most_dissimilar`` (index into ``variables``, NaN off the valid area); attrs
    ``variables`` lists the names.

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) The art of modelling range-shifting
    species. Methods in Ecology and Evolution 1: 330–342.
    """
    from envelope.kernels.mess import MessReference

    if isinstance(reference, dict):
        reference = MessReference.from_dict(reference)
    if reference.n_variables != len(variables):
        raise InputError(f"mess_reference: {reference.n_variables} variables; the model has "
                         f"{len(variables)} ({', '.join(variables)})")
    stack = match_variables(stack, variables)
    reference.lookup(np.float32 if stack.dtype == np.float32 else np.float64)  # built once, not per block
    result = map_cells(_mess_block, stack, bands=len(MESS_BANDS), reference=reference)
    result = result.assign_coords(variable=list(MESS_BANDS))
    return _layer_like(result, stack, "mess", {"long_name": "multivariate environmental similarity",
                                                "variables": list(variables)})


def infinite_cells(stack: xr.DataArray):
    """Lazy count of cells where some variable is +inf or -inf (projected as nodata)."""
    return np.isinf(stack).any("variable").sum().data


def novel_area_sums(mess_values: xr.DataArray, cell_area: xr.DataArray) -> tuple:
    """Lazy (valid area, novel area): sums of true cell areas where MESS is defined and
    where MESS < 0 (area weighting, not cell counting)."""
    valid = mess_values.notnull()
    novel = (mess_values < 0) & valid
    area = cell_area.astype(np.float64)
    return xr.dot(area, valid.astype(np.float64)).data, xr.dot(area, novel.astype(np.float64)).data


def share_of(total, part) -> float:
    """``part / total`` as a float, NaN when ``total`` is 0."""
    total = float(total)
    return float(part) / total if total > 0 else float("nan")


def novel_share(mess_values: xr.DataArray, cell_area: xr.DataArray) -> float:
    """Share of the valid area in novel climate (MESS < 0), weighted by true cell areas."""
    import dask

    return share_of(*dask.compute(*novel_area_sums(mess_values, cell_area)))


def binary_map(suitability: xr.DataArray, threshold: float, *, nodata: int = 255) -> xr.DataArray:
    """uint8 map: 1 where suitability >= ``threshold``, 0 below, ``nodata`` where undefined (lazy)."""
    out = xr.where(suitability.isnull(), nodata, (suitability >= threshold).astype(np.uint8)).astype(np.uint8)
    out = out.rename("suitable")
    out.attrs = {"long_name": "suitable at threshold", "threshold": float(threshold)}
    return georeferenced_like(out, suitability)


# Spatial window of the streamed stack (rounded to whole file blocks when read): with 19
# float32 variables a 512 x 1024 window is 38 MiB, so a few windows in flight per thread
# bound the working set whatever the grid size. Measured faster than 1024 x 1024 or
# 512 x 512 windows on 512-pixel tiles (bench/README.md).
BINARY_CATEGORIES = {0: "unsuitable", 1: "suitable"}
BINARY_NODATA = 255


__all__ = ["BINARY_CATEGORIES", "BINARY_NODATA", "CELL_BATCH", "KERNEL_CELLS", "MESS_BANDS", "binary_map", "map_cells",
           "nonfinite_cells", "novel_area_sums", "novel_share", "percentile_table", "pointprocess_table", "project_mess",
           "project_suitability", "share_of", "training_range"]
