"""The fragmentation pipeline: a habitat raster in, habitat amount and effective mesh size by latitude band out."""

from __future__ import annotations

import math

import numpy as np

from envelope.errors import InputError
from envelope.habitat import fragmentation_by_latitude, fragmentation_summary
from envelope.io.atomic import atomic_outputs, check_distinct, check_writable
from envelope.io.rasters import open_layer
from envelope.pipelines.inputs import load_habitat
from envelope.provenance import json_text

__all__ = ["fragmentation_files"]


def fragmentation_files(habitat, out, *, summary=None, grid=None, classes=None, align_habitat=False,
                        habitat_threshold=0.5, band_deg=1.0, connectivity=4, overwrite=False):
    """Tabulate habitat by latitude band (CSV ``out``, optional JSON ``summary``); returns (table, summary dict).

    With ``grid`` the habitat is brought onto that grid and its cells with data are the
    land; without it the habitat raster's own cells with data are.
    """
    check_distinct({"--out": out, "--summary": summary}, {"--habitat": habitat, "--classes": classes, "--grid": grid})
    for p in (out, summary):
        if p:
            check_writable(p, overwrite)
    if not (0 < habitat_threshold <= 1):
        raise InputError(f"--habitat-threshold must lie in (0, 1], got {habitat_threshold:g}")
    if not (0 < band_deg <= 180 and math.isfinite(band_deg)):
        raise InputError(f"--band-deg must be a width in degrees in (0, 180], got {band_deg:g}")
    if grid:
        ref = open_layer(grid, band=1)
        land = ref.notnull().astype(np.float32)
        hab = load_habitat(habitat, ref, classes=classes, align=align_habitat)
        land_name = f"cells of --grid {grid} with data"
    else:
        hab = load_habitat(habitat, habitat, classes=classes, nodata_as=float("nan"))
        land, land_name = None, f"cells of --habitat {habitat} with data"
    conn = int(connectivity)
    table = fragmentation_by_latitude(hab, threshold=habitat_threshold, band_deg=band_deg, land_mask=land,
                                      connectivity=conn)
    if table.empty:
        raise InputError(f"--habitat {habitat}: no land cell ({land_name}); nothing to tabulate")
    result = fragmentation_summary(table, threshold=habitat_threshold, band_deg=band_deg, connectivity=conn,
                                   land=land_name)
    result["inputs"] = {"habitat": habitat, "classes": classes, "grid": grid}
    with atomic_outputs([p for p in (out, summary) if p], overwrite=overwrite) as tmps:
        table.to_csv(tmps[0], index=False)
        if summary:
            tmps[1].write_text(json_text(result))
    return table, result
