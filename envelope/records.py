"""Occurrence records cleaned against a climate grid, with every dropped record counted by reason."""

from __future__ import annotations

import dataclasses
import difflib
import logging
import re
from collections import OrderedDict

import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from envelope.errors import InputError
from envelope.grids import check_grid_dims, crs_label, grid_crs, lon_into_grid, parse_crs
from envelope.terms import DWC_LATITUDE, DWC_LONGITUDE, DWC_TAXON_TERMS, MALFORMED_FLAG, to_float

log = logging.getLogger(__name__)

#: Why a record was dropped, in the order the checks run; a record is counted under the first
#: reason that applies to it, so the counts add up to ``n_read - n_kept``.
DROP_REASONS = (
    "other_taxon",
    "absent",
    "malformed",
    "imprecise",
    "outside_years",
    "outside_grid",
    "no_climate",
    "duplicate_cell",
    "thinned",
)

#: Mean Earth radius R1 = (2a + b)/3 of the WGS84 ellipsoid, in metres, used for haversine
#: distances. Source: NIMA TR8350.2 (2000), as quoted in REFERENCES.md section 6.
EARTH_RADIUS_M = 6_371_008.7714

#: Columns the cleaned table owns; source columns of the same name are kept as ``source_<name>``.
OWN_COLUMNS = ("x", "y", "row", "col", "x_record", "y_record")

#: Column of the cleaned table, present when absences were kept: 1 for a presence, 0 for an absence.
PRESENCE_COLUMN = "presence"

_ABSENT_WORDS = {"absent", "0", "0.0", "false", "no"}
_PRESENT_WORDS = {"present", "1", "1.0", "true", "yes"}
_LEADING_YEAR = re.compile(r"^\s*([+-]?\d{4})(?!\d)")


@dataclasses.dataclass
class Records:
    """Cleaned occurrence records on a grid.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per kept record: ``x``, ``y`` (centre of the record's cell, grid CRS), ``row``,
        ``col`` (cell indices), ``x_record``, ``y_record`` (coordinates as given, record CRS),
        then the source columns.
    n_read : int
        Records in the input table.
    dropped : collections.OrderedDict
        Reason -> count, holding every reason of :data:`DROP_REASONS` in order (zeros included).
    crs : str
        CRS of the grid (and of ``x``/``y``).
    record_crs : str
        CRS of ``x_record``/``y_record``.
    """

    table: pd.DataFrame
    n_read: int
    dropped: OrderedDict
    crs: str
    record_crs: str = "EPSG:4326"
    taxa: dict | None = None

    @property
    def n_absences(self) -> int:
        """Kept absence records (only when the cleaning kept absences: column ``presence`` = 0)."""
        if PRESENCE_COLUMN not in self.table.columns:
            return 0
        return int((self.table[PRESENCE_COLUMN] == 0).sum())

    @property
    def n_kept(self) -> int:
        return len(self.table)

    def occupancy(self, grid: xr.DataArray) -> xr.DataArray:
        """Occupied cells of ``grid`` (the grid the records were cleaned against): 1.0 where a
        kept record falls, else 0.0; a (y, x) layer on the grid's coordinates, e.g. the start
        of :func:`envelope.reach.simulate_reach`."""
        ny, nx = grid.sizes["y"], grid.sizes["x"]
        occ = np.zeros((ny, nx))
        occ[self.table["row"].to_numpy(), self.table["col"].to_numpy()] = 1.0
        return xr.DataArray(occ, dims=("y", "x"), coords={"y": grid["y"], "x": grid["x"]}, name="occupied")

    def summary(self) -> dict:
        """Counts as a JSON-ready dict: ``read``, ``kept``, ``dropped`` (reason -> count), CRSs."""
        return {
            "read": int(self.n_read),
            "kept": int(self.n_kept),
            "dropped": {k: int(v) for k, v in self.dropped.items()},
            "crs": self.crs,
            "record_crs": self.record_crs,
            **({} if self.taxa is None else {"taxa": self.taxa}),
            **({} if PRESENCE_COLUMN not in self.table.columns else
               {"presences": int(self.n_kept - self.n_absences), "absences": self.n_absences}),
        }


# ---------------------------------------------------------------- grid helpers


def values_at(stack: xr.DataArray, rows, cols) -> np.ndarray:
    """Grid values at cells ``(rows[i], cols[i])`` as a float64 array of shape (n, n_variables).

    Uses vectorised point indexing (``isel`` with DataArray indexers, which dask turns into
    ``vindex``), so only the chunks holding the points are read.

    Parameters
    ----------
    stack : xarray.DataArray
        Climate stack (variable, y, x) or a single layer (y, x), which counts as one variable.
    rows, cols : array_like of int, shape (n,)
        Cell indices.

    Examples
    --------
    >>> values_at(stack, [0, 3], [2, 2]).shape   # doctest: +SKIP
    (2, 2)
    """
    stack = check_grid_dims(stack)
    if stack.ndim == 2:
        stack = stack.expand_dims("variable")
    rows = np.asarray(rows, dtype=np.intp).ravel()
    cols = np.asarray(cols, dtype=np.intp).ravel()
    if rows.shape != cols.shape:
        raise InputError(f"values_at: {rows.size} rows but {cols.size} cols; expected the same number")
    ny, nx = stack.sizes["y"], stack.sizes["x"]
    if rows.size == 0:
        return np.empty((0, stack.sizes["variable"]), dtype=np.float64)
    if rows.min() < 0 or rows.max() >= ny or cols.min() < 0 or cols.max() >= nx:
        raise InputError(f"values_at: cell index outside the {ny} x {nx} grid")
    points = stack.isel(y=xr.DataArray(rows, dims="point"), x=xr.DataArray(cols, dims="point"))
    return np.asarray(points.transpose("point", "variable").values, dtype=np.float64)


def cells_of(grid: xr.DataArray, x, y):
    """Row and column of the cells holding points ``(x, y)`` given in the grid's CRS.

    On geographic grids longitudes are first moved by whole turns into the grid's range, so
    a record at -179.5 falls on a grid over the 180° meridian (x = 170 … 190) at 180.5.
    Cells are half-open: a point on the edge between two cells belongs to the cell on its
    right (east) and, on north-up grids, below it (south); the grid's east and south outer
    edges are outside. Fractional indices are rounded to 1e-9 of a cell first so that
    points on an edge are not pushed across it by floating-point error.

    Returns
    -------
    rows, cols : numpy.ndarray of int64 (-1 where outside)
    inside : numpy.ndarray of bool
    """
    # inverse affine (col, row) = A^-1 (x, y), written out: Affine's array `*` is deprecated
    a, b, c, d, e, f = tuple(~grid.rio.transform())[:6]
    x = lon_into_grid(grid, x)   # geographic grids: longitudes by whole turns into the grid's range
    y = np.asarray(y, dtype=np.float64)
    colf = np.floor(np.round(a * x + b * y + c, 9))
    rowf = np.floor(np.round(d * x + e * y + f, 9))
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    inside = np.isfinite(colf) & np.isfinite(rowf) & (colf >= 0) & (colf < nx) & (rowf >= 0) & (rowf < ny)
    rows = np.where(inside, rowf, -1).astype(np.int64)
    cols = np.where(inside, colf, -1).astype(np.int64)
    return rows, cols, inside


def cell_centres(grid: xr.DataArray, rows, cols):
    """Coordinates (x, y) of cell centres, grid CRS, from the grid's x/y coordinates."""
    return np.asarray(grid["x"].values)[cols].astype(np.float64), np.asarray(grid["y"].values)[rows].astype(np.float64)


class NeighbourSearch:
    """Distances between points on a grid: haversine on geographic grids, Euclidean otherwise.

    Geographic distances are great-circle distances on a sphere of radius
    :data:`EARTH_RADIUS_M` (sklearn ``BallTree(metric="haversine")`` for radius queries,
    an equivalent SciPy k-d tree on unit vectors for nearest-point queries); they differ from
    WGS84 geodesics by at most about 0.5 %. Projected distances are Euclidean in the CRS's
    linear unit converted to metres.

    References
    ----------
    Sinnott, R.W. (1984) Virtues of the haversine. Sky and Telescope 68(2): 159.
    """

    def __init__(self, x, y, crs: pyproj.CRS):
        from sklearn.neighbors import BallTree

        self.geographic = crs.is_geographic
        self._metres_per_unit = 1.0 if self.geographic else float(crs.axis_info[0].unit_conversion_factor)
        self._xy = (np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64))
        self._kdtree = None
        points = self._points(x, y)
        self.tree = BallTree(points, metric="haversine" if self.geographic else "euclidean")

    def _points(self, x, y):
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if self.geographic:
            # BallTree's haversine wants (latitude, longitude) in radians.
            return np.radians(np.column_stack([y, x]))
        return np.column_stack([x, y]) * self._metres_per_unit

    def radius(self, km: float) -> float:
        """``km`` in the tree's units (radians of arc or metres)."""
        metres = km * 1000.0
        return metres / EARTH_RADIUS_M if self.geographic else metres

    def within(self, x, y, km: float):
        """Indices of tree points within ``km`` (inclusive) of each query point."""
        return self.tree.query_radius(self._points(x, y), r=self.radius(km))

    def nearest_km(self, x, y, upper_km: float | None = None) -> np.ndarray:
        """Distance in km from each query point to its nearest tree point (inf beyond ``upper_km``).

        Uses a SciPy k-d tree, which is many times faster than the ball tree for millions of
        cells. On geographic grids it works on unit vectors, where the chord length
        c = 2 sin(theta / 2) grows monotonically with the arc theta, so the nearest point
        and the bound are exact on the sphere (Snyder 1987, "Map projections: a working
        manual", USGS PP 1395, p. 30, for the unit-sphere coordinates).
        """
        from scipy.spatial import cKDTree

        if self._kdtree is None:
            self._kdtree = cKDTree(self._cartesian(*self._xy))
        bound = np.inf
        if upper_km is not None:
            bound = self._chord(upper_km) * (1 + 1e-12) if self.geographic else upper_km * 1000.0 * (1 + 1e-12)
        distance, _ = self._kdtree.query(self._cartesian(x, y), k=1, distance_upper_bound=bound)
        if self.geographic:
            arc = 2.0 * np.arcsin(np.clip(distance / 2.0, 0.0, 1.0))
            return np.where(np.isfinite(distance), arc * EARTH_RADIUS_M / 1000.0, np.inf)
        return distance / 1000.0

    def _cartesian(self, x, y):
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if not self.geographic:
            return np.column_stack([x, y]) * self._metres_per_unit
        lon, lat = np.radians(x), np.radians(y)
        return np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])

    @staticmethod
    def _chord(km: float) -> float:
        theta = min(km * 1000.0 / EARTH_RADIUS_M, np.pi)
        return 2.0 * np.sin(theta / 2.0)


def thin_greedy(x, y, crs: pyproj.CRS, min_km: float) -> np.ndarray:
    """Greedy spatial thinning: keep points in the order given, dropping any within ``min_km`` of a kept one.

    Deterministic: the first point is always kept, and each later point is kept only if it
    lies more than ``min_km`` from every point kept before it, so every kept pair is more
    than ``min_km`` apart. Put the records you trust most first.

    Returns
    -------
    keep : numpy.ndarray of bool

    References
    ----------
    Aiello-Lammens, M.E. et al. (2015) spThin: an R package for spatial thinning of species
    occurrence records for use in ecological niche models. Ecography 38: 541-545 (the
    randomised variant; this one is its deterministic, order-driven form).
    """
    n = len(x)
    keep = np.zeros(n, dtype=bool)
    if n == 0:
        return keep
    search = NeighbourSearch(x, y, crs)
    removed = np.zeros(n, dtype=bool)
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    for i in range(n):
        if removed[i]:
            continue
        keep[i] = True
        removed[search.within(x[i:i + 1], y[i:i + 1], min_km)[0]] = True
    return keep


# ---------------------------------------------------------------- table helpers


def find_column(table: pd.DataFrame, name: str):
    """The table's column matching ``name`` exactly, else case-insensitively, else None."""
    if name in table.columns:
        return name
    lowered = {str(c).lower(): c for c in table.columns}
    return lowered.get(name.lower())


def record_coordinates(table: pd.DataFrame, source: str = "records"):
    """Record coordinates (x, y) as float64 arrays, NaN where missing or not a number.

    Looks for ``x_record``/``y_record`` (set by the reader), then the Darwin Core
    ``decimalLongitude``/``decimalLatitude``.
    """
    for xname, yname in (("x_record", "y_record"), (DWC_LONGITUDE, DWC_LATITUDE)):
        xcol, ycol = find_column(table, xname), find_column(table, yname)
        if xcol is not None and ycol is not None:
            return to_float(table[xcol]), to_float(table[ycol])
    columns = ", ".join(map(str, table.columns)) or "(none)"
    raise InputError(
        f"{source}: no coordinate columns; expected {DWC_LONGITUDE}/{DWC_LATITUDE} or x_record/y_record, "
        f"found: {columns}"
    )


def years_of_records(table: pd.DataFrame) -> np.ndarray:
    """Year of each record (float64, NaN if unknown): ``year`` where given, else the leading year of ``eventDate``.

    For an ISO 8601 interval in ``eventDate`` ("2001-05-03/2002-01-10") the start year counts.
    """
    years = np.full(len(table), np.nan)
    year_col = find_column(table, "year")
    if year_col is not None:
        years = to_float(table[year_col])
        years[years != np.round(years)] = np.nan
    date_col = find_column(table, "eventDate")
    if date_col is not None:
        missing = np.isnan(years)
        if missing.any():
            leading = table[date_col].astype("string").str.extract(_LEADING_YEAR, expand=False)
            from_date = pd.to_numeric(leading, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
            years[missing] = from_date[missing]
    return years


def _status_kept(table: pd.DataFrame, keep_status) -> np.ndarray:
    column = find_column(table, "occurrenceStatus")
    if column is None:
        return np.ones(len(table), dtype=bool)
    status = table[column].astype("string").str.strip().str.lower()
    # Darwin Core: a record without a status is taken as a presence.
    status = status.fillna("present").replace("", "present")
    status = status.where(~status.isin(_PRESENT_WORDS), "present")
    status = status.where(~status.isin(_ABSENT_WORDS), "absent")
    keep = {str(s).strip().lower() for s in keep_status}
    return status.isin(keep).to_numpy(dtype=bool)


_RANK_MARKERS = {"subsp.", "ssp.", "var.", "subvar.", "f.", "forma", "fo.", "cv.", "nothosubsp.", "nothovar."}
_EPITHET = re.compile(r"^[a-z\u00df-\u00ff][a-z\u00df-\u00ff-]*$")
_GENUS = re.compile(r"^[A-Z\u00c0-\u00de][a-z\u00df-\u00ff-]+$")


def canonical_name(name) -> str:
    """A taxon name compared without case and, where that is safe, without authorship.

    When the name reads ``Genus epithet [[rank] epithet] ...`` (a capitalised genus, then
    lower-case epithets), everything after the epithets is authorship and is left out:
    ``"Aus bus (Linnaeus, 1758)"`` -> ``"aus bus"``, ``"Aus bus var. cus L."`` ->
    ``"aus bus var. cus"``. Any other name is compared whole, lower-cased, with runs of
    white space made single. Hybrid signs (×) are kept. Empty names give "".
    """
    if name is None or name is pd.NA or (isinstance(name, float) and np.isnan(name)):
        return ""
    words = str(name).replace("\u00d7", " \u00d7 ").split()
    if not words:
        return ""
    kept = []
    if _GENUS.match(words[0]):
        kept.append(words[0])
        rest = words[1:]
        if rest and rest[0] == "\u00d7":
            kept.append(rest.pop(0))
        if rest and _EPITHET.match(rest[0]):
            kept.append(rest.pop(0))
            while rest:
                if rest[0] in _RANK_MARKERS and len(rest) > 1 and _EPITHET.match(rest[1]):
                    kept += rest[:2]
                    rest = rest[2:]
                elif _EPITHET.match(rest[0]) and rest[0] not in _RANK_MARKERS:
                    kept.append(rest.pop(0))   # a zoological trinomial
                else:
                    break
            return " ".join(kept).lower()
    return " ".join(words).lower()


def _taxon_columns(table):
    return [c for c in (find_column(table, t) for t in DWC_TAXON_TERMS) if c is not None]


def _taxon_keys(table: pd.DataFrame, columns):
    """Records per canonical taxon name (most frequent first) and each name's most used spelling."""
    names = pd.Series([None] * len(table), dtype=object)
    for column in columns:
        values = table[column].astype("string").str.strip()
        names = names.where(names.notna(), values.where(values.notna() & (values != ""), None).astype(object))
    keys = names.map(canonical_name)
    spelled = pd.DataFrame({"key": keys, "name": names}).loc[keys != ""]
    counts = spelled["key"].value_counts()
    display = {k: spelled.loc[spelled["key"] == k, "name"].value_counts().index[0] for k in counts.index}
    return counts, display


def taxon_counts(table: pd.DataFrame) -> dict | None:
    """Records per taxon, ``{name: records}``, most frequent first (names as :func:`select_taxon`
    reads them: its most used spelling of each); None when the table has no taxon column."""
    columns = _taxon_columns(table)
    if not columns:
        return None
    counts, display = _taxon_keys(table, columns)
    return {display[k]: int(v) for k, v in counts.items()}


def select_taxon(table: pd.DataFrame, species: str | None = None, *, source: str = "records",
                 option: str = "--species"):
    """Which records are of one taxon: a boolean mask and a description of the taxa found.

    A record's taxon is the first of its ``species``, ``acceptedScientificName`` and
    ``scientificName`` that is given (:data:`envelope.terms.DWC_TAXON_TERMS`), compared by
    :func:`canonical_name` (case, and authorship where safe, ignored). With ``species``, a
    record is kept when any of the three names matches it; without, every record is kept as
    long as the records name one taxon (records without a name go with it). A table without
    any of the columns is taken as one taxon.

    Returns
    -------
    mask : numpy.ndarray of bool
    taxa : dict or None
        ``{"asked", "columns", "counts": {name: records}}`` (None without name columns); the
        names are the spellings most used in the table, most frequent taxon first.

    Raises
    ------
    InputError
        Several taxa and no ``species`` (each taxon is named with its count), a ``species``
        that matches no record (the nearest names are listed), or ``species`` given for a
        table without name columns.
    """
    columns = _taxon_columns(table)
    n = len(table)
    if not columns:
        if species:
            raise InputError(f"{source}: {option} {species!r} given, but the records have no "
                             f"{', '.join(DWC_TAXON_TERMS)} column to match it in")
        return np.ones(n, dtype=bool), None
    counts, display = _taxon_keys(table, columns)
    taxa_counts = {display[k]: int(v) for k, v in counts.items()}

    def shown(items):
        return ", ".join(f"{display[k]} ({int(counts[k])})" for k in items)

    if species:
        query = str(species).strip()
        query = canonical_name(query[:1].upper() + query[1:]) if query else ""
        mask = np.zeros(n, dtype=bool)
        for column in columns:
            mask |= table[column].map(canonical_name).to_numpy() == query
        if not mask.any():
            close = difflib.get_close_matches(query, list(counts.index), n=5, cutoff=0.6)
            near = shown(close) if close else shown(list(counts.index[:5]))
            raise InputError(f"{source}: {option} {species!r} matches no record in column(s) {', '.join(columns)}; "
                             f"nearest names: {near}")
        return mask, {"asked": species, "columns": columns, "counts": taxa_counts}
    if len(counts) > 1:
        raise InputError(f"{source}: the records hold {len(counts)} taxa: {shown(list(counts.index))}; "
                         f"choose one with {option} NAME")
    return np.ones(n, dtype=bool), {"asked": None, "columns": columns, "counts": taxa_counts}


def _check_years(years):
    try:
        start, end = years
    except (TypeError, ValueError):
        raise InputError(f"years: {years!r}; expected a (first, last) pair, e.g. (1990, 2020)") from None
    start = -np.inf if start is None else float(start)
    end = np.inf if end is None else float(end)
    if start > end:
        raise InputError(f"years: first year {start:g} is after last year {end:g}")
    return start, end


def _format_counts(dropped) -> str:
    return ", ".join(f"{k} {v}" for k, v in dropped.items())


# ---------------------------------------------------------------- cleaning


def clean_occurrences(
    table: pd.DataFrame,
    grid: xr.DataArray,
    *,
    crs=None,
    max_uncertainty_m: float | None = None,
    record_years=None,
    thin_km: float | None = None,
    one_per_cell: bool = True,
    keep_status=("present",),
    species: str | None = None,
    absences: bool = False,
    species_option: str = "--species",
    all_taxa: bool = False,
) -> Records:
    """Clean occurrence records against a grid and count every dropped record by reason.

    Checks run in the order of :data:`DROP_REASONS`; each record is counted under the first
    reason that applies:

    ``other_taxon``
        Not of the taxon ``species`` (:func:`select_taxon`). Without ``species`` the records
        must name a single taxon, or the cleaning stops with the taxa and their counts;
        ``all_taxa=True`` keeps every taxon (records of all taxa as a measure of recording
        effort, as ``envelope margins`` uses them).
    ``absent``
        ``occurrenceStatus`` is not in ``keep_status``; "absent", "0", "false", "no" mean
        absent, "present", "1", "true", "yes" and an empty status mean present.
    ``malformed``
        Coordinates missing or not numbers, a row the reader flagged (wrong field count), or,
        for geographic record CRSs, longitude outside -180..180 or latitude outside -90..90.
    ``imprecise``
        ``coordinateUncertaintyInMeters`` above ``max_uncertainty_m``; records without a
        stated uncertainty are kept.
    ``outside_years``
        Year (``year``, else the start of ``eventDate``) outside the inclusive ``record_years``
        range. A record without a readable year is dropped here too when a range is given:
        it cannot be shown to fall in the period.
    ``outside_grid``
        After reprojection to the grid CRS (pyproj, always_xy) the point is off the grid.
    ``no_climate``
        Any variable is NaN at the record's cell.
    ``duplicate_cell``
        Another record earlier in the table is in the same cell (``one_per_cell``); with
        ``absences``, presences come first, so an absence in a cell with a presence goes.
    ``thinned``
        Within ``thin_km`` of a record kept before it (:func:`thin_greedy` on cell centres;
        with ``absences``, presences and absences are thinned separately).

    Parameters
    ----------
    table : pandas.DataFrame
        Records, e.g. from :func:`envelope.io.records.read_occurrences`.
    grid : xarray.DataArray
        Climate stack (variable, y, x) or single layer (y, x) with a CRS.
    crs : str or pyproj.CRS, optional
        CRS of the record coordinates; default ``table.attrs["crs"]`` or EPSG:4326.
    max_uncertainty_m : float, optional
    record_years : (int or None, int or None), optional
        Inclusive first and last year.
    thin_km : float, optional
        Minimum distance between kept records, km.
    one_per_cell : bool, default=True
    keep_status : sequence of str, default=("present",)
    species : str, optional
        Keep the records of this taxon (:func:`select_taxon`).
    absences : bool, default=False
        Keep absence records too (``occurrenceStatus`` absent); the cleaned table then has
        the column :data:`PRESENCE_COLUMN` (1 presence, 0 absence).
    species_option : str, default="--species"
        How messages name the species setting (a study file says ``records.species``).

    Returns
    -------
    Records

    Raises
    ------
    InputError
        When no record is left, with the counts per reason and, when every placed record is
        off the grid, a hint about the records' CRS.
    """
    source = str(table.attrs.get("source", "records"))
    grid = check_grid_dims(grid)
    target = grid_crs(grid)
    record_crs = parse_crs(crs if crs is not None else table.attrs.get("crs", "EPSG:4326"), source)
    table = table.reset_index(drop=True)
    n = len(table)
    code = np.zeros(n, dtype=np.int8)  # 0 = kept, k = DROP_REASONS[k - 1]

    def drop(mask, reason):
        mask = (code == 0) & np.asarray(mask, dtype=bool)
        code[mask] = DROP_REASONS.index(reason) + 1

    if all_taxa:
        taxon_mask, taxa = np.ones(n, dtype=bool), None
    else:
        taxon_mask, taxa = select_taxon(table, species, source=source, option=species_option)
    drop(~taxon_mask, "other_taxon")
    if absences:
        keep_status = tuple(keep_status) + ("absent",)
    drop(~_status_kept(table, keep_status), "absent")
    is_absence = ~_status_kept(table, ("present",)) if absences else np.zeros(n, dtype=bool)

    x_record, y_record = record_coordinates(table, source)
    bad = ~(np.isfinite(x_record) & np.isfinite(y_record))
    if MALFORMED_FLAG in table.columns:
        bad |= table[MALFORMED_FLAG].fillna(False).to_numpy(dtype=bool)
    range_hint = ""
    if record_crs.is_geographic:
        with np.errstate(invalid="ignore"):
            out_of_range = (np.abs(x_record) > 180) | (np.abs(y_record) > 90)
            swapped_fits = out_of_range & (np.abs(y_record) <= 180) & (np.abs(x_record) <= 90)
            east = out_of_range & (x_record > 180) & (x_record <= 360) & (np.abs(y_record) <= 90) & (code == 0)
        bad |= out_of_range
        swapped_fits &= code == 0
        if swapped_fits.any():
            range_hint = (f"; {int(swapped_fits.sum())} records have a latitude beyond ±90 that would be a valid "
                          "longitude: are the longitude and latitude columns swapped?")
        elif east.any():
            range_hint = (f"; {int(east.sum())} records have a longitude in 180..360 (degrees east from 0 to 360?): "
                          "longitudes are read from -180 to 180, so subtract 360 from those above 180")
    drop(bad, "malformed")

    if max_uncertainty_m is not None:
        column = find_column(table, "coordinateUncertaintyInMeters")
        if column is None:
            log.warning("%s: no coordinateUncertaintyInMeters column; max_uncertainty_m=%s drops nothing",
                        source, max_uncertainty_m)
        else:
            uncertainty = to_float(table[column])
            with np.errstate(invalid="ignore"):
                drop(uncertainty > float(max_uncertainty_m), "imprecise")

    if record_years is not None:
        start, end = _check_years(record_years)
        if find_column(table, "year") is None and find_column(table, "eventDate") is None:
            raise InputError(f"{source}: a year range was asked for but there is no 'year' or 'eventDate' column")
        year = years_of_records(table)
        with np.errstate(invalid="ignore"):
            drop(~((year >= start) & (year <= end)), "outside_years")

    # Reproject only the records still in play.
    live = np.flatnonzero(code == 0)
    gx = np.full(n, np.nan)
    gy = np.full(n, np.nan)
    if live.size:
        if record_crs == target:
            gx[live], gy[live] = x_record[live], y_record[live]
        else:
            transformer = pyproj.Transformer.from_crs(record_crs, target, always_xy=True)
            gx[live], gy[live] = transformer.transform(x_record[live], y_record[live])
    rows, cols, inside = cells_of(grid, gx, gy)
    n_placed = live.size
    drop(~inside, "outside_grid")
    n_inside = int(np.count_nonzero(code == 0))
    if n_placed and n_inside == 0:
        hint = _crs_hint(grid, target, record_crs, x_record[live], y_record[live], n_placed)
    else:
        hint = ""
        if n_placed and n_inside < 0.5 * n_placed:
            log.warning("%s: only %d of %d records fall inside the grid", source, n_inside, n_placed)

    live = np.flatnonzero(code == 0)
    if live.size:
        values = values_at(grid, rows[live], cols[live])
        no_climate = np.zeros(n, dtype=bool)
        no_climate[live] = ~np.isfinite(values).all(axis=1)
        drop(no_climate, "no_climate")

    if one_per_cell:
        live = np.flatnonzero(code == 0)
        flat = rows[live] * grid.sizes["x"] + cols[live]
        # presences first (stable), so an absence never displaces a presence of its cell
        order = np.argsort(is_absence[live], kind="stable")
        duplicate = np.zeros(n, dtype=bool)
        duplicate[live[order]] = pd.Series(flat[order]).duplicated(keep="first").to_numpy()
        drop(duplicate, "duplicate_cell")

    cx = np.full(n, np.nan)
    cy = np.full(n, np.nan)
    live = np.flatnonzero(code == 0)
    cx[live], cy[live] = cell_centres(grid, rows[live], cols[live])

    if thin_km is not None:
        if not thin_km > 0:
            raise InputError(f"thin_km: {thin_km!r}; expected a positive distance in km")
        thinned = np.zeros(n, dtype=bool)
        for group in (live[~is_absence[live]], live[is_absence[live]]):
            if group.size:
                thinned[group] = ~thin_greedy(cx[group], cy[group], target, float(thin_km))
        drop(thinned, "thinned")

    dropped = OrderedDict((reason, int(np.count_nonzero(code == k + 1))) for k, reason in enumerate(DROP_REASONS))
    kept = code == 0
    log.info("%s: read %d, kept %d; dropped %s", source, n, int(kept.sum()), _format_counts(dropped))
    if kept.any() and range_hint:
        log.warning("%s: %d records dropped as malformed%s", source, dropped["malformed"], range_hint)
    if not kept.any():
        hint = hint or (range_hint if dropped["malformed"] * 2 > n else "")
        raise InputError(f"{source}: no records left after cleaning (read {n}; dropped {_format_counts(dropped)}){hint}")

    out = pd.DataFrame({
        "x": cx[kept], "y": cy[kept],
        "row": rows[kept], "col": cols[kept],
        "x_record": x_record[kept], "y_record": y_record[kept],
    })
    extra = table.loc[kept].drop(columns=[c for c in (MALFORMED_FLAG, "x_record", "y_record") if c in table.columns])
    own = OWN_COLUMNS + ((PRESENCE_COLUMN,) if absences else ())
    extra = extra.rename(columns={c: f"source_{c}" for c in extra.columns if c in own})
    out = pd.concat([out, extra.reset_index(drop=True)], axis=1)
    if absences:
        out.insert(6, PRESENCE_COLUMN, (~is_absence[kept]).astype(np.int8))
    out.attrs = {"source": source, "crs": crs_label(target)}
    return Records(table=out, n_read=n, dropped=dropped, crs=crs_label(target), record_crs=crs_label(record_crs),
                   taxa=taxa)


def _crs_hint(grid, target, record_crs, x, y, n_placed) -> str:
    """Explain why no record is on the grid: the CRS the records were read in, swapped axes."""
    hint = f"; 0 of {n_placed} records fall inside the grid; are the coordinates in {crs_label(record_crs)}?"
    left, bottom, right, top = grid.rio.bounds()
    hint += f" (grid bounds {left:g}, {bottom:g}, {right:g}, {top:g} in {crs_label(target)})"
    # A frequent slip: longitude and latitude columns swapped.
    try:
        if record_crs == target:
            sx, sy = y, x
        else:
            sx, sy = pyproj.Transformer.from_crs(record_crs, target, always_xy=True).transform(y, x)
        _, _, swapped_inside = cells_of(grid, sx, sy)
        if swapped_inside.any():
            hint += f"; with x and y swapped {int(swapped_inside.sum())} would: are the columns swapped?"
    except pyproj.exceptions.ProjError:  # pragma: no cover - the hint is best effort
        pass
    return hint
