"""Observed range-margin shifts between two recording periods: N most poleward cells, effort correction, bootstrap.

The margin statistic is the mean latitude of the N most poleward (equatorward) occupied cells
of each period (Thomas & Lennon 1999; Hickling et al. 2006), reported as a distance along the
meridian (km, positive = poleward in the hemisphere the species lives in), together with the
area-weighted 95th (5th) percentile of poleward latitude. Recording effort is corrected for
by using only cells recorded well in both periods, judged by the records of all taxa in the
file (the focal species' records included) or by an effort raster (common practice).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.change import meridian_distance_m, weighted_quantile
from envelope.kernels.margins import bootstrap_extreme_means, extreme_mean, poleward_sign

__all__ = ["Period", "parse_periods", "select_species", "period_index", "well_recorded",
           "cell_latitudes", "margin_statistics", "period_cells", "cells_used", "margins_of_cells",
           "margin_shifts"]

#: Darwin Core columns that name the taxon of a record, tried in this order.
_PERIOD = re.compile(r"^\s*(-?\d{1,4})\s*-\s*(-?\d{1,4})\s*$")


@dataclass(frozen=True)
class Period:
    """An inclusive range of recording years."""

    first: int
    last: int

    @property
    def label(self) -> str:
        return f"{self.first}-{self.last}"


def parse_periods(text, *, where: str = "--periods") -> tuple[Period, Period]:
    """Two recording periods from ``"FIRST-LAST,FIRST-LAST"`` (or a pair of (first, last) pairs).

    The periods must not overlap; the earlier one comes first.
    """
    if isinstance(text, str):
        parts = [p for p in text.split(",")]
        if len(parts) != 2:
            raise InputError(f"{where}: found {text!r}; expected two periods FIRST-LAST,FIRST-LAST, e.g. 1970-1989,2000-2019")
        pairs = []
        for part in parts:
            m = _PERIOD.match(part)
            if m is None:
                raise InputError(f"{where}: period {part.strip()!r} is not FIRST-LAST (years, e.g. 1970-1989)")
            pairs.append((int(m.group(1)), int(m.group(2))))
    else:
        try:
            pairs = [(int(a), int(b)) for a, b in text]
        except (TypeError, ValueError):
            raise InputError(f"{where}: found {text!r}; expected two [first, last] year pairs") from None
        if len(pairs) != 2:
            raise InputError(f"{where}: found {len(pairs)} periods; expected two")
    periods = [Period(a, b) for a, b in pairs]
    for p in periods:
        if p.first > p.last:
            raise InputError(f"{where}: period {p.label} ends before it starts; expected FIRST <= LAST")
    a, b = periods
    if a.last >= b.first and b.last >= a.first:
        raise InputError(f"{where}: periods {a.label} and {b.label} overlap; expected two separate recording periods")
    if b.first < a.first:
        raise InputError(f"{where}: period {b.label} comes before {a.label}; give the earlier period first")
    return a, b


def select_species(table: pd.DataFrame, name: str, *, where: str = "--species") -> np.ndarray:
    """Rows of ``table`` that belong to taxon ``name`` (bool array): the records cleaning's own
    taxon matching (:func:`envelope.records.select_taxon`: species, acceptedScientificName or
    scientificName; case and authorship ignored where safe), with a name required."""
    from envelope.records import select_taxon

    if not " ".join(str(name or "").split()):
        raise InputError(f"{where}: the species name is empty")
    return np.asarray(select_taxon(table, name, option=where)[0], dtype=bool)


def period_index(years, periods) -> np.ndarray:
    """0 or 1 for records in the first or second period, -1 for other or unknown years."""
    y = np.asarray(years, dtype=np.float64)
    out = np.full(y.shape, -1, dtype=np.int8)
    with np.errstate(invalid="ignore"):
        for k, p in enumerate(periods):
            out[(y >= p.first) & (y <= p.last)] = k
    return out


def well_recorded(counts, min_records: float) -> np.ndarray:
    """Cells recorded well in every period: ``counts`` (periods, cells) at least ``min_records`` in each."""
    counts = np.asarray(counts, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.all(counts >= float(min_records), axis=0)


def cell_latitudes(grid: xr.DataArray, rows, cols) -> np.ndarray:
    """Geodetic latitude (degrees) of the centres of cells (rows, cols) of ``grid``."""
    from envelope.grids import grid_crs
    from envelope.records import cell_centres

    x, y = cell_centres(grid, rows, cols)
    crs = grid_crs(grid)
    if crs.is_geographic:
        return np.asarray(y, dtype=np.float64)
    import pyproj

    _, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(x, y)
    return np.asarray(lat, dtype=np.float64)


def _arc_km(lat_from, lat_to, sign):
    """Distance along the meridian (km), positive poleward for hemisphere ``sign``."""
    return sign * (meridian_distance_m(lat_to) - meridian_distance_m(lat_from)) / 1000.0


def margin_statistics(latitudes, areas, *, n_cells: int, labels, percentile: float = 95.0, bootstrap: int = 0,
                      seed: int = 0, where: str = "--n-cells") -> dict:
    """Poleward and equatorward margins of two sets of occupied cells, and their shifts.

    Parameters
    ----------
    latitudes, areas : two arrays each
        Geodetic latitude (degrees) and true area (km²) of the occupied cells of each period.
    n_cells : int
        N of the "N most poleward cells" statistic.
    labels : two str
        Period labels, for the keys and the messages.
    percentile : float
        Area-weighted percentile of poleward latitude for the second margin statistic.
    bootstrap : int
        Bootstrap replicates (0: no intervals); each period's cells are resampled on their own.

    Returns
    -------
    dict with ``poleward_margin_shift_km``, ``equatorward_margin_shift_km`` and their
    ``_interval_km``, the margins' latitudes per period, ``percentile_margin_shift_km``,
    ``poleward`` ("north"/"south") and ``n_cells_used``.
    """
    lats = [np.asarray(v, dtype=np.float64) for v in latitudes]
    for lat, label in zip(lats, labels):
        if lat.size < n_cells:
            raise InputError(f"{where}: {n_cells} most poleward cells asked for, but period {label} has only "
                             f"{lat.size} occupied cells to use; expected at least {n_cells} (lower {where}"
                             + (" or --min-records)" if where == "--n-cells" else ")"))
    sign = poleward_sign(np.concatenate(lats))
    pole = [lat * sign for lat in lats]  # poleward latitude: larger is nearer the pole
    q = float(percentile) / 100.0
    out = {"poleward": "north" if sign > 0 else "south", "n_cells": int(n_cells), "periods": list(labels),
           "n_cells_used": {label: int(lat.size) for label, lat in zip(labels, lats)}}
    rng = np.random.default_rng(seed)
    for side, largest, level in (("poleward", True, q), ("equatorward", False, 1.0 - q)):
        margin = [extreme_mean(p, n_cells, largest=largest) * sign for p in pole]
        out[f"{side}_margin_lat"] = dict(zip(labels, margin))
        out[f"{side}_margin_shift_km"] = float(_arc_km(margin[0], margin[1], sign))
        interval = None
        if bootstrap:
            reps = [bootstrap_extreme_means(p, n_cells, bootstrap, rng, largest=largest) * sign for p in pole]
            shifts = _arc_km(reps[0], reps[1], sign)
            interval = [float(v) for v in np.percentile(shifts, [2.5, 97.5])]
        out[f"{side}_margin_shift_interval_km"] = interval
        edge = [weighted_quantile(p, a, level) * sign for p, a in zip(pole, areas)]
        out[f"{side}_percentile_lat"] = dict(zip(labels, edge))
        out[f"{side}_percentile_shift_km"] = float(_arc_km(edge[0], edge[1], sign))
    out["percentile"] = float(percentile)
    out["bootstrap"] = int(bootstrap)
    return out


def period_cells(records, grid: xr.DataArray, *, species: str, periods) -> dict:
    """Per period: records of all taxa per cell (``counts``, shape (2, cells)), the flat indices of
    the cells where ``species`` was recorded (``occupied``), each record's period and focal flag.

    Raises InputError naming ``--periods`` when a period has no records, or none of the species.
    """
    from envelope.records import find_column, years_of_records

    table = records.table
    labels = [p.label for p in periods]
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    flat = table["row"].to_numpy() * nx + table["col"].to_numpy()
    if find_column(table, "year") is None and find_column(table, "eventDate") is None:
        raise InputError(f"{table.attrs.get('source', 'records')}: no 'year' or 'eventDate' column; "
                         "expected the year of each record to place it in a period")
    k = period_index(years_of_records(table), periods)
    focal = select_species(table, species)
    counts = np.zeros((2, ny * nx))
    occupied = []
    for j, label in enumerate(labels):
        in_period = k == j
        if not in_period.any():
            raise InputError(f"--periods: no records in period {label}; expected records of all taxa in both periods")
        if not (in_period & focal).any():
            raise InputError(f"--periods: no record of {species!r} in period {label}; expected the species in both periods")
        counts[j] = np.bincount(flat[in_period], minlength=ny * nx)
        occupied.append(np.unique(flat[in_period & focal]))
    return {"labels": labels, "counts": counts, "occupied": occupied, "period": k, "focal": focal}


def cells_used(counts, min_records: float, *, effort=None) -> tuple[np.ndarray, dict]:
    """The cells recorded well in both periods (flat bool mask) and a description of the rule.

    ``effort`` (an effort raster, (y, x) or (2, y, x)) replaces the record ``counts`` when given.
    """
    n = counts.shape[1]
    if effort is not None:
        e = np.asarray(effort, dtype=np.float64)
        e = e.reshape((1 if e.ndim == 2 else e.shape[0], -1))
        if e.shape[0] not in (1, 2) or e.shape[1] != n:
            raise InputError(f"--effort: found {e.shape[0]} layers of {e.shape[1]} cells; expected one (both "
                             f"periods) or two (one each) of the grid's {n} cells")
        use = well_recorded(np.broadcast_to(e, (2, n)), min_records)
        source = "effort raster"
    else:
        use = well_recorded(counts, min_records)
        source = "records of all taxa"
    return use, {"applied": True, "source": source, "min_records": float(min_records),
                 "n_cells_well_recorded": int(use.sum())}


def margins_of_cells(grid: xr.DataArray, cell_sets, **statistics) -> dict:
    """:func:`margin_statistics` of two sets of flat cell indices of ``grid`` (true areas, geodetic latitudes)."""
    from envelope.grids import cell_area_km2

    nx = grid.sizes["x"]
    area = np.asarray(cell_area_km2(grid).values, dtype=np.float64).ravel()
    lats = [cell_latitudes(grid, c // nx, c % nx) for c in cell_sets]
    return margin_statistics(lats, [area[c] for c in cell_sets], **statistics)


def margin_shifts(records, grid: xr.DataArray, *, species: str, periods, n_cells: int = 10,
                  min_records: float = 5, effort=None, effort_correction: bool = True, bootstrap: int = 1000,
                  seed: int = 0, elevation=None, percentile: float = 95.0) -> dict:
    """Observed shift of the poleward and equatorward margins of ``species`` between two periods.

    Parameters
    ----------
    records : envelope.records.Records
        Records of all taxa cleaned against ``grid`` with ``one_per_cell=False`` (each record
        counts towards its cell's effort), with a ``year`` or ``eventDate`` column.
    grid : DataArray (variable, y, x) or (y, x)
        The grid the records were cleaned against (CRS attached).
    species : str
        The focal taxon (:func:`select_species`); all records count as effort.
    periods : two Period (:func:`parse_periods`)
    n_cells : int, default=10
        N of the mean latitude of the N most poleward cells.
    min_records : float, default=5
        A cell is recorded well in a period when it holds at least this many records of all
        taxa, or when the effort raster is at least this high there (common practice, no source
        for the default).
    effort : ndarray, shape (y, x) or (2, y, x), optional
        Effort raster on the grid (one layer for both periods, or one per period), used
        instead of the record counts.
    effort_correction : bool, default=True
        False: use every occupied cell (the uncorrected figure).
    bootstrap : int, default=1000
        Bootstrap replicates of the 95 % intervals (0: none).
    elevation : ndarray (y, x), optional
        Elevation (m) on the grid: gives ``elevation_shift_m``, the change in mean elevation
        of the occupied cells used.

    Returns
    -------
    dict, JSON-ready; keys documented in docs/margins.md.
    """
    cells = period_cells(records, grid, species=species, periods=periods)
    labels, counts, occupied, k, focal = (cells[key] for key in ("labels", "counts", "occupied", "period", "focal"))
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    if not effort_correction:
        use = np.ones(ny * nx, dtype=bool)
        correction = {"applied": False}
    else:
        use, correction = cells_used(counts, min_records, effort=effort)
    used = [occ[use[occ]] for occ in occupied]
    summary = margins_of_cells(grid, used, n_cells=n_cells, labels=labels, percentile=percentile,
                               bootstrap=bootstrap, seed=seed)
    summary = {"species": species, **summary, "effort_correction": correction,
               "records": {"read": int(records.n_read), "kept": int(records.n_kept),
                           "in_period": {label: int(np.count_nonzero(k == j)) for j, label in enumerate(labels)},
                           "of_species": {label: int(np.count_nonzero((k == j) & focal))
                                          for j, label in enumerate(labels)},
                           "outside_periods": int(np.count_nonzero(k < 0))},
               "n_cells_occupied": {label: int(c.size) for label, c in zip(labels, occupied)}}
    if elevation is not None:
        elev = np.asarray(elevation, dtype=np.float64).ravel()
        means = [float(np.nanmean(elev[c])) if np.isfinite(elev[c]).any() else float("nan") for c in used]
        summary["mean_elevation_m"] = dict(zip(labels, means))
        summary["elevation_shift_m"] = means[1] - means[0]
    from envelope.provenance import json_ready

    return json_ready(summary)
