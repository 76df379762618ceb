"""The change pipeline: suitability rasters in, range-change class rasters, JSON summaries and a change table out."""

from __future__ import annotations

import os
from pathlib import Path

from envelope.change import (CHANGE_CLASSES, CHANGE_NODATA, LABEL_COLUMNS, WindowedChange, change_table,
                             check_suitability_values, classify_range_change, summarise_change)
from envelope.errors import InputError
from envelope.grids import check_same_grid
from envelope.io.atomic import atomic_output, atomic_outputs, check_distinct, check_out_dir, check_writable
from envelope.io.rasters import open_layer, raster_format, read_tags
from envelope.io.tables import read_scenarios
from envelope.io.writing import RasterOutput, write_rasters
from envelope.pipelines.inputs import resolve_threshold
from envelope.provenance import json_text

__all__ = ["WINDOWED_CELLS", "range_change", "range_change_batch", "write_change_table", "write_class_polygons"]

#: Above this many cells, GeoTIFF inputs are measured window by window over the blocks the
#: files store (:class:`envelope.change.WindowedChange`), in memory bounded by a batch of
#: windows, and the class raster is written sparse: a 200,000 x 200,000 grid with a few
#: populated tiles is handled from its block index and those tiles (bench/bench_change_sparse.py).
WINDOWED_CELLS = 2**26

#: Windows measured at once (in dask's threads) between two updates of the sums and the file.
WINDOW_BATCH = 16


def _open(path, *, what, band=None):
    if not Path(path).exists():
        raise InputError(f"{path}: {what} file not found")
    return open_layer(path, band=band)


def _prepare(now_path, now, future_path, threshold, mess_path, elevation_path, elevation, check_values=True):
    """Open and check one future map (and its MESS) against NOW; return classes and threshold.

    ``check_values``: check the map's values are 0..1 here (a windowed run checks each window)."""
    future = _open(future_path, what="future suitability")
    future = check_same_grid(now, future, ref_name=str(now_path), other_name=str(future_path))
    if check_values:
        check_suitability_values(future, str(future_path))
    value, rule = resolve_threshold({str(now_path): read_tags(now_path), str(future_path): read_tags(future_path)},
                                    threshold)
    mess = None
    if mess_path is not None:
        # `envelope project --mess` writes two bands: the MESS value and the most dissimilar variable
        mess = _open(mess_path, what="MESS", band=1)
        check_is_mess(mess_path, mess)
        mess = check_same_grid(now, mess, ref_name=str(now_path), other_name=str(mess_path))
    classes = classify_range_change(now, future, value, mess=mess)
    classes.attrs["mess"] = mess is not None
    return classes, value, rule


def check_is_mess(path, layer) -> None:
    """Refuse a raster that is not a MESS surface (a suitability map given as --mess, say).

    `envelope project --mess` names its first band ``mess`` and tags the file with
    ``most_dissimilar_variables``; a raster from elsewhere needs a first band named ``mess``.
    """
    tags = read_tags(path)
    if "most_dissimilar_variables" in tags or str(layer.name).lower() == "mess":
        return
    seen = "a suitability raster (it has a 'threshold' tag)" if "threshold" in tags else f"band 1 is {layer.name!r}"
    raise InputError(f"--mess {path}: not a MESS raster ({seen}); expected the MESS file of `envelope project "
                     "--mess` (first band 'mess', tag 'most_dissimilar_variables')")


def _open_elevation(now, now_path, elevation_path):
    if elevation_path is None:
        return None
    elevation = _open(elevation_path, what="elevation")
    return check_same_grid(now, elevation, ref_name=str(now_path), other_name=str(elevation_path))


def _class_tags(threshold, rule) -> dict:
    tags = {"threshold": threshold, "threshold_state": ">=", "content": "range change classes"}
    if rule is not None:
        tags["threshold_rule"] = rule
    return tags


def _write_pair(classes, summary, raster_tmp, summary_tmp, progress=None):
    step = None if progress is None else (lambda done, total: progress(done, total, "writing the change map"))
    write_rasters([RasterOutput(classes, raster_tmp, _class_tags(summary["threshold"], summary.get("threshold_rule")),
                                dict(CHANGE_CLASSES), CHANGE_NODATA)], overwrite=True, progress=step)
    Path(summary_tmp).write_text(json_text(summary) + "\n")


def _windowed(now_da, *paths) -> bool:
    """Whether to measure window by window: a grid above WINDOWED_CELLS, every file a GeoTIFF."""
    n_cells = now_da.sizes["y"] * now_da.sizes["x"]
    return n_cells > WINDOWED_CELLS and all(raster_format(Path(p)) != "NetCDF" for p in paths if p is not None)


def _windows_with_data(now_path, future_path) -> list:
    """(ys, xs) of the blocks of NOW that the files store and that meet a stored block of
    FUTURE: everywhere else either map is nodata, so every class is nodata too."""
    import numpy as np

    from envelope.io.blocks import stored_block_mask

    now_mask, (bh, bw), (height, width) = stored_block_mask(now_path)
    future_mask, (fh, fw), _ = stored_block_mask(future_path)
    windows = []
    for row, col in zip(*np.nonzero(now_mask)):
        ys = slice(int(row) * bh, min((int(row) + 1) * bh, height))
        xs = slice(int(col) * bw, min((int(col) + 1) * bw, width))
        if future_mask[ys.start // fh:(ys.stop - 1) // fh + 1, xs.start // fw:(xs.stop - 1) // fw + 1].any():
            windows.append((ys, xs))
    return windows


def _range_change_windowed(now, now_da, future, mess, elevation, value, rule, *, edge_percentile, raster_tmp,
                           progress=None) -> dict:
    """Classes and summary of one future map, window by window over the stored blocks; the
    class raster written to ``raster_tmp`` as it goes (sparse: nodata windows are not stored)."""
    import dask

    from envelope.io.blocks import band_reader
    from envelope.io.writing import windowed_raster

    report = progress or (lambda done, total, what: None)
    readers = [band_reader(p) if p is not None else None for p in (now, future, mess, elevation)]
    measure = WindowedChange(now_da, value, mess_given=mess is not None, elevation_given=elevation is not None,
                             edge_percentile=edge_percentile)

    def window(ys, xs):
        blocks = [None if r is None else r[0:1, ys, xs][0] for r in readers]
        for path, block in ((now, blocks[0]), (future, blocks[1])):
            check_suitability_values(block, str(path), require_valid=False)
        return measure.measure(ys, xs, *blocks)

    windows = _windows_with_data(now, future)
    with windowed_raster(raster_tmp, now_da, dtype="uint8", nodata=CHANGE_NODATA, name="change", overwrite=True,
                         tags=_class_tags(value, rule), categories=dict(CHANGE_CLASSES)) as out:
        report(0, len(windows), f"change {Path(future).name}")
        for start in range(0, len(windows), WINDOW_BATCH):
            batch = windows[start:start + WINDOW_BATCH]
            results = dask.compute(*[dask.delayed(window)(ys, xs) for ys, xs in batch], scheduler="threads")
            for (ys, xs), (classes, part) in zip(batch, results):
                measure.add(part)
                if (classes != CHANGE_NODATA).any():
                    out.write(ys, xs, classes)
            report(start + len(batch), len(windows), f"change {Path(future).name}")
        for ys, xs in measure.refinement_windows():   # projected grids: the edge percentiles' bins
            measure.refine(ys, xs, window(ys, xs)[0])
        report(len(windows), len(windows), "writing the change map (overviews)")
    return measure.summary()


def range_change(now, future, out, summary, *, threshold=None, mess=None, elevation=None,
                 edge_percentile: float = 95.0, overwrite: bool = False, polygons=None, windowed=None,
                 progress=None) -> dict:
    """Classify range change between suitability rasters ``now`` and ``future``; write map and summary.

    Writes the class raster ``out`` (uint8, categories in its tags) and the JSON ``summary``
    together, atomically: after an error neither is written. With ``polygons`` (.gpkg or
    .geojson) also one dissolved polygon per class (:func:`write_class_polygons`). Returns
    the summary dict. See :func:`summarise_change` for the measures and docs/change.md for
    their definitions.

    ``windowed`` (default: grids above :data:`WINDOWED_CELLS` cells, GeoTIFF inputs) measures
    the maps window by window over the blocks the files store and writes a sparse class
    raster, in bounded memory (:class:`envelope.change.WindowedChange`); the numbers are
    those of the whole-grid computation. ``progress(done, total, what)`` is called as
    windows (or write tasks) finish.
    """
    for path in (out, summary) + ((polygons,) if polygons else ()):
        check_writable(path, overwrite)
    if Path(out).resolve() == Path(summary).resolve():
        raise InputError(f"{out}: the change map and the summary must be different files")
    now_da = _open(now, what="current suitability")
    if windowed is None:
        windowed = _windowed(now_da, now, future, mess, elevation)
    if not windowed:
        check_suitability_values(now_da, str(now))
    elevation_da = _open_elevation(now_da, now, elevation)
    classes, value, rule = _prepare(now, now_da, future, threshold, mess, elevation, elevation_da,
                                    check_values=not windowed)
    inputs = {"now": str(now), "future": str(future), "mess": None if mess is None else str(mess),
              "elevation": None if elevation is None else str(elevation)}
    if windowed:
        if polygons:
            raise InputError(f"--polygons {polygons}: a grid of {now_da.sizes['y']} x {now_da.sizes['x']} cells is "
                             "measured window by window and cannot be dissolved into polygons in memory; expected "
                             "no --polygons (polygonise the class raster by parts in a GIS)")
        with atomic_outputs([out, summary], overwrite) as (raster_tmp, summary_tmp):
            result = _range_change_windowed(now, now_da, future, mess, elevation, value, rule,
                                            edge_percentile=edge_percentile, raster_tmp=raster_tmp, progress=progress)
            result["threshold_rule"] = rule
            result["inputs"] = inputs
            Path(summary_tmp).write_text(json_text(result) + "\n")
        return result
    result = summarise_change(classes, elevation=elevation_da, edge_percentile=edge_percentile)
    result["threshold_rule"] = rule
    result["inputs"] = inputs
    with atomic_outputs([out, summary], overwrite) as (raster_tmp, summary_tmp):
        _write_pair(classes, result, raster_tmp, summary_tmp, progress)
        if polygons:
            result["polygons"] = str(write_class_polygons(classes, CHANGE_CLASSES, CHANGE_NODATA, polygons,
                                                          overwrite=overwrite))
    return result


def write_class_polygons(classes, categories, nodata, path, *, overwrite=False, layer=None):
    """One dissolved (multi)polygon per class of ``classes`` with fields class, name, area_km2 (true area).

    In the grid's CRS; ``.gpkg`` or ``.geojson`` by the suffix of ``path``; the layer is
    named ``layer`` (default: the file's stem).
    """
    from envelope.grids import grid_crs
    from envelope.io.vectors import write_polygons
    from envelope.polygons import class_polygons

    features = class_polygons(classes, categories, nodata=nodata)
    return write_polygons(features, path, grid_crs(classes), overwrite=overwrite, layer=layer)


def range_change_batch(now, scenarios, out_dir, table, *, threshold=None, elevation=None,
                       edge_percentile: float = 95.0, overwrite: bool = False, windowed=None, progress=None):
    """Range change of ``now`` against every future map listed in the CSV ``scenarios``.

    ``scenarios`` has columns name, pathway, climate_model, horizon, path (future suitability
    raster) and optionally mess_path; relative paths are read from the table's folder. For
    each row ``out_dir/<name>.tif`` and ``out_dir/<name>.json`` are written, and the combined
    table (one row per scenario, see :func:`change_table`) goes to ``table``. Every input is
    checked before anything is written, and all outputs appear together or not at all.
    Returns the combined table (pandas.DataFrame). ``windowed`` and ``progress`` as in
    :func:`range_change`.
    """
    rows = read_scenarios(scenarios, what="future suitability raster")
    out_dir = check_out_dir(out_dir)
    outputs = []
    for row in rows:
        outputs += [out_dir / f"{row.name}.tif", out_dir / f"{row.name}.json"]
    check_distinct({**{f"--out-dir file {p.name}": p for p in outputs}, "--table": table},
                   {"--now": now, "--scenarios": scenarios, "--elevation": elevation,
                    "a future map": [row.path for row in rows],
                    "a MESS map": [row.mess_path for row in rows if row.mess_path is not None]})
    if out_dir.is_dir():
        for p in outputs:
            check_writable(p, overwrite)
    check_writable(table, overwrite)

    now_da = _open(now, what="current suitability")
    if windowed is None:
        windowed = _windowed(now_da, now, elevation, *[p for row in rows for p in (row.path, row.mess_path)])
    if not windowed:
        check_suitability_values(now_da, str(now))
    elevation_da = _open_elevation(now_da, now, elevation)
    prepared = []
    for row in rows:  # check every scenario before the first byte is written
        classes, value, rule = _prepare(now, now_da, row.path, threshold, row.mess_path, elevation, elevation_da,
                                        check_values=not windowed)
        prepared.append((classes, value, rule))
    labels = [{c: getattr(row, c) for c in LABEL_COLUMNS} for row in rows]

    def inputs(row):
        return {"now": str(now), "future": str(row.path), "mess": None if row.mess_path is None else str(row.mess_path),
                "elevation": None if elevation is None else str(elevation)}

    if windowed:
        out_dir.mkdir(parents=True, exist_ok=True)
        with atomic_outputs(outputs + [table], overwrite) as tmps:
            summaries = []
            for k, (row, (_, value, rule)) in enumerate(zip(rows, prepared)):
                result = _range_change_windowed(now, now_da, row.path, row.mess_path, elevation, value, rule,
                                                edge_percentile=edge_percentile, raster_tmp=tmps[2 * k],
                                                progress=progress)
                result["threshold_rule"] = rule
                result["inputs"] = inputs(row)
                Path(tmps[2 * k + 1]).write_text(json_text(result) + "\n")
                summaries.append(result)
            frame = change_table(summaries, labels)
            frame.to_csv(tmps[-1], index=False)
        return frame
    summaries = []
    for row, (classes, value, rule) in zip(rows, prepared):
        result = summarise_change(classes, elevation=elevation_da, edge_percentile=edge_percentile)
        result["threshold_rule"] = rule
        result["inputs"] = inputs(row)
        summaries.append(result)
    frame = change_table(summaries, labels)
    out_dir.mkdir(parents=True, exist_ok=True)
    with atomic_outputs(outputs + [table], overwrite) as tmps:
        for k, (classes, _, _) in enumerate(prepared):
            _write_pair(classes, summaries[k], tmps[2 * k], tmps[2 * k + 1], progress)
        frame.to_csv(tmps[-1], index=False)
    return frame


def write_change_table(df, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write the change table ``df`` as CSV to ``path`` atomically (refuses to replace without ``overwrite``)."""
    with atomic_output(path, overwrite) as tmp:
        df.to_csv(tmp, index=False)
    return Path(path)
