"""Range change between two suitability maps: classes, true areas, centroid, edge and elevation shifts."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

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
    class_sums,
    classify_change,
    meridian_arc_km,
    normal_vector_sums,
    position_from_vector,
    weighted_quantile,
)

__all__ = [
    "CHANGE_CLASSES",
    "CHANGE_NODATA",
    "classify_range_change",
    "summarise_change",
    "resolve_threshold",
    "range_change",
    "range_change_batch",
    "change_table",
    "write_change_table",
    "SCENARIO_COLUMNS",
]

NOW_CODES = (1, 2)          # lost, stable: the current range
FUTURE_CODES = (2, 3, 4)    # stable, gained, gained_novel: the future range
SCENARIO_COLUMNS = ("name", "pathway", "climate_model", "horizon", "path")
LABEL_COLUMNS = ("name", "pathway", "climate_model", "horizon")
_N = len(CHANGE_CLASSES)


# --------------------------------------------------------------------------- classes

def classify_range_change(now: xr.DataArray, future: xr.DataArray, threshold: float, *,
                          mess: xr.DataArray | None = None) -> xr.DataArray:
    """Range-change classes (uint8, codes in ``CHANGE_CLASSES``, 255 nodata) of two suitability maps.

    Lazy when the inputs are dask-backed: the kernel :func:`envelope.kernels.change.classify_change`
    runs chunk by chunk. The grids must already match (``envelope.grids.check_same_grid``).

    Parameters
    ----------
    now, future : DataArray (y, x), suitability 0-1, NaN for nodata
    threshold : float in [0, 1]; suitable means ``suitability >= threshold``
    mess : DataArray (y, x), optional; gained cells with MESS < 0 become ``gained_novel``

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
    import pyproj

    edge_percentile = float(edge_percentile)
    if not 50.0 < edge_percentile < 100.0:
        raise InputError(f"edge percentile: found {edge_percentile!r}; expected a number between 50 and 100 (exclusive)")
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

    sums = totals[:2 * _N].reshape(2, _N)
    vec = {"now": totals[2 * _N:2 * _N + 4], "future": totals[2 * _N + 6:2 * _N + 10]}
    elev_sums = {"now": totals[2 * _N + 4:2 * _N + 6], "future": totals[2 * _N + 10:2 * _N + 12]}
    names = list(CHANGE_CLASSES.values())
    area_by = dict(zip(names, (float(v) for v in sums[0])))
    count_by = dict(zip(names, (int(round(v)) for v in sums[1])))
    n_total = int(classes.size)
    n_valid = sum(count_by.values())

    range_now = area_by["lost"] + area_by["stable"]
    range_future = area_by["stable"] + area_by["gained"] + area_by["gained_novel"]
    centroid = {k: position_from_vector(vec[k]) for k in ("now", "future")}

    geod = pyproj.Geod(ellps="WGS84")
    shift_km = bearing = float("nan")
    if all(np.isfinite(centroid["now"] + centroid["future"])):
        az12, _, dist = geod.inv(*centroid["now"], *centroid["future"])
        shift_km = dist / 1000.0
        # a zero shift has no direction
        bearing = float(az12 % 360.0) if dist > 0 else float("nan")

    # Poleward is north when the current range's centroid is in the northern hemisphere.
    north = not (np.isfinite(centroid["now"][1]) and centroid["now"][1] < 0)
    sign = 1.0 if north else -1.0
    q_lead, q_trail = edge_percentile / 100.0, 1.0 - edge_percentile / 100.0
    edges = {"leading": {}, "trailing": {}}
    for k, key in enumerate(("now", "future")):
        poleward_lat = sign * lat_now[k]
        edges["leading"][key] = sign * weighted_quantile(poleward_lat, lat_w[k], q_lead)
        edges["trailing"][key] = sign * weighted_quantile(poleward_lat, lat_w[k], q_trail)
    edge_shift = {}
    for side in ("leading", "trailing"):
        a, b = edges[side]["now"], edges[side]["future"]
        edge_shift[side] = sign * meridian_arc_km(a, b) if np.isfinite(a) and np.isfinite(b) else float("nan")

    summary = {
        "threshold": classes.attrs.get("threshold"),
        "threshold_state": ">=",
        "classes": {str(code): name for code, name in CHANGE_CLASSES.items()},
        "nodata": CHANGE_NODATA,
        "n_cells": {**count_by, "nodata": n_total - n_valid, "total": n_total},
        "area_km2": {**area_by, "gained_novel": area_by["gained_novel"] if mess_given else None,
                     "gained_total": area_by["gained"] + area_by["gained_novel"]},
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
    if elevation is not None:
        mean = {k: (s[0] / s[1] if s[1] > 0 else float("nan")) for k, s in elev_sums.items()}
        summary["mean_elevation_m"] = mean
        summary["elevation_shift_m"] = mean["future"] - mean["now"]
    return json_ready(summary)



# --------------------------------------------------------------------------- threshold

def _tag_threshold(tags: dict, name: str):
    raw = tags.get("threshold")
    if raw is None:
        return None, None
    if isinstance(raw, str):
        try:
            raw = json.loads(raw)
        except json.JSONDecodeError:
            raise InputError(f"{name}: tag 'threshold' holds {raw!r}; expected a number between 0 and 1") from None
    value = check_threshold(raw, source=f"{name}: tag 'threshold'")
    return value, tags.get("threshold_rule")


def resolve_threshold(now_tags: dict, future_tags: dict, threshold=None, *, now_name="NOW", future_name="FUTURE"):
    """The suitability threshold and its rule: ``threshold`` if given, else the rasters' tags.

    Returns ``(threshold, rule)``. A given threshold wins (rule "given"). Otherwise the
    ``threshold`` tag (a JSON number) of NOW, or of FUTURE if only it has one; NOW and FUTURE
    holding different thresholds is an error, as is neither holding one.
    """
    if threshold is not None:
        return check_threshold(threshold, source="--threshold"), "given"
    now_value, now_rule = _tag_threshold(now_tags, now_name)
    future_value, future_rule = _tag_threshold(future_tags, future_name)
    if now_value is None and future_value is None:
        raise InputError(f"{now_name} has no 'threshold' tag; pass --threshold")
    if now_value is not None and future_value is not None and not math.isclose(now_value, future_value,
                                                                                rel_tol=0, abs_tol=1e-12):
        raise InputError(f"{now_name} has threshold {now_value!r} but {future_name} has {future_value!r}; "
                         "pass --threshold to choose one")
    if now_value is not None:
        return now_value, now_rule
    return future_value, future_rule


# --------------------------------------------------------------------------- files

def _open(path, *, what, band=None):
    from envelope.io.rasters import open_layer

    if not Path(path).exists():
        raise InputError(f"{path}: {what} file not found")
    return open_layer(path, band=band)


def _prepare(now_path, now, future_path, threshold, mess_path, elevation_path, elevation):
    """Open and check one future map (and its MESS) against NOW; return classes and threshold."""
    from envelope.grids import check_same_grid
    from envelope.io.rasters import read_tags

    future = _open(future_path, what="future suitability")
    check_same_grid(now, future, ref_name=str(now_path), other_name=str(future_path))
    value, rule = resolve_threshold(read_tags(now_path), read_tags(future_path), threshold,
                                    now_name=str(now_path), future_name=str(future_path))
    mess = None
    if mess_path is not None:
        # `envelope project --mess` writes two bands: the MESS value and the most dissimilar variable
        mess = _open(mess_path, what="MESS", band=1)
        check_same_grid(now, mess, ref_name=str(now_path), other_name=str(mess_path))
    classes = classify_range_change(now, future, value, mess=mess)
    classes.attrs["mess"] = mess is not None
    return classes, value, rule


def _open_elevation(now, now_path, elevation_path):
    if elevation_path is None:
        return None
    from envelope.grids import check_same_grid

    elevation = _open(elevation_path, what="elevation")
    check_same_grid(now, elevation, ref_name=str(now_path), other_name=str(elevation_path))
    return elevation


def _write_pair(classes, summary, raster_tmp, summary_tmp):
    from envelope.io.writing import write_raster

    tags = {"threshold": summary["threshold"], "threshold_state": ">=", "content": "range change classes"}
    if summary.get("threshold_rule") is not None:
        tags["threshold_rule"] = summary["threshold_rule"]
    write_raster(classes, raster_tmp, overwrite=True, tags=tags, categories=dict(CHANGE_CLASSES),
                 nodata=CHANGE_NODATA)
    Path(summary_tmp).write_text(json.dumps(summary, indent=2, allow_nan=False) + "\n")


def range_change(now, future, out, summary, *, threshold=None, mess=None, elevation=None,
                 edge_percentile: float = 95.0, overwrite: bool = False) -> dict:
    """Classify range change between suitability rasters ``now`` and ``future``; write map and summary.

    Writes the class raster ``out`` (uint8, categories in its tags) and the JSON ``summary``
    together, atomically: after an error neither is written. Returns the summary dict.
    See :func:`summarise_change` for the measures and docs/change.md for their definitions.
    """
    from envelope.io.atomic import atomic_outputs, check_writable

    for path in (out, summary):
        check_writable(path, overwrite)
    if Path(out).resolve() == Path(summary).resolve():
        raise InputError(f"{out}: the change map and the summary must be different files")
    now_da = _open(now, what="current suitability")
    elevation_da = _open_elevation(now_da, now, elevation)
    classes, value, rule = _prepare(now, now_da, future, threshold, mess, elevation, elevation_da)
    result = summarise_change(classes, elevation=elevation_da, edge_percentile=edge_percentile)
    result["threshold_rule"] = rule
    result["inputs"] = {"now": str(now), "future": str(future), "mess": None if mess is None else str(mess),
                        "elevation": None if elevation is None else str(elevation)}
    with atomic_outputs([out, summary], overwrite) as (raster_tmp, summary_tmp):
        _write_pair(classes, result, raster_tmp, summary_tmp)
    return result


def _read_scenarios(path):
    import pandas as pd

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: scenario table not found")
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not a readable CSV table ({' '.join(str(exc).split())})") from None
    missing = [c for c in SCENARIO_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(f"{path}: column {missing[0]!r} is missing (found {', '.join(table.columns) or 'none'}; "
                         f"expected {', '.join(SCENARIO_COLUMNS)} and optionally mess_path)")
    if table.empty:
        raise InputError(f"{path}: the scenario table has no rows")
    for i, name in enumerate(table["name"], start=2):
        if not name or any(ch in name for ch in "/\\") or name in (".", ".."):
            raise InputError(f"{path}: row {i} column 'name' is {name!r}; expected a non-empty name usable as a file name")
    duplicated = table["name"][table["name"].duplicated()]
    if not duplicated.empty:
        raise InputError(f"{path}: column 'name' repeats {duplicated.iloc[0]!r}; names must be unique")
    base = path.parent

    def resolve(value):
        p = Path(value)
        return p if p.is_absolute() else base / p

    rows = []
    for i, row in enumerate(table.to_dict("records"), start=2):
        future = resolve(row["path"])
        if not row["path"] or not future.is_file():
            raise InputError(f"{path}: row {i} column 'path' names {row['path']!r}, which is not a file")
        mess = row.get("mess_path") or None
        if mess is not None:
            mess = resolve(mess)
            if not mess.is_file():
                raise InputError(f"{path}: row {i} column 'mess_path' names {row['mess_path']!r}, which is not a file")
        rows.append({**{c: row[c] for c in LABEL_COLUMNS}, "path": future, "mess_path": mess})
    return rows


def range_change_batch(now, scenarios, out_dir, table, *, threshold=None, elevation=None,
                       edge_percentile: float = 95.0, overwrite: bool = False):
    """Range change of ``now`` against every future map listed in the CSV ``scenarios``.

    ``scenarios`` has columns name, pathway, climate_model, horizon, path (future suitability
    raster) and optionally mess_path; relative paths are read from the table's folder. For
    each row ``out_dir/<name>.tif`` and ``out_dir/<name>.json`` are written, and the combined
    table (one row per scenario, see :func:`change_table`) goes to ``table``. Every input is
    checked before anything is written, and all outputs appear together or not at all.
    Returns the combined table (pandas.DataFrame).
    """
    from envelope.io.atomic import atomic_outputs, check_writable

    rows = _read_scenarios(scenarios)
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"{out_dir}: exists and is not a folder")
    if not out_dir.exists() and not out_dir.absolute().parent.is_dir():
        raise InputError(f"{out_dir}: its parent folder does not exist")
    outputs = []
    for row in rows:
        outputs += [out_dir / f"{row['name']}.tif", out_dir / f"{row['name']}.json"]
    if out_dir.is_dir():
        for p in outputs:
            check_writable(p, overwrite)
    check_writable(table, overwrite)

    now_da = _open(now, what="current suitability")
    elevation_da = _open_elevation(now_da, now, elevation)
    prepared = []
    for row in rows:  # check every scenario before the first byte is written
        classes, value, rule = _prepare(now, now_da, row["path"], threshold, row["mess_path"], elevation, elevation_da)
        prepared.append((classes, value, rule))
    summaries = []
    for row, (classes, value, rule) in zip(rows, prepared):
        result = summarise_change(classes, elevation=elevation_da, edge_percentile=edge_percentile)
        result["threshold_rule"] = rule
        result["inputs"] = {"now": str(now), "future": str(row["path"]),
                            "mess": None if row["mess_path"] is None else str(row["mess_path"]),
                            "elevation": None if elevation is None else str(elevation)}
        summaries.append(result)
    frame = change_table(summaries, [{c: row[c] for c in LABEL_COLUMNS} for row in rows])
    out_dir.mkdir(exist_ok=True)
    with atomic_outputs(outputs + [table], overwrite) as tmps:
        for k, (classes, _, _) in enumerate(prepared):
            _write_pair(classes, summaries[k], tmps[2 * k], tmps[2 * k + 1])
        frame.to_csv(tmps[-1], index=False)
    return frame


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


def write_change_table(df, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write the change table ``df`` as CSV to ``path`` atomically (refuses to replace without ``overwrite``)."""
    from envelope.io.atomic import atomic_output

    with atomic_output(path, overwrite) as tmp:
        df.to_csv(tmp, index=False)
    return Path(path)
