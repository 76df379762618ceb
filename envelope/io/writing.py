"""Raster writing: cloud-optimised GeoTIFF or CF-NetCDF, several outputs streamed from one dask pass, atomically."""

from __future__ import annotations

import contextlib
import json
import os
import threading
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.io.atomic import atomic_outputs, check_writable
from envelope.io.blocks import WindowWriter
from envelope.io.overviews import overview_factors, overview_levels, pyramid_vrt, whole_groups
from envelope.io.rasters import GEOTIFF_SUFFIXES, encode_tag
from envelope.models.memory import usable_cores

__all__ = ["DEFLATE_LEVEL", "PLATEAU_PREDICTOR", "WRITE_CACHE_MB", "RasterOutput", "WindowedRaster", "windowed_raster",
           "write_raster", "write_rasters"]

#: GDAL block cache (MB) while rasters are staged and converted. Dirty blocks of the
#: staging file sit in this cache until it is full, so with GDAL's default (5 % of RAM)
#: peak memory would grow with the output up to that size; 64 MB keeps it flat and was
#: no slower (bench/README.md).
WRITE_CACHE_MB = 64

#: zlib level of GeoTIFF tiles. Level 1 is about twice as fast as GDAL's default 6 for
#: files only a few per cent larger on suitability-like grids (bench/README.md).
DEFLATE_LEVEL = 1


@dataclass
class RasterOutput:
    """One raster for :func:`write_rasters`.

    ``tags`` may be a callable: it is called with the computed values of ``also`` (see
    :func:`write_rasters`) and returns the tags, for values known only after the pass.
    """

    data: xr.DataArray
    path: os.PathLike | str
    tags: dict | Callable | None = None
    categories: dict | None = None
    nodata: float | None = None
    dtype: object = None
    #: GeoTIFF predictor of the DEFLATE tiles: None = 3 (floating point) for float rasters,
    #: 2 (horizontal differencing) for integer ones; 1 = none, for layers of plateaus (see
    #: :data:`PLATEAU_PREDICTOR`).
    predictor: int | None = None
    #: Bands (0-based) of a float raster whose overviews take the first cell of each group
    #: instead of the mean: class codes and indices (a MESS raster's most dissimilar variable).
    nearest_bands: tuple = ()


#: The predictor for float layers made of plateaus of a few values (a MESS raster: interior
#: MESS takes one of a few hundred levels, and the most dissimilar variable is an index):
#: differences of such layers compress worse than the values. The bench_project MESS raster
#: (5000 x 5000 x 2) made 17.0 MB in 0.68 s with predictor 3, 10.1 MB in 0.44 s with 2 and
#: 8.3 MB in 0.31 s with none; the demo study's (250 x 250 x 2, a fifth novel) 0.11, 0.08 and
#: 0.07 MB (COG copies, DEFLATE level 1, 2 threads; bench/README.md).
PLATEAU_PREDICTOR = 1


@dataclass
class _Prepared:
    values: xr.DataArray      # (variable, y, x), converted to the output dtype
    path: Path
    names: list
    units: list
    tags: dict | Callable
    categories: dict | None
    nodata: float | None
    predictor: int | None = None
    nearest_bands: tuple = ()
    dataset: object = None    # the open staging GeoTIFF
    overviews: list = None    # [(path, open dataset)] of its streamed overview levels, finest first

    @property
    def netcdf(self) -> bool:
        return self.path.suffix.lower() == ".nc"


def _as_stack(da: xr.DataArray, path) -> xr.DataArray:
    if not isinstance(da, xr.DataArray):
        raise InputError(f"{path}: can only write an xarray.DataArray, got {type(da).__name__}")
    if da.rio.crs is None:
        raise InputError(f"{path}: the grid has no CRS (expected a CRS attached with rio.write_crs)")
    if da.ndim == 2:
        name = str(da.name) if da.name is not None else Path(path).stem
        units = str(da.attrs.get("units", ""))
        da = da.expand_dims(variable=[name]).assign_coords(units=("variable", [units]))
    if da.ndim != 3 or set(da.dims) != {"variable", "y", "x"}:
        raise InputError(f"{path}: cannot write dims {da.dims} (expected (y, x) or (variable, y, x))")
    return da.transpose("variable", "y", "x")


def _block_size(width: int, height: int) -> int:
    """Tile edge: 512, or 256 / 128 for small grids (GDAL's COG driver needs >= 128)."""
    largest = max(width, height)
    return 512 if largest > 512 else 256 if largest > 256 else 128


def _prepare(output: RasterOutput, overwrite: bool) -> _Prepared:
    path = Path(output.path)
    suffix = path.suffix.lower()
    if suffix not in GEOTIFF_SUFFIXES and suffix != ".nc":
        raise InputError(f"{path}: unknown output format {suffix or '(no suffix)'!r} (expected .tif, .tiff or .nc)")
    check_writable(path, overwrite)
    stack = _as_stack(output.data, path)
    if min(stack.sizes["y"], stack.sizes["x"]) == 1:
        from affine import Affine

        if stack.rio.transform() == Affine.identity():
            # one row or column: the cell size is not in the coordinates, and writing an
            # identity geotransform would silently lose the georeferencing
            raise InputError(f"{path}: a grid of {stack.sizes['y']} x {stack.sizes['x']} cells without a stored "
                             "transform (expected the transform of the grid it was computed from)")
    dtype = np.dtype(output.dtype or stack.dtype)
    if dtype == np.float64 and stack.dtype != np.float64:
        dtype = np.dtype(np.float64)
    integer = np.issubdtype(dtype, np.integer) or dtype == np.bool_
    if dtype == np.bool_:
        dtype = np.dtype(np.uint8)
    nodata = output.nodata
    if integer:
        if nodata is None:
            nodata = stack.rio.nodata if stack.rio.nodata is not None and np.isfinite(stack.rio.nodata) else None
        values = stack.fillna(nodata if nodata is not None else 0) if np.issubdtype(stack.dtype, np.floating) else stack
        values = values.astype(dtype)
    else:
        nodata = np.nan
        values = stack.astype(dtype)
    names = [str(v) for v in stack["variable"].values]
    units = ([str(u) for u in np.atleast_1d(stack["units"].values)] if "units" in stack.coords
             else [""] * len(names))
    if output.predictor is not None and output.predictor not in (1, 2, 3):
        raise InputError(f"{path}: predictor {output.predictor!r} (expected 1 = none, 2 = horizontal "
                         "differencing or 3 = floating point)")
    if output.predictor == 3 and integer:
        raise InputError(f"{path}: predictor 3 (floating point) for an integer raster (expected 1 or 2)")
    nearest = tuple(int(b) for b in output.nearest_bands)
    if any(not 0 <= b < len(names) for b in nearest):
        raise InputError(f"{path}: nearest_bands {list(nearest)} (expected 0-based band numbers below {len(names)})")
    return _Prepared(values, path, names, units, output.tags or {}, output.categories, nodata, output.predictor,
                     nearest)


def _all_tags(prep: _Prepared, also_values) -> dict:
    tags = prep.tags(also_values) if callable(prep.tags) else prep.tags
    out = {k: encode_tag(v) for k, v in (tags or {}).items()}
    if prep.categories is not None:
        out["categories"] = json.dumps({str(k): v for k, v in dict(prep.categories).items()})
    return out


def write_raster(da, path, *, overwrite=False, tags=None, categories=None, nodata=None, dtype=None) -> Path:
    """Write a layer or stack to a cloud-optimised GeoTIFF or a CF-NetCDF file, atomically.

    Parameters
    ----------
    da : DataArray (y, x) or (variable, y, x)
        With CRS attached; dask-backed arrays are written block by block (never loaded whole).
    path : path
        ``.tif``/``.tiff`` -> GeoTIFF (COG layout: 512-pixel tiles or smaller, DEFLATE with
        predictor, internal overviews); ``.nc`` -> CF-1.8 NetCDF (zlib compression).
    overwrite : bool, default=False
        Replace an existing file; otherwise :class:`OutputExistsError`.
    tags : dict, optional
        Dataset tags (GeoTIFF) / global attributes (NetCDF); non-string values JSON-encoded.
    categories : dict, optional
        ``{code: meaning}`` for categorical rasters, stored as JSON tag ``categories``
        (and CF ``flag_values``/``flag_meanings`` in NetCDF).
    nodata : number, optional
        Nodata value for integer outputs (NaN is used for floating-point outputs).
    dtype : str or numpy dtype, optional
        Output data type (default: the array's).

    Returns
    -------
    Path
        The written file. Nothing is left behind if writing fails.
    """
    write_rasters([RasterOutput(da, path, tags, categories, nodata, dtype)], overwrite=overwrite)
    return Path(path)


def write_rasters(outputs, *, overwrite=False, also=(), progress=None) -> tuple:
    """Write several rasters computed from one dask graph in a single pass, atomically.

    Outputs that derive from the same inputs (suitability, MESS and a binary map of one
    climate stack, say) share their dask tasks, so every input block is read and every
    shared intermediate computed once (NetCDF outputs are written in a second pass
    through xarray's writer). GeoTIFFs are first streamed block by block into
    an uncompressed tiled staging file (dask computes blocks in parallel; writes are
    serialised by a lock), then turned into a cloud-optimised GeoTIFF by GDAL's COG
    driver (overviews, DEFLATE tiles compressed on all cores). Everything appears at the
    end or nothing does.

    Parameters
    ----------
    outputs : list of RasterOutput
    overwrite : bool, default=False
    also : sequence of dask arrays
        Further values (reductions, say) computed in the same pass; their results are
        returned and handed to callable ``tags``.
    progress : callable(done, total), optional
        Called as dask tasks finish (local schedulers only).

    Returns
    -------
    tuple
        The computed values of ``also``.
    """
    import dask
    import rasterio

    prepared = [_prepare(o, overwrite) for o in outputs]
    paths = [p.path for p in prepared]
    if len({os.path.abspath(p) for p in paths}) != len(paths):
        raise InputError(f"outputs: the same file is given twice ({', '.join(map(str, paths))})")
    on_cluster = _on_cluster()
    with (rasterio.Env(GDAL_CACHEMAX=WRITE_CACHE_MB), atomic_outputs(paths, overwrite=overwrite) as tmps,
          contextlib.ExitStack() as stages):
        also_values = ()
        if on_cluster:
            # file handles and locks cannot travel to dask.distributed workers: compute the
            # output layers there and gather them (never the input stacks), then write here
            computed = dask.compute(*[p.values.data for p in prepared], *also)
            for prep, data in zip(prepared, computed):
                prep.values = prep.values.copy(data=np.asarray(data))
            also_values = tuple(computed[len(prepared):])
        # pass 1: every GeoTIFF and the extra values from one graph (dask arrays only:
        # mixing arrays and Delayed objects in one compute reorders results in dask 2026.8
        # and optimises them apart, which would read shared inputs more than once)
        # (on a cluster the layers are in memory by now and written as the stages open)
        stores = [t for prep, tmp in zip(prepared, tmps) if not prep.netcdf for t in _stage_task(prep, tmp, stages)]
        if not on_cluster:
            with _progress_callback(progress):
                computed = dask.compute(*stores, *also)
            also_values = tuple(computed[len(stores):])
        # pass 2: NetCDF files through xarray's writer (a second read of shared inputs)
        netcdf = [_netcdf_task(prep, tmp) for prep, tmp in zip(prepared, tmps) if prep.netcdf]
        if netcdf:
            with _progress_callback(progress):
                dask.compute(*netcdf)
        finish = []
        for prep, tmp in zip(prepared, tmps):
            tags = _all_tags(prep, also_values)
            if prep.netcdf:
                _netcdf_attributes(tmp, tags)
            else:
                finish.append((prep, tmp, tags))
        _finish_geotiffs(finish)
    return also_values


def _finish_geotiffs(jobs) -> None:
    """:func:`_finish_geotiff` for every ``(prep, tmp, tags)``, several at once: GDAL builds
    a COG's overviews on one thread, so two copies side by side keep both cores busy."""
    if len(jobs) < 2:
        for job in jobs:
            _finish_geotiff(*job)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(min(len(jobs), usable_cores())) as pool:
        futures = [pool.submit(_finish_geotiff, *job) for job in jobs]
    for f in futures:
        f.result()  # the first failure is raised once every copy has stopped


def _on_cluster() -> bool:
    try:
        from distributed import default_client
        default_client()
        return True
    except (ImportError, ValueError):
        return False


@contextlib.contextmanager
def _progress_callback(progress):
    if progress is None:
        yield
        return
    from dask.callbacks import Callback

    class _Count(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            done = len(state["finished"])
            progress(done, done + sum(len(state[k]) for k in ("ready", "waiting", "running")))

    with _Count():
        yield


# ----------------------------------------------------------------------------- GeoTIFF


def _stage_path(tmp: Path) -> Path:
    return tmp.with_name(tmp.name + ".stage.tif")


def _stage_task(prep: _Prepared, tmp: Path, stages: contextlib.ExitStack) -> list:
    """Open the uncompressed staging GeoTIFF (and, for a streamed float raster, one per
    overview level); return the dask tasks that fill them (none: in-memory data, written at once)."""
    import dask.array as dsa

    values = prep.values
    height, width = values.sizes["y"], values.sizes["x"]
    stage = _stage_path(tmp)
    stages.callback(_remove_stage, stage)
    dst = _open_stage(stages, stage, values, width, height, values.rio.transform(), prep.nodata)
    prep.dataset = dst
    data = values.data
    factors = overview_factors(height, width, _block_size(width, height))
    floating = np.issubdtype(values.dtype, np.floating)
    if prep.nearest_bands and factors and floating:
        # GDAL would average every band: the levels are made here, from chunks of whole groups
        data = whole_groups(data, factors[-1])
    if not isinstance(data, dsa.Array):
        dst.write(np.asarray(data))
        return []
    tasks = [_store(data, dst, stages)]
    levels = overview_levels(data, factors, nearest=prep.nearest_bands) if floating else None
    prep.overviews = []
    for f, level in zip(factors, levels or ()):
        path = stage.with_name(f"{stage.name}.ovr{f}.tif")
        stages.callback(_remove_stage, path)
        transform = values.rio.transform() * values.rio.transform().scale(width / level.shape[2], height / level.shape[1])
        ds = _open_stage(stages, path, values, level.shape[2], level.shape[1], transform, prep.nodata)
        prep.overviews.append((path, ds))
        tasks.append(_store(level, ds, stages))
    return tasks


def _open_stage(stages, path, values, width, height, transform, nodata):
    import rasterio

    block = _block_size(width, height)
    return stages.enter_context(rasterio.open(
        path, "w", driver="GTiff", width=width, height=height, count=values.sizes["variable"],
        dtype=values.dtype.name, crs=values.rio.crs, transform=transform, nodata=nodata, tiled=True,
        blockxsize=block, blockysize=block, BIGTIFF="IF_SAFER"))


def _store(data, dst, stages):
    import dask.array as dsa

    writer = WindowWriter(dst)
    stages.callback(writer.close)  # runs before the dataset closes (the stack unwinds in reverse)
    return dsa.store(data, writer, lock=threading.Lock(), compute=False)


def _remove_stage(stage: Path) -> None:
    stage.unlink(missing_ok=True)
    with contextlib.suppress(FileNotFoundError):
        Path(str(stage) + ".aux.xml").unlink()


_COG_PREDICTOR = {1: "NO", 2: "STANDARD", 3: "FLOATING_POINT"}


def _cog_options(floating: bool, block: int, predictor: int | None = None) -> dict:
    """GDAL COG driver options of every GeoTIFF output (overview options apart): DEFLATE at
    :data:`DEFLATE_LEVEL`, ``predictor`` or 3 (float) / 2 (integer), ``block``-cell tiles,
    AVERAGE (float) or NEAREST overviews, compressed on every usable core."""
    return {"driver": "COG", "COMPRESS": "DEFLATE", "LEVEL": str(DEFLATE_LEVEL),
            # the COG driver names "no predictor" NO (a "1" works too, with a warning per file)
            "PREDICTOR": _COG_PREDICTOR[predictor or (3 if floating else 2)], "BLOCKSIZE": str(block),
            "RESAMPLING": "AVERAGE" if floating else "NEAREST", "BIGTIFF": "IF_SAFER",
            "NUM_THREADS": str(usable_cores())}


def _finish_geotiff(prep: _Prepared, tmp: Path, tags: dict) -> None:
    """Band names, units and tags on the staged file, then GDAL's COG copy into ``tmp``.

    A streamed float raster brings its overview levels (:mod:`envelope.io.overviews`, made
    in the same pass): a VRT joins them to the staged file and the COG copy takes them as
    they are instead of reading the whole raster again to build them.
    """
    import rasterio
    import rasterio.shutil

    dst = prep.dataset
    stage = _stage_path(tmp)
    levels = prep.overviews or []
    source = stage
    if levels:
        for _, ds in levels:
            ds.close()
        dst.close()
        source = pyramid_vrt(stage.with_name(stage.name + ".vrt"), stage, [p for p, _ in levels],
                             width=dst.width, height=dst.height, count=dst.count, dtype=dst.dtypes[0],
                             crs=dst.crs, transform=dst.transform)
        dst = rasterio.open(source, "r+")
    for i, (name, unit) in enumerate(zip(prep.names, prep.units), start=1):
        dst.set_band_description(i, name)
        dst.update_tags(i, units=unit)
    dst.update_tags(**tags)
    dst.close()
    floating = np.issubdtype(prep.values.dtype, np.floating)
    block = _block_size(prep.values.sizes["x"], prep.values.sizes["y"])
    tmp.unlink(missing_ok=True)
    try:
        rasterio.shutil.copy(source, tmp, **_cog_options(floating, block, prep.predictor),
                             OVERVIEWS="FORCE_USE_EXISTING" if levels else "AUTO")
    finally:
        if levels:
            Path(source).unlink(missing_ok=True)
            for path, _ in levels:
                _remove_stage(path)
        _remove_stage(stage)


# ----------------------------------------------------------------------------- NetCDF

_KNOWN_CF = {
    # name -> (standard_name, long_name); only names whose meaning is unambiguous
    "suitability": (None, "habitat suitability (0-1)"),
    "mess": (None, "multivariate environmental similarity surface"),
    "tas": ("air_temperature", "near-surface air temperature"),
    "pr": ("precipitation_flux", "precipitation"),
}


def _netcdf_task(prep: _Prepared, tmp: Path):
    """The CF-1.8 dataset of ``prep`` and the delayed write of it to ``tmp``."""
    from pyproj import CRS

    values, names, units, categories, nodata = prep.values, prep.names, prep.units, prep.categories, prep.nodata
    pcrs = CRS.from_user_input(values.rio.crs.to_wkt())
    geographic = pcrs.is_geographic
    xname, yname = ("lon", "lat") if geographic else ("x", "y")
    coords = {
        yname: (yname, values["y"].values.astype(np.float64)),
        xname: (xname, values["x"].values.astype(np.float64)),
    }
    ds = xr.Dataset(coords=coords)
    if geographic:
        ds[xname].attrs = {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east", "axis": "X"}
        ds[yname].attrs = {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north", "axis": "Y"}
    else:
        unit = pcrs.axis_info[0].unit_name if pcrs.axis_info else "m"
        unit = "m" if unit in ("metre", "meter") else unit
        ds[xname].attrs = {"standard_name": "projection_x_coordinate", "long_name": "x coordinate of projection",
                           "units": unit, "axis": "X"}
        ds[yname].attrs = {"standard_name": "projection_y_coordinate", "long_name": "y coordinate of projection",
                           "units": unit, "axis": "Y"}
    mapping = pcrs.to_cf()
    mapping["crs_wkt"] = pcrs.to_wkt()
    mapping["spatial_ref"] = mapping["crs_wkt"]
    ds["crs"] = xr.DataArray(np.int32(0), attrs=mapping)
    encoding = {}
    for i, (name, unit) in enumerate(zip(names, units)):
        var = xr.DataArray(values.data[i], dims=(yname, xname))
        standard, long_name = _KNOWN_CF.get(name, (None, name))
        attrs = {"long_name": long_name, "units": unit, "grid_mapping": "crs"}
        if standard:
            attrs["standard_name"] = standard
        if categories:
            codes = sorted(int(k) for k in categories)
            attrs["flag_values"] = np.array(codes, dtype=values.dtype)
            attrs["flag_meanings"] = " ".join(str(categories[k]).replace(" ", "_") for k in codes)
        var.attrs = attrs
        ds[name] = var
        enc = {"zlib": True, "complevel": 4, "dtype": values.dtype}
        if nodata is not None:
            enc["_FillValue"] = nodata
        if values.chunks is not None:
            enc["chunksizes"] = (min(512, values.sizes["y"]), min(512, values.sizes["x"]))
        encoding[name] = enc
    ds.attrs = {"Conventions": "CF-1.8"}
    tmp.unlink(missing_ok=True)
    return ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding, compute=False)


def _netcdf_attributes(tmp: Path, tags: dict) -> None:
    """Global attributes, set once the data are written (their values may come from the pass)."""
    import netCDF4

    with netCDF4.Dataset(tmp, "a") as nc:
        nc.setncatts(tags)


# ----------------------------------------------------------------------------- window by window


class WindowedRaster:
    """A one-band GeoTIFF written window by window (see :func:`windowed_raster`)."""

    def __init__(self, dataset):
        self._dataset = dataset
        self._lock = threading.Lock()
        self.windows_written = 0

    def write(self, ys: slice, xs: slice, block) -> None:
        """Write the 2-D ``block`` at rows ``ys``, columns ``xs`` (thread-safe)."""
        from rasterio.windows import Window

        block = np.asarray(block)
        with self._lock:
            self._dataset.write(block[None], window=Window(xs.start, ys.start, xs.stop - xs.start, ys.stop - ys.start))
            self.windows_written += 1


@contextlib.contextmanager
def windowed_raster(path, like: xr.DataArray, *, dtype, nodata, name: str, overwrite=False, tags=None,
                    categories=None):
    """Write a one-band GeoTIFF of the grid of ``like`` window by window, in bounded memory.

    Yields a :class:`WindowedRaster`; ``.write(ys, xs, block)`` stores one window. Windows
    never written hold ``nodata`` and take no space: the staging file is sparse (GDAL
    ``SPARSE_OK``) and so is the cloud-optimised GeoTIFF made from it on exit (same layout,
    tiles, DEFLATE and overviews as :func:`write_raster`). Nothing is written if the body
    raises. ``tags`` may be a callable, called on exit, for values known only after the pass.
    Meant for huge, mostly empty grids (a range-change map of a sparse continental grid),
    where :func:`write_raster` would stage every block.
    """
    import rasterio
    import rasterio.shutil

    path = Path(path)
    if path.suffix.lower() not in GEOTIFF_SUFFIXES:
        raise InputError(f"{path}: a grid written window by window must be a GeoTIFF (.tif or .tiff)")
    check_writable(path, overwrite)
    height, width = like.sizes["y"], like.sizes["x"]
    dtype = np.dtype(dtype)
    block = _block_size(width, height)
    with rasterio.Env(GDAL_CACHEMAX=WRITE_CACHE_MB), atomic_outputs([path], overwrite=overwrite) as (tmp,):
        stage = _stage_path(tmp)
        try:
            with rasterio.open(stage, "w", driver="GTiff", width=width, height=height, count=1, dtype=dtype.name,
                               crs=like.rio.crs, transform=like.rio.transform(), nodata=nodata, tiled=True,
                               blockxsize=block, blockysize=block, SPARSE_OK="TRUE", BIGTIFF="IF_SAFER") as dst:
                yield WindowedRaster(dst)
                dst.set_band_description(1, name)
                dst.update_tags(1, units="")
                values = tags() if callable(tags) else (tags or {})
                out = {k: encode_tag(v) for k, v in values.items()}
                if categories is not None:
                    out["categories"] = json.dumps({str(k): v for k, v in dict(categories).items()})
                dst.update_tags(**out)
            tmp.unlink(missing_ok=True)
            floating = np.issubdtype(dtype, np.floating)
            rasterio.shutil.copy(stage, tmp, **_cog_options(floating, block), OVERVIEWS="AUTO", SPARSE_OK="TRUE")
        finally:
            _remove_stage(stage)
