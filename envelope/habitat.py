"""Habitat on the climate grid: availability or land-cover quality, aggregated from finer maps, and fragmentation by latitude."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import GridMismatchError, InputError
from envelope.kernels import fragmentation

__all__ = ["habitat_on_grid", "fragmentation_by_latitude", "fragmentation_summary"]

# Values this close outside 0..1 are float round-off (e.g. a float32 mean of ones) and are clipped.
_RANGE_SLACK = 1e-6
# Relative tolerance when deciding that resolutions are integer multiples and edges line up.
_GRID_TOL = 1e-6


# --------------------------------------------------------------------------- helpers


def _name(source) -> str:
    return str(getattr(source, "name", None) or "habitat layer")


def _reference_layer(grid) -> xr.DataArray:
    """A 2-D (y, x) layer defining the target grid, from a climate stack or a layer."""
    if not isinstance(grid, xr.DataArray):
        raise InputError(f"climate grid: expected a DataArray, got {type(grid).__name__} (open files with "
                         "envelope.pipelines.inputs.load_habitat)")
    if "variable" in grid.dims:
        grid = grid.isel(variable=0, drop=True)
    if set(grid.dims) != {"y", "x"}:
        raise InputError(f"climate grid: expected dims (variable, y, x) or (y, x), got {grid.dims}")
    return grid


def _checked_layer(source, source_name: str) -> xr.DataArray:
    if not isinstance(source, xr.DataArray):
        raise InputError(f"habitat: expected a DataArray, got {type(source).__name__} (open files with "
                         "envelope.pipelines.inputs.load_habitat)")
    da = source
    if set(da.dims) != {"y", "x"}:
        raise InputError(f"{source_name}: expected a single-band (y, x) layer, got dims {da.dims}")
    if da.rio.crs is None:
        raise InputError(f"{source_name}: raster has no CRS; expected the climate grid's CRS")
    return da.transpose("y", "x")


def _compute(*arrays):
    """Compute small reductions together (one pass over dask-backed data)."""
    import dask

    return [np.asarray(a) for a in dask.compute(*[a.data for a in arrays])]


def _nodata_mask(da: xr.DataArray) -> xr.DataArray:
    """True where the layer holds no value: NaN, or the declared nodata of an integer raster."""
    mask = da.isnull() if da.dtype.kind == "f" else xr.zeros_like(da, dtype=bool)
    nodata = da.rio.nodata if da.rio.nodata is not None else da.rio.encoded_nodata
    if nodata is not None and not (isinstance(nodata, float) and math.isnan(nodata)):
        mask = mask | (da == nodata)
    return mask


def _codes_to_quality(block, codes, quality):
    """Kernel: class codes -> quality; NaN where the code is not in ``codes`` (nodata)."""
    flat = np.asarray(block)
    valid = np.isfinite(flat) if flat.dtype.kind == "f" else np.ones(flat.shape, bool)
    safe = np.where(valid, flat, codes[0]).astype(np.int64)
    idx = np.clip(np.searchsorted(codes, safe), 0, codes.size - 1)
    found = valid & (codes[idx] == safe)
    return np.where(found, quality[idx], np.nan).astype(np.float32)


def _land_cover_quality(da: xr.DataArray, table: dict, source_name: str, table_name: str) -> xr.DataArray:
    """Map land-cover codes to habitat quality; unknown codes are an error naming them and the table."""
    nodata = _nodata_mask(da)
    codes_da = da.where(~nodata)
    values = codes_da.data
    if hasattr(values, "dask"):
        import dask.array

        present = np.asarray(dask.array.unique(values[~dask.array.isnan(values)]).compute())
    else:
        values = np.asarray(values)
        present = np.unique(values[np.isfinite(values)])
    if present.size and not np.all(np.mod(present, 1) == 0):
        bad = present[np.mod(present, 1) != 0][:5]
        raise InputError(f"{source_name}: land cover holds non-integer values {bad.tolist()}; "
                         f"expected integer class codes")
    unknown = sorted(int(c) for c in present if int(c) not in table)
    if unknown:
        shown = ", ".join(str(c) for c in unknown[:10]) + (" ..." if len(unknown) > 10 else "")
        raise InputError(f"{source_name}: class code(s) {shown} found in the land cover are not in the "
                         f"class table {table_name} (it lists {', '.join(str(c) for c in sorted(table))})")
    codes = np.array(sorted(table), dtype=np.int64)
    quality = np.array([table[c] for c in codes], dtype=np.float64)
    out = xr.apply_ufunc(_codes_to_quality, codes_da, kwargs={"codes": codes, "quality": quality},
                         dask="parallelized", output_dtypes=[np.float32])
    return out.rio.write_crs(da.rio.crs).rio.write_transform(da.rio.transform())


def _checked_fraction(da: xr.DataArray, source_name: str) -> xr.DataArray:
    """A habitat-availability layer as float32 NaN-for-nodata, refusing values outside 0–1."""
    nodata = _nodata_mask(da)
    values = da.astype(np.float32).where(~nodata)
    outside = (values < -_RANGE_SLACK) | (values > 1 + _RANGE_SLACK)
    n_out, lo, hi = _compute(outside.sum(), values.min(), values.max())
    if int(n_out):
        hint = " (integer codes? pass the class table with classes=...)" if da.dtype.kind in "iu" else ""
        raise InputError(f"{source_name}: {int(n_out)} habitat value(s) outside 0–1 (found {float(lo):g} to "
                         f"{float(hi):g}); expected the usable fraction of each cell, 0–1{hint}")
    return values.clip(0.0, 1.0)


def _finer_window(fine: xr.DataArray, ref: xr.DataArray):
    """If ``fine`` is an integer factor finer than ``ref``, same CRS and edges aligned, return
    (row0, col0, factor_y, factor_x); else None. Raises if aligned but not covering ``ref``."""
    if fine.rio.crs != ref.rio.crs:
        return None
    ft, rt = fine.rio.transform(), ref.rio.transform()
    if ft.b or ft.d or rt.b or rt.d:
        return None
    fx, fy = rt.a / ft.a, rt.e / ft.e
    if fx <= 0 or fy <= 0:
        return None
    factor_x, factor_y = round(fx), round(fy)
    if (factor_x < 1 or factor_y < 1 or (factor_x == 1 and factor_y == 1)
            or abs(fx - factor_x) > _GRID_TOL * fx or abs(fy - factor_y) > _GRID_TOL * fy):
        return None
    col0, row0 = (rt.c - ft.c) / ft.a, (rt.f - ft.f) / ft.e
    if abs(col0 - round(col0)) > 1e-4 or abs(row0 - round(row0)) > 1e-4:
        return None
    col0, row0 = int(round(col0)), int(round(row0))
    height, width = ref.sizes["y"], ref.sizes["x"]
    if col0 < 0 or row0 < 0 or col0 + factor_x * width > fine.sizes["x"] or row0 + factor_y * height > fine.sizes["y"]:
        fb, rb = fine.rio.bounds(), ref.rio.bounds()
        raise GridMismatchError(
            f"habitat grid is {factor_x}x{factor_y} finer but does not cover the climate grid "
            f"(habitat bounds {tuple(round(v, 6) for v in fb)}, climate bounds {tuple(round(v, 6) for v in rb)}); "
            f"pass align=True to resample it")
    return row0, col0, factor_y, factor_x


def _block_multiple(size: int, factor: int) -> int:
    return max(factor, int(round(size / factor)) * factor)


def _aggregate(fine: xr.DataArray, ref: xr.DataArray, window) -> xr.DataArray:
    """Area-weighted mean of each block of fine cells onto ``ref`` (NaN fine cells carry no weight)."""
    from envelope.grids import cell_area_km2

    row0, col0, factor_y, factor_x = window
    fine = fine.isel(y=slice(row0, row0 + factor_y * ref.sizes["y"]),
                     x=slice(col0, col0 + factor_x * ref.sizes["x"]))
    # True fine-cell areas: on geographic grids they shrink poleward within one coarse cell,
    # so a plain mean would over-weight the poleward fine rows.
    area = cell_area_km2(fine).transpose("y", "x").astype(np.float64)
    area = xr.DataArray(area.data, dims=("y", "x"), coords={"y": fine["y"].values, "x": fine["x"].values})
    fine = xr.DataArray(fine.data, dims=("y", "x"), coords={"y": fine["y"].values, "x": fine["x"].values})
    if fine.chunks is not None:
        # chunk edges on block edges, so each output chunk comes from whole input chunks
        # (otherwise dask's coarsen falls back to one-cell output chunks)
        fine = fine.chunk({dim: _block_multiple(fine.chunks[axis][0], factor)
                           for axis, (dim, factor) in enumerate((("y", factor_y), ("x", factor_x)))})
    area = area.chunk(fine.chunksizes) if fine.chunks is not None else area
    valid = fine.notnull()
    numerator = (fine.fillna(0.0).astype(np.float64) * area).coarsen(y=factor_y, x=factor_x).sum()
    denominator = area.where(valid, 0.0).coarsen(y=factor_y, x=factor_x).sum()
    mean = (numerator / denominator.where(denominator > 0)).clip(0.0, 1.0)
    return xr.DataArray(mean.data, dims=("y", "x"), coords={"y": ref["y"].values, "x": ref["x"].values})


def _on_grid(da: xr.DataArray, ref: xr.DataArray) -> xr.DataArray:
    out = xr.DataArray(da.data, dims=("y", "x"), coords={"y": ref["y"].values, "x": ref["x"].values},
                       name="habitat")
    return out.rio.write_crs(ref.rio.crs).rio.write_transform(ref.rio.transform())


# --------------------------------------------------------------------------- load_habitat


def habitat_on_grid(layer, grid, *, classes=None, align=False, nodata_as=0.0, name=None,
                    class_table_name=None) -> xr.DataArray:
    """Habitat availability (fraction of each cell usable, 0–1) on the climate grid.

    ``layer`` is either a habitat-availability layer (fraction 0–1) or, with ``classes``, a
    categorical land-cover layer whose codes the class table maps to habitat quality 0–1.
    (:func:`envelope.pipelines.inputs.load_habitat` opens the files and calls this.)
    The result is on ``grid``:

    - same grid (CRS, transform, shape): passed through;
    - a finer grid, same CRS, resolution an integer factor finer and cell edges on the climate
      grid's edges: the area-weighted mean of the fine cells in each climate cell, weights the
      fine cells' true areas (``envelope.grids.cell_area_km2``: ellipsoidal on geographic
      grids, so it is the plain mean on an equal-area grid). Land cover is mapped to quality
      first, then averaged;
    - anything else (coarser, misaligned, another CRS): `GridMismatchError` unless
      ``align=True``, which resamples with ``envelope.grids.align_to`` (average resampling).

    Nodata: NaN cells of a fraction raster and nodata cells of a land cover (its declared
    nodata, e.g. 0) become ``nodata_as`` (default 0 = no habitat) *before* aggregation, so a
    climate cell half sea, half perfect habitat gets 0.5. With ``nodata_as=nan`` nodata cells
    carry no weight instead and a climate cell with no valid fine cell is NaN.

    Parameters
    ----------
    layer : DataArray (y, x)
        Habitat layer with a CRS.
    grid : DataArray (variable, y, x) or (y, x)
        The climate stack, or any layer defining the target grid.
    classes : dict of int -> float, optional
        Class code to habitat quality (``envelope.io.tables.read_class_table``); makes ``layer`` land cover.
    name, class_table_name : str, optional
        How error messages and ``attrs`` name the layer (default its ``name``) and the class table.
    align : bool, default=False
        Resample a grid that does not match and is not an aligned finer grid.
    nodata_as : float, default=0.0
        Value for nodata cells, in 0–1, or NaN.

    Returns
    -------
    DataArray (y, x) float32, named "habitat", values in [0, 1] (NaN only if ``nodata_as`` is
    NaN), on the climate grid with its CRS; dask-backed if the input is. ``attrs`` record the
    source and the method used.

    Raises
    ------
    InputError
        Values outside 0–1, unknown class codes, a bad class table, a bad ``nodata_as``.
    GridMismatchError
        The habitat grid neither matches nor is an aligned finer grid, and ``align`` is False.

    References
    ----------
    Area-weighted aggregation with ellipsoidal cell areas: see ``docs/habitat.md``.
    """
    nodata_as = float(nodata_as)
    if not (math.isnan(nodata_as) or 0.0 <= nodata_as <= 1.0):
        raise InputError(f"nodata_as: expected a value in 0–1 or NaN, got {nodata_as:g}")
    from envelope.grids import align_to, check_same_grid

    source_name = name or _name(layer)
    ref = _reference_layer(grid)
    src = _checked_layer(layer, source_name)
    if classes is not None:
        values = _land_cover_quality(src, classes, source_name, class_table_name or "given")
    else:
        values = _checked_fraction(src, source_name)
    if not math.isnan(nodata_as):
        values = values.fillna(nodata_as)
    values = values.rio.write_crs(src.rio.crs).rio.write_transform(src.rio.transform())

    try:
        check_same_grid(ref, src, ref_name="climate grid", other_name=source_name)
        method = "same grid"
        result = _on_grid(values, ref)
    except GridMismatchError as mismatch:
        window = _finer_window(src, ref)
        if window is not None:
            method = f"area-weighted mean of {window[3]}x{window[2]} finer cells"
            result = _on_grid(_aggregate(values, ref, window), ref)
        elif align:
            method = "aligned (average resampling)"
            result = _on_grid(align_to(values, ref, resampling="average"), ref)
        else:
            raise GridMismatchError(f"{mismatch}; a habitat map must be on the climate grid or an aligned "
                                    f"integer-factor finer grid; pass align=True to resample it") from None
    result = result.clip(0.0, 1.0).astype(np.float32)
    result.attrs = {"source": source_name, "method": method,
                    "nodata_as": "nan" if math.isnan(nodata_as) else f"{nodata_as:g}",
                    "meaning": "habitat availability: usable fraction of each cell, 0-1"}
    if classes is not None:
        result.attrs["class_table"] = str(class_table_name or "given")
    result.name = "habitat"
    return result


# --------------------------------------------------------------------------- fragmentation


def _cell_latitudes(habitat: xr.DataArray) -> np.ndarray:
    """Latitude of every cell centre, shape (y, x) (broadcast from rows on geographic grids)."""
    from envelope.grids import is_geographic

    if is_geographic(habitat):
        lat = np.asarray(habitat["y"].values, dtype=np.float64)
        return np.broadcast_to(lat[:, None], (habitat.sizes["y"], habitat.sizes["x"]))
    from pyproj import CRS, Transformer

    crs = CRS.from_user_input(habitat.rio.crs.to_wkt())
    # the CRS's own datum, so no datum shift is involved in telling latitudes
    to_geo = Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    xx, yy = np.meshgrid(habitat["x"].values, habitat["y"].values)
    _, lat = to_geo.transform(xx, yy)
    return np.asarray(lat)


def fragmentation_by_latitude(habitat, *, threshold=0.5, band_deg=1.0, land_mask=None,
                              connectivity=4) -> pd.DataFrame:
    """Habitat amount and fragmentation per latitude band (Jaeger's effective mesh size).

    Habitat cells are those with fraction >= ``threshold``; patches are 4- (or 8-) connected
    groups of habitat cells (`envelope.kernels.fragmentation`). Bands are ``band_deg`` wide
    with edges at multiples of ``band_deg`` (36–37°, 37–38°, ...); a cell belongs to the band
    of its centre's latitude (on projected grids the latitude of the cell centre on the CRS's
    own datum, so a band is the set of cells whose centres fall in it). Each band is a
    reporting region on its own, with the **cutting-out** procedure (Jaeger 2000): a patch
    crossing a band edge is cut there and each band counts only its own part; pieces of one
    patch that meet only outside the band count as separate patches. The region's area A_t is
    the band's land area, so sea does not count as fragmentation. Areas are true cell areas
    (`envelope.grids.cell_area_km2`).

    Parameters
    ----------
    habitat : DataArray (y, x)
        Habitat fraction 0–1 with a CRS (e.g. from `load_habitat`).
    threshold : float, default=0.5
        Cells with habitat >= threshold are habitat; in (0, 1].
    band_deg : float, default=1.0
        Band width in degrees of latitude.
    land_mask : DataArray (y, x), optional
        Land cells (true / non-zero; NaN is sea) on the same grid. Default: cells where
        ``habitat`` is not NaN (so pass ``land_mask`` if nodata was filled with 0).
    connectivity : {4, 8}, default=4

    Returns
    -------
    pandas.DataFrame
        One row per band holding land, ordered from equatorward to poleward: ``lat_min``,
        ``lat_max``, ``hemisphere`` ("N"/"S"), ``poleward`` (0 = the band nearest the equator;
        bands at equal distance from the equator share a rank), ``land_area_km2``,
        ``habitat_area_km2`` (area of habitat cells), ``habitat_share_of_land``,
        ``habitat_amount_km2`` (Σ fraction × cell area over land), ``n_patches``,
        ``mean_patch_area_km2``, ``effective_mesh_size_km2``, ``splitting_index``,
        ``degree_of_coherence``.

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape division, splitting index, and effective mesh size: new
    measures of landscape fragmentation. Landscape Ecology 15: 115–130.
    """
    from envelope.grids import cell_area_km2, check_same_grid

    if not isinstance(habitat, xr.DataArray) or set(habitat.dims) != {"y", "x"}:
        raise InputError("habitat: expected a (y, x) DataArray")
    if habitat.rio.crs is None:
        raise InputError("habitat: layer has no CRS; cannot tell latitudes or true areas")
    if not (0.0 < float(threshold) <= 1.0):
        raise InputError(f"threshold: expected a habitat fraction in (0, 1], got {threshold}")
    if not (0.0 < float(band_deg) <= 180.0):
        raise InputError(f"band_deg: expected a band width in degrees > 0, got {band_deg}")
    habitat = habitat.transpose("y", "x")
    if land_mask is not None:
        check_same_grid(habitat, land_mask, ref_name="habitat", other_name="land_mask")
        land_da = land_mask.transpose("y", "x").fillna(0) != 0
    else:
        land_da = habitat.notnull()
    area_da = cell_area_km2(habitat)

    lat = _cell_latitudes(habitat)
    band = np.floor(lat / band_deg).astype(np.int64)
    rows = []
    for b in np.unique(band):
        in_band = band == b
        hit = np.flatnonzero(in_band.any(axis=1))
        r0, r1 = int(hit[0]), int(hit[-1]) + 1
        window = slice(r0, r1)
        frac, land, area = (np.asarray(a.isel(y=window).values) for a in (habitat, land_da, area_da))
        region = in_band[window] & land.astype(bool)
        if not region.any():
            continue
        frac = np.where(np.isfinite(frac), frac, 0.0)
        is_habitat = region & (frac >= threshold)
        land_area = float(area[region].sum())
        stats = fragmentation.patch_statistics(is_habitat, area, connectivity=connectivity,
                                               region_area=land_area)
        lat_min, lat_max = b * band_deg, (b + 1) * band_deg
        rows.append({
            "lat_min": lat_min, "lat_max": lat_max,
            "hemisphere": "N" if lat_min >= 0 else "S",
            "_distance": abs(lat_min + lat_max) / 2,
            "land_area_km2": land_area,
            "habitat_area_km2": stats["habitat_area"],
            "habitat_share_of_land": stats["habitat_area"] / land_area,
            "habitat_amount_km2": float((frac * area)[region].sum()),
            "n_patches": stats["n_patches"],
            "mean_patch_area_km2": stats["mean_patch_area"],
            "effective_mesh_size_km2": stats["effective_mesh_size"],
            "splitting_index": stats["splitting_index"],
            "degree_of_coherence": stats["degree_of_coherence"],
        })
    columns = ["lat_min", "lat_max", "hemisphere", "poleward", "land_area_km2", "habitat_area_km2",
               "habitat_share_of_land", "habitat_amount_km2", "n_patches", "mean_patch_area_km2",
               "effective_mesh_size_km2", "splitting_index", "degree_of_coherence"]
    if not rows:
        return pd.DataFrame(columns=columns)
    table = pd.DataFrame(rows)
    # Dense rank of the distance from the equator: hemisphere-aware "how far poleward".
    table["poleward"] = table["_distance"].round(9).rank(method="dense").astype(int) - 1
    table = table.sort_values(["poleward", "lat_min"]).reset_index(drop=True)
    return table[columns]


def fragmentation_summary(table: pd.DataFrame, *, threshold=0.5, band_deg=1.0, connectivity=4,
                          land="cells with climate data") -> dict:
    """The fragmentation table as a JSON-ready summary, with a verdict on the poleward half.

    The bands (rows of :func:`fragmentation_by_latitude`, equatorward to poleward) are split
    into an equatorward and a poleward half (the middle band of an odd number is left
    out). Each half's effective mesh size is that of the union of its bands under the
    cutting-out procedure, Σ_bands Σ_i A_i² / Σ_bands A_t: the land-area-weighted mean of
    the bands' m_eff (Jaeger 2000: m_eff of reporting regions combine this way). The
    poleward half is called more fragmented when its m_eff is smaller.

    Returns
    -------
    dict
        ``habitat_threshold``, ``band_deg``, ``connectivity``, ``land``, ``bands`` (one dict
        per row, ordered equator to pole), ``equatorward_half`` and ``poleward_half``
        (band range, land and habitat area, habitat share, m_eff, patches per 1000 km² of
        land), ``poleward_half_more_fragmented`` (bool, None with fewer than 2 bands) and
        ``statement`` (one sentence).

    References
    ----------
    Jaeger, J.A.G. (2000) Landscape division, splitting index, and effective mesh size: new
    measures of landscape fragmentation. Landscape Ecology 15: 115–130.
    """
    bands = [{k: (v.item() if hasattr(v, "item") else v) for k, v in row.items()}
             for row in table.to_dict("records")]
    out = {"habitat_threshold": float(threshold), "band_deg": float(band_deg), "connectivity": int(connectivity),
           "land": land, "bands": bands, "equatorward_half": None, "poleward_half": None,
           "poleward_half_more_fragmented": None,
           "statement": "fewer than two latitude bands with land: no poleward comparison"}
    half = len(table) // 2
    if half == 0:
        return out

    def pooled(part):
        land_area = float(part["land_area_km2"].sum())
        habitat_area = float(part["habitat_area_km2"].sum())
        return {"lat_min": float(part["lat_min"].min()), "lat_max": float(part["lat_max"].max()),
                "n_bands": int(len(part)), "land_area_km2": land_area, "habitat_area_km2": habitat_area,
                "habitat_share_of_land": habitat_area / land_area,
                "effective_mesh_size_km2": float((part["effective_mesh_size_km2"] * part["land_area_km2"]).sum()
                                                 / land_area),
                "patches_per_1000_km2": 1000.0 * float(part["n_patches"].sum()) / land_area}

    low, high = pooled(table.iloc[:half]), pooled(table.iloc[len(table) - half:])
    more = high["effective_mesh_size_km2"] < low["effective_mesh_size_km2"]
    out.update({"equatorward_half": low, "poleward_half": high, "poleward_half_more_fragmented": bool(more),
                "statement": (f"effective mesh size {high['effective_mesh_size_km2']:.3g} km² in the poleward half "
                              f"of the bands against {low['effective_mesh_size_km2']:.3g} km² in the equatorward "
                              f"half: the poleward half is {'more' if more else 'not more'} fragmented")})
    return out
