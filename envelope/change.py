"""Range change between two suitability maps: classes, true areas, centroid, edge and elevation shifts."""

from __future__ import annotations


import dask
import dask.array
import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.provenance import json_ready
from envelope.kernels.change import (
    CHANGE_CLASSES,
    CHANGE_NODATA,
    check_threshold,
    LATITUDE_BINS,
    class_sums,
    classify_change,
    latitude_bin,
    meridian_arc_km,
    normal_vector_sums,
    position_from_vector,
    quantile_bin,
    quantile_in_bin,
    weighted_quantile,
)

__all__ = [
    "check_suitability_values",
    "CHANGE_CLASSES",
    "CHANGE_NODATA",
    "classify_range_change",
    "summarise_change",
    "WindowedChange",
    "change_table",
    "LABEL_COLUMNS",
]

NOW_CODES = (1, 2, 5)          # lost, stable, stable_novel: the current range
FUTURE_CODES = (2, 3, 4, 5)    # stable, gained, gained_novel, stable_novel: the future range
LABEL_COLUMNS = ("name", "pathway", "climate_model", "horizon")
_N = len(CHANGE_CLASSES)


# --------------------------------------------------------------------------- classes

def check_suitability_values(values, name: str, *, require_valid: bool = True) -> None:
    """Refuse a suitability map that is not in 0..1, or (``require_valid``) holds no valid cell.

    ``values`` is an array (NumPy, dask or xarray, any shape); a lazy one is reduced in one
    pass. A percentage (0..100) or scaled integers (0..255, 0..1000) would be classified
    against a 0..1 threshold without complaint, so nearly every cell would count as suitable.
    """
    import warnings

    data = values.data if isinstance(values, xr.DataArray) else values
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # an all-NaN map: reported below
        lo, hi = (float(v) for v in dask.compute(np.nanmin(data), np.nanmax(data))) if data.size else (
            np.nan, np.nan)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        if require_valid:
            raise InputError(f"{name}: the suitability map holds no valid cell (all nodata); expected values 0..1")
        return
    if lo < -1e-6 or hi > 1.0 + 1e-6:
        hint = (" (a percentage? divide by 100)" if 1.0 < hi <= 100.0 and lo >= 0 else
                " (scaled integers? divide by their scale)" if hi > 100.0 and lo >= 0 else "")
        raise InputError(f"{name}: suitability values from {lo:g} to {hi:g}; expected 0..1{hint}")


def classify_range_change(now: xr.DataArray, future: xr.DataArray, threshold: float, *,
                          mess: xr.DataArray | None = None) -> xr.DataArray:
    """Range-change classes (uint8, codes in ``CHANGE_CLASSES``, 255 nodata) of two suitability maps.

    Lazy when the inputs are dask-backed: the kernel :func:`envelope.kernels.change.classify_change`
    runs chunk by chunk. The grids must already match (``envelope.grids.check_same_grid``).

    Parameters
    ----------
    now, future : DataArray (y, x), suitability 0-1, NaN for nodata
    threshold : float in [0, 1]; suitable means ``suitability >= threshold``
    mess : DataArray (y, x), optional; gained cells with MESS < 0 become ``gained_novel``,
        stable ones ``stable_novel``

    References
    ----------
    Elith, J., Kearney, M. & Phillips, S. (2010) Methods in Ecology and Evolution 1: 330-342.
    """
    threshold = check_threshold(threshold)
    args = [now, future] + ([mess] if mess is not None else [])

    def kernel(n, f, m=None):
        return classify_change(n, f, threshold, m)

    classes = xr.apply_ufunc(kernel, *args, dask="parallelized", output_dtypes=[np.uint8])
    classes = classes.transpose("y", "x").rename("change")
    classes.attrs = {"long_name": "range change class", "threshold": threshold, "threshold_state": ">=",
                     "_FillValue": CHANGE_NODATA}
    if now.rio.crs is not None:
        classes = classes.rio.write_crs(now.rio.crs)
    return classes


# --------------------------------------------------------------------------- summary

def _lonlat(x, y, crs_wkt, geographic):
    """Geodetic lon/lat (degrees) of cell centres x (cols), y (rows), broadcast to (rows, cols)."""
    if geographic:
        return np.broadcast_to(x[None, :], (y.size, x.size)), np.broadcast_to(y[:, None], (y.size, x.size))
    import pyproj

    transformer = pyproj.Transformer.from_crs(pyproj.CRS.from_wkt(crs_wkt), "EPSG:4326", always_xy=True)
    xx, yy = np.meshgrid(x, y)
    return transformer.transform(xx, yy)


def _block_stats(classes, area, elevation, x, y, crs_wkt, geographic):
    """Reductions of one block: class areas and counts, n-vector sums, elevation sums, latitudes."""
    lon, lat = _lonlat(x, y, crs_wkt, geographic)
    area = np.asarray(area, dtype=np.float64)
    parts = [class_sums(classes, area).ravel()]
    latitudes = []
    for codes in (NOW_CODES, FUTURE_CODES):
        in_range = np.isin(classes, codes) & np.isfinite(area)
        weight = np.where(in_range, area, 0.0)
        parts.append(normal_vector_sums(lon, lat, weight))
        if elevation is None:
            parts.append(np.zeros(2))
        else:
            elev = np.asarray(elevation, dtype=np.float64)
            ok = in_range & np.isfinite(elev)
            parts.append(np.array([np.sum(np.where(ok, area * elev, 0.0)), np.sum(np.where(ok, area, 0.0))]))
        if geographic:
            # latitude is constant along a row: keep one (latitude, area) pair per row
            latitudes.append((y, weight.sum(axis=1)))
        else:
            latitudes.append((lat[in_range], weight[in_range]))
    return np.concatenate(parts), latitudes


def _as_dask(values, chunks):
    arr = values.data if isinstance(values, xr.DataArray) else values
    arr = dask.array.asarray(arr)
    return arr.rechunk(chunks)


def _crs_of(da):
    try:
        return da.rio.crs
    except Exception:  # noqa: BLE001 -- rioxarray raises on odd attrs; treat as unknown
        return None


def summarise_change(classes: xr.DataArray, *, cell_area_km2=None, elevation: xr.DataArray | None = None,
                     edge_percentile: float = 95.0, mess_given: bool | None = None) -> dict:
    """Areas, range sizes, centroid shift, poleward edge shifts and elevation shift of a change map.

    All sums are chunk-wise dask reductions (one pass over the grid); only per-row latitude
    weights (geographic grids) or the latitudes of in-range cells (projected grids) are
    gathered for the edge percentiles.

    Parameters
    ----------
    classes : DataArray (y, x) of uint8 codes from :func:`classify_range_change`
    cell_area_km2 : DataArray or ndarray (y, x), optional
        True cell areas in km². Default: ``envelope.grids.cell_area_km2(classes)`` (exact
        ellipsoidal areas on geographic grids, ground areas on projected grids).
    elevation : DataArray (y, x), optional
        Elevation (m) on the same grid; gives ``elevation_shift_m``.
    edge_percentile : float, default=95
        Area-weighted percentile of poleward latitude defining the leading edge; the trailing
        edge is the ``100 - edge_percentile`` percentile. Must lie in (50, 100).
    mess_given : bool, optional
        Whether the classes were made with a MESS map; when False ``area_km2.gained_novel``
        is None (not assessed). Default: ``classes.attrs["mess"]`` if set, else True.

    Returns
    -------
    dict with the keys documented in docs/change.md.

    References
    ----------
    Gade, K. (2010) Journal of Navigation 63: 395-417 (n-vector mean position).
    Hyndman, R.J. & Fan, Y. (1996) The American Statistician 50: 361-365 (quantile definition 1).
    Karney, C.F.F. (2013) Algorithms for geodesics. Journal of Geodesy 87: 43-55 (pyproj.Geod.inv).
    """
    edge_percentile = _check_edge_percentile(edge_percentile)
    if mess_given is None:
        mess_given = bool(classes.attrs.get("mess", True))
    if cell_area_km2 is None:
        from envelope.grids import cell_area_km2 as grid_cell_area_km2

        cell_area_km2 = grid_cell_area_km2(classes)
    if tuple(np.shape(cell_area_km2)) != classes.shape:
        raise InputError(f"cell areas: found shape {np.shape(cell_area_km2)}; expected the grid's {classes.shape}")
    if elevation is not None and tuple(elevation.shape) != classes.shape:
        raise InputError(f"elevation: found shape {elevation.shape}; expected the grid's {classes.shape}")

    crs = _crs_of(classes)
    geographic = True if crs is None else bool(crs.is_geographic)
    crs_wkt = None if crs is None else crs.to_wkt()

    cls = dask.array.asarray(classes.data)
    chunks = cls.chunks
    area = _as_dask(cell_area_km2, chunks)
    elev = None if elevation is None else _as_dask(elevation.astype(np.float64), chunks)
    x = np.asarray(classes["x"].values, dtype=np.float64)
    y = np.asarray(classes["y"].values, dtype=np.float64)

    tasks = []
    row0 = 0
    for i, nrow in enumerate(chunks[0]):
        col0 = 0
        for j, ncol in enumerate(chunks[1]):
            tasks.append(dask.delayed(_block_stats)(
                cls.blocks[i, j], area.blocks[i, j], None if elev is None else elev.blocks[i, j],
                x[col0:col0 + ncol], y[row0:row0 + nrow], crs_wkt, geographic))
            col0 += ncol
        row0 += nrow
    results = dask.compute(*tasks)
    totals = np.sum([r[0] for r in results], axis=0)
    lat_now = [np.concatenate([r[1][k][0] for r in results]) for k in (0, 1)]
    lat_w = [np.concatenate([r[1][k][1] for r in results]) for k in (0, 1)]

    def quantile(k, sign, q):
        return sign * weighted_quantile(sign * lat_now[k], lat_w[k], q)

    return _summary_from(totals, int(classes.size), quantile, threshold=classes.attrs.get("threshold"), crs=crs,
                         mess_given=mess_given, edge_percentile=edge_percentile, elevation_given=elevation is not None)


def _check_edge_percentile(edge_percentile) -> float:
    edge_percentile = float(edge_percentile)
    if not 50.0 < edge_percentile < 100.0:
        raise InputError(f"edge percentile: found {edge_percentile!r}; expected a number between 50 and 100 (exclusive)")
    return edge_percentile


def _poleward_sign(totals) -> float:
    """+1 when poleward is north (the current range's centroid in the northern hemisphere, or
    no range), else -1."""
    lat = position_from_vector(totals[2 * _N:2 * _N + 4])[1]
    return -1.0 if (np.isfinite(lat) and lat < 0) else 1.0


def _summary_from(totals, n_total, quantile, *, threshold, crs, mess_given, edge_percentile, elevation_given):
    """The summary dict from the summed block reductions ``totals`` (see :func:`_block_stats`).

    ``quantile(k, sign, q)`` is the area-weighted ``q``-quantile of poleward latitude
    ``sign * lat`` over range ``k`` (0 now, 1 future), returned as a latitude.
    """
    import pyproj

    sums = totals[:2 * _N].reshape(2, _N)
    vec = {"now": totals[2 * _N:2 * _N + 4], "future": totals[2 * _N + 6:2 * _N + 10]}
    elev_sums = {"now": totals[2 * _N + 4:2 * _N + 6], "future": totals[2 * _N + 10:2 * _N + 12]}
    names = list(CHANGE_CLASSES.values())
    area_by = dict(zip(names, (float(v) for v in sums[0])))
    count_by = dict(zip(names, (int(round(v)) for v in sums[1])))
    n_valid = sum(count_by.values())

    range_now = area_by["lost"] + area_by["stable"] + area_by["stable_novel"]
    range_future = area_by["stable"] + area_by["stable_novel"] + area_by["gained"] + area_by["gained_novel"]
    centroid = {k: position_from_vector(vec[k]) for k in ("now", "future")}

    geod = pyproj.Geod(ellps="WGS84")
    shift_km = bearing = float("nan")
    if all(np.isfinite(centroid["now"] + centroid["future"])):
        az12, _, dist = geod.inv(*centroid["now"], *centroid["future"])
        shift_km = dist / 1000.0
        # a zero shift has no direction
        bearing = float(az12 % 360.0) if dist > 0 else float("nan")

    sign = _poleward_sign(totals)
    north = sign > 0
    q_lead, q_trail = edge_percentile / 100.0, 1.0 - edge_percentile / 100.0
    edges = {"leading": {}, "trailing": {}}
    for k, key in enumerate(("now", "future")):
        edges["leading"][key] = quantile(k, sign, q_lead)
        edges["trailing"][key] = quantile(k, sign, q_trail)
    edge_shift = {}
    for side in ("leading", "trailing"):
        a, b = edges[side]["now"], edges[side]["future"]
        edge_shift[side] = sign * meridian_arc_km(a, b) if np.isfinite(a) and np.isfinite(b) else float("nan")

    summary = {
        "threshold": threshold,
        "threshold_state": ">=",
        "classes": {str(code): name for code, name in CHANGE_CLASSES.items()},
        "nodata": CHANGE_NODATA,
        "n_cells": {**count_by, "nodata": n_total - n_valid, "total": n_total},
        "area_km2": {**area_by, "gained_novel": area_by["gained_novel"] if mess_given else None,
                     "stable_novel": area_by["stable_novel"] if mess_given else None,
                     "gained_total": area_by["gained"] + area_by["gained_novel"],
                     "stable_total": area_by["stable"] + area_by["stable_novel"]},
        "range_km2": {"now": range_now, "future": range_future},
        "range_change_pct": 100.0 * (range_future - range_now) / range_now if range_now > 0 else None,
        "centroid_method": "area-weighted mean of ellipsoid surface normals (n-vectors), WGS84",
        "centroid_now": {"lon": centroid["now"][0], "lat": centroid["now"][1]},
        "centroid_future": {"lon": centroid["future"][0], "lat": centroid["future"][1]},
        "centroid_shift_km": shift_km,
        "centroid_bearing_deg": bearing,
        "poleward": "north" if north else "south",
        "edge_percentile": edge_percentile,
        "leading_edge_lat": edges["leading"],
        "trailing_edge_lat": edges["trailing"],
        "leading_edge_shift_km": edge_shift["leading"],
        "trailing_edge_shift_km": edge_shift["trailing"],
        "elevation_shift_m": None,
        "crs": None if crs is None else crs.to_string(),
    }
    if elevation_given:
        mean = {k: (s[0] / s[1] if s[1] > 0 else float("nan")) for k, s in elev_sums.items()}
        summary["mean_elevation_m"] = mean
        summary["elevation_shift_m"] = mean["future"] - mean["now"]
    return json_ready(summary)


# --------------------------------------------------------------------------- window by window

class WindowedChange:
    """Range change of a grid too large for memory, window by window: classes and the summary.

    The same measures as :func:`classify_range_change` and :func:`summarise_change`, in
    memory bounded by a window: class areas, counts, n-vector and elevation sums add up
    window by window; the edge percentiles come from per-row latitude weights (geographic
    grids: latitude is constant along a row, so this is exact) or, on projected grids, from
    a latitude histogram followed by a second look at the few windows holding the bin each
    percentile falls in (exact as well: the result is the same cell centre). Windows never
    measured are nodata (a sparse file's missing blocks).

    Use (a pipeline reads the windows): for each window ``part = measure(ys, xs, now,
    future, mess, elevation)`` (pure, may run in threads) then ``add(part)`` in window
    order; on projected grids, for each ``(ys, xs)`` of :meth:`refinement_windows`,
    ``refine(ys, xs, classes)`` with the classes measured again; then :meth:`summary`.

    Parameters
    ----------
    grid : DataArray (y, x)
        The grid (its coordinates, CRS and transform; its values are never read).
    threshold : float in [0, 1]
    mess_given, elevation_given : bool
    edge_percentile : float, default=95
    """

    def __init__(self, grid: xr.DataArray, threshold: float, *, mess_given: bool, elevation_given: bool,
                 edge_percentile: float = 95.0):
        self.threshold = check_threshold(threshold)
        self.edge_percentile = _check_edge_percentile(edge_percentile)
        self.mess_given, self.elevation_given = bool(mess_given), bool(elevation_given)
        self.crs = _crs_of(grid)
        self.geographic = True if self.crs is None else bool(self.crs.is_geographic)
        self._wkt = None if self.crs is None else self.crs.to_wkt()
        self.shape = (grid.sizes["y"], grid.sizes["x"])
        self.x = np.asarray(grid["x"].values, dtype=np.float64)
        self.y = np.asarray(grid["y"].values, dtype=np.float64)
        self._transform = grid.rio.transform(recalc=True)
        # coordinates only: a zero-strided array holds the grid's shape without its values
        self._template = xr.DataArray(np.broadcast_to(np.uint8(0), self.shape), dims=("y", "x"),
                                      coords={"y": self.y, "x": self.x})
        self._totals = np.zeros(2 * _N + 12)
        if self.geographic:
            self._row_weights = np.zeros((2, self.shape[0]))
        else:
            self._hist = np.zeros((2, LATITUDE_BINS))
            self._bin_ranges = []       # (ys, xs, [(lo, hi) per range or None])
            self._targets = None        # {(k, q): (bin, weight below, total)}
            self._in_bin = {}           # {(k, q): ([values], [weights])}

    def window_areas(self, ys: slice, xs: slice) -> np.ndarray:
        """True cell areas (km²) of one window, equal to those of the whole grid's
        :func:`envelope.grids.cell_area_km2`: the window is widened by a cell on each side so
        that its cell edges are the same mid-points between centres."""
        from affine import Affine

        from envelope.grids import cell_area_km2

        ny, nx = self.shape
        y0, y1 = max(ys.start - 1, 0), min(ys.stop + 1, ny)
        x0, x1 = max(xs.start - 1, 0), min(xs.stop + 1, nx)
        ref = self._template.isel(y=slice(y0, y1), x=slice(x0, x1))
        if self.crs is not None:
            ref = ref.rio.write_crs(self.crs)
        ref = ref.rio.write_transform(self._transform * Affine.translation(x0, y0))
        area = np.asarray(cell_area_km2(ref).values, dtype=np.float64)
        return area[ys.start - y0:ys.stop - y0, xs.start - x0:xs.stop - x0]

    def measure(self, ys: slice, xs: slice, now, future, mess=None, elevation=None):
        """Classes of one window (uint8) and its partial sums; touches no shared state."""
        classes = classify_change(now, future, self.threshold, mess)
        parts, latitudes = _block_stats(classes, self.window_areas(ys, xs), elevation, self.x[xs], self.y[ys],
                                        self._wkt, self.geographic)
        if self.geographic:
            return classes, (ys, xs, parts, [w for _, w in latitudes])
        binned = []
        for lat, weight in latitudes:
            keep = np.isfinite(lat) & np.isfinite(weight) & (weight > 0)
            if not keep.any():
                binned.append(None)
                continue
            index = latitude_bin(lat[keep])
            lo, hi = int(index.min()), int(index.max())
            binned.append((lo, np.bincount(index - lo, weights=weight[keep], minlength=hi - lo + 1)))
        return classes, (ys, xs, parts, binned)

    def add(self, part) -> None:
        """Add one window's partial sums (from :meth:`measure`), in window order."""
        ys, xs, parts, lat_parts = part
        self._totals += parts
        if self.geographic:
            for k in (0, 1):
                self._row_weights[k, ys] += lat_parts[k]
            return
        ranges = []
        for k, binned in enumerate(lat_parts):
            if binned is None:
                ranges.append(None)
                continue
            lo, counts = binned
            self._hist[k, lo:lo + counts.size] += counts
            ranges.append((lo, lo + counts.size - 1))
        if any(r is not None for r in ranges):
            self._bin_ranges.append((ys, xs, ranges))

    def refinement_windows(self) -> list:
        """Windows (ys, xs) to measure again for the exact edge percentiles (projected grids)."""
        if self.geographic:
            return []
        sign = _poleward_sign(self._totals)
        q_lead = self.edge_percentile / 100.0
        self._targets = {}
        for k in (0, 1):
            for q in (q_lead, 1.0 - q_lead):
                found = quantile_bin(self._hist[k], q, reverse=sign < 0)
                if found is not None:
                    self._targets[(k, q)] = found
                    self._in_bin[(k, q)] = ([], [])
        wanted = []
        for ys, xs, ranges in self._bin_ranges:
            if any(ranges[k] is not None and ranges[k][0] <= b <= ranges[k][1]
                   for (k, _), (b, _, _) in self._targets.items()):
                wanted.append((ys, xs))
        return wanted

    def refine(self, ys: slice, xs: slice, classes) -> None:
        """Keep the cells of one window that fall in a percentile's latitude bin."""
        _, latitudes = _block_stats(classes, self.window_areas(ys, xs), None, self.x[xs], self.y[ys], self._wkt,
                                    self.geographic)
        for (k, q), (b, _, _) in self._targets.items():
            lat, weight = latitudes[k]
            keep = np.isfinite(lat) & np.isfinite(weight) & (weight > 0)
            lat, weight = lat[keep], weight[keep]
            inside = latitude_bin(lat) == b
            self._in_bin[(k, q)][0].append(lat[inside])
            self._in_bin[(k, q)][1].append(weight[inside])

    def summary(self) -> dict:
        """The summary dict of :func:`summarise_change` (after every window is added and,
        on projected grids, refined)."""
        if self.geographic:
            def quantile(k, sign, q):
                return sign * weighted_quantile(sign * self.y, self._row_weights[k], q)
        else:
            if self._targets is None:
                raise RuntimeError("WindowedChange.summary: refinement_windows() and refine() come first")

            def quantile(k, sign, q):
                if (k, q) not in self._targets:
                    return float("nan")
                _, below, total = self._targets[(k, q)]
                values, weights = (np.concatenate(v) if v else np.empty(0) for v in self._in_bin[(k, q)])
                return sign * quantile_in_bin(sign * values, weights, below, total, q)

        return _summary_from(self._totals, self.shape[0] * self.shape[1], quantile, threshold=self.threshold,
                             crs=self.crs, mess_given=self.mess_given, edge_percentile=self.edge_percentile,
                             elevation_given=self.elevation_given)


# --------------------------------------------------------------------------- table

def _flatten(mapping, prefix=""):
    flat = {}
    for key, value in mapping.items():
        if key == "classes":  # the legend, identical in every row
            continue
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            flat.update(_flatten(value, name + "."))
        else:
            flat[name] = value
    return flat


def change_table(summaries: list[dict], labels: list[dict]):
    """One row per scenario: its labels (name, pathway, climate_model, horizon) then flattened summary keys.

    Nested keys are joined with a dot (``area_km2.gained``, ``range_km2.now``); the class
    legend is left out. Missing values (None) become NaN.
    """
    import pandas as pd

    if len(summaries) != len(labels):
        raise InputError(f"change table: {len(summaries)} summaries but {len(labels)} label rows; expected one each")
    records = []
    for i, (summary, label) in enumerate(zip(summaries, labels)):
        missing = [c for c in LABEL_COLUMNS if c not in label]
        if missing:
            raise InputError(f"change table: label row {i} has no {missing[0]!r}; expected {', '.join(LABEL_COLUMNS)}")
        records.append({**{c: label[c] for c in LABEL_COLUMNS}, **_flatten(summary)})
    return pd.DataFrame.from_records(records)
