"""Which climatic gains a species can reach: habitat-gated dispersal through the transient climate."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels import dispersal
from envelope.grids import spans_globe
from envelope.kernels.longitude import split_at_antimeridian
from envelope.kernels.spread import DEFAULT_PRESSURE_FLOOR, SpreadOperator
from envelope.kernels.transient import ClimatePath, run_transient

log = logging.getLogger(__name__)

#: Reach classes (uint8 codes) and their meanings, stored in the raster's metadata.
REACH_CLASSES = {
    0: "absent",             # suitable neither now nor at the horizon
    1: "lost",               # suitable now, not at the horizon
    2: "stable",             # suitable now and at the horizon
    3: "gained_reached",     # newly suitable, habitat present, occupied at the horizon
    4: "gained_unreached",   # newly suitable, habitat present, not reached (dispersal-limited)
    5: "gained_no_habitat",  # newly suitable, but no habitat to colonise
}
REACH_NODATA = 255
KERNELS = ("exponential", "gaussian", "2dt")


@dataclass
class DispersalSettings:
    """The dispersal assumption: kernel family, mean distance per step (km), 2Dt shape."""

    kernel: str = "exponential"
    mean_distance_km: float = 1.0
    shape: float | None = None
    mean_distance_range_km: tuple | None = None  # (low, high): per-replicate draws, stochastic mode only
    # None: truncate where the tail mass falls to the float64 pressure floor (1e-12), or at
    # the domain, whichever comes first (:func:`kernels_for_grid`)
    tail_tolerance: float | None = None

    def __post_init__(self):
        if self.kernel not in KERNELS:
            raise InputError(f"--kernel must be one of {', '.join(KERNELS)}, got {self.kernel!r}")
        if not (self.mean_distance_km > 0 and math.isfinite(self.mean_distance_km)):
            raise InputError(f"--mean-distance-km must be > 0, got {self.mean_distance_km!r}")
        if self.mean_distance_range_km is not None:
            lo, hi = self.mean_distance_range_km
            if not (0 < lo <= hi):
                raise InputError(f"--mean-distance-km range must be 0 < low <= high, got {lo}:{hi}")


def check_timing(now_year, years, step_years, rate, persistence_years) -> None:
    """Refuse a time loop that cannot be what the user meant, before any grid is read.

    Horizons must follow the start year; a step must be positive and no longer than the
    whole span (a longer one would take no dispersal step at all before the last horizon);
    the colonisation rate positive; persistence zero or more years. Every value finite.
    """
    values = {"--now-year": now_year, "--step-years": step_years, "--rate": rate,
              "--persistence-years": persistence_years}
    for flag, value in list(values.items()) + [("--years", y) for y in years]:
        if not math.isfinite(float(value)):
            raise InputError(f"{flag} must be a finite number, got {value!r}")
    if not years:
        raise InputError("reach needs at least one future suitability map (--future) and its year (--years)")
    first, last = min(float(y) for y in years), max(float(y) for y in years)
    if first <= now_year:
        raise InputError(f"horizon year {first:g} is not after the start year {now_year:g} (--years)")
    if not step_years > 0:
        raise InputError(f"--step-years must be > 0, got {step_years!r}")
    if step_years > last - now_year + 1e-9:
        raise InputError(f"--step-years {step_years:g} is longer than the {last - now_year:g} years from the start "
                         f"year {now_year:g} (--now-year) to the last horizon {last:g}; give at most "
                         f"{last - now_year:g}")
    if not rate > 0:
        raise InputError(f"--rate must be > 0, got {rate!r}")
    if persistence_years < 0:
        raise InputError(f"--persistence-years must be >= 0 (years an occupied cell outlasts unsuitable climate), "
                         f"got {persistence_years:g}")


@dataclass
class ReachResult:
    """Outputs of :func:`simulate_reach` on the climate grid."""

    classes: xr.DataArray          # uint8 reach classes at the final horizon
    #: year -> DataArray (float32, NaN off the valid cells): expected occupancy / occupancy
    #: probability. A read-only mapping that keeps the snapshots packed
    #: (:class:`envelope.kernels.compact.PackedSnapshots`) and unpacks a new layer on each look-up.
    occupancy: Mapping
    arrival_year: xr.DataArray     # float32 first year with occupancy >= 0.5 (NaN never)
    summary: dict
    front: dict = field(default_factory=dict)  # GeoJSON FeatureCollection
    #: per run (each stochastic replicate, or the one deterministic run): ``area_km2`` of the
    #: reach classes, ``reached_share_of_gain`` and ``front_advance_km``
    runs: list = field(default_factory=list)
    #: share of the runs in which a cell is occupied (>= 0.5) at the last horizon, float32 (y, x)
    reached_share: xr.DataArray | None = None


#: Largest kernel quadrant (cells) discretised for a domain-sized support; beyond it the
#: support is capped (memory and quadrature time) and the truncated tail mass says so.
MAX_KERNEL_QUADRANT_CELLS = 50_000_000


#: Grids above this many cells spread in float32 with ``precision="auto"``: a float64 run of
#: 10,000 x 10,000 cells peaks at 8.7 GiB, a float32 run at 4.7 GiB (bench/bench_reach_scale.py).
FLOAT32_ABOVE_CELLS = 25_000_000
PRECISIONS = ("auto", "float64", "float32")


def spread_dtype(precision: str, n_cells: int) -> np.dtype:
    """The dtype of a reach run: ``precision`` as given, or for "auto" float32 above :data:`FLOAT32_ABOVE_CELLS`."""
    if precision not in PRECISIONS:
        raise InputError(f"precision must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    if precision == "auto":
        return np.dtype(np.float32 if n_cells > FLOAT32_ABOVE_CELLS else np.float64)
    return np.dtype(precision)


def kernel_tail_tolerance(settings: DispersalSettings) -> float:
    """Tail mass at which the kernel is cut: the settings' value, or the float64 pressure floor.

    A kernel cut where its tail mass equals the pressure floor changes no cell's pressure by
    more than the floor (occupancy is at most 1 everywhere), the level below which the spread
    step drops pressure anyway.
    """
    if settings.tail_tolerance is None:
        return float(DEFAULT_PRESSURE_FLOOR[np.dtype(np.float64)])
    return float(settings.tail_tolerance)


def kernels_for_grid(grid: xr.DataArray, settings: DispersalSettings, mean_km: float | None = None,
                     geographic: bool = True):
    """Discretise the kernel on ``grid``; returns (kernel or latitude bands, truncated tail mass).

    The support is the disc where the tail mass reaches :func:`kernel_tail_tolerance`, clipped
    to the domain: at most ny - 1 rows and nx - 1 columns from the source, the farthest any
    two cells of the grid lie apart. For the 2Dt kernel the domain is usually the bound. The
    weights are not renormalised: the mass beyond the support (the returned tail mass, the
    largest over latitude bands) is lost like any other mass leaving the grid; with a
    domain-sized support it lies beyond the grid from every cell.

    On geographic grids the E–W size of a cell shrinks with latitude; rows are grouped into
    latitude bands within which it varies by under 5 %, one kernel per band
    (:func:`envelope.kernels.dispersal.latitude_band_kernels`). On projected grids the cell
    size in km comes from the transform (CRS units converted to metres).
    """
    mean = settings.mean_distance_km if mean_km is None else mean_km
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    transform = grid.rio.transform()
    tol = kernel_tail_tolerance(settings)
    support = (ny - 1, nx - 1)
    # memory guard: a quadrant of ny x nx cells is the most a domain-sized kernel needs
    cap = None if ny * nx <= MAX_KERNEL_QUADRANT_CELLS else int(math.isqrt(MAX_KERNEL_QUADRANT_CELLS)) - 1
    if geographic:
        kernels, tails = dispersal.latitude_band_kernels(
            settings.kernel, mean, settings.shape, lat_centres_deg=np.asarray(grid["y"].values),
            dlon_deg=abs(transform.a), dlat_deg=abs(transform.e), tail_tolerance=tol, max_radius_cells=cap,
            normalise=False, support_cells=support, return_tail_mass=True)
        return kernels, float(max(tails))
    unit = grid.rio.crs.linear_units_factor[1] if grid.rio.crs is not None else 1.0
    kernel, tail = dispersal.discretise_kernel(
        settings.kernel, mean, settings.shape, cell_dx_km=abs(transform.a) * unit / 1000.0,
        cell_dy_km=abs(transform.e) * unit / 1000.0, tail_tolerance=tol, max_radius_cells=cap,
        normalise=False, support_cells=support, return_tail_mass=True)
    return kernel, float(tail)


def build_operator(grid: xr.DataArray, settings: DispersalSettings, mean_km: float | None = None,
                   geographic: bool = True) -> SpreadOperator:
    """Discretise the kernel on ``grid`` (:func:`kernels_for_grid`) and build its spread operator.

    On a geographic grid that circles the globe the x axis is periodic: spread wraps round
    in longitude instead of stopping at the grid's east and west edges.
    """
    kernels, _ = kernels_for_grid(grid, settings, mean_km, geographic)
    return SpreadOperator((grid.sizes["y"], grid.sizes["x"]), kernels, periodic_x=spans_globe(grid))


def reach_classes(now_suitable, future_suitable, habitat, reached, valid) -> np.ndarray:
    """Reach class per cell (codes in :data:`REACH_CLASSES`)."""
    out = np.zeros(now_suitable.shape, dtype=np.uint8)
    gained = ~now_suitable & future_suitable
    out[now_suitable & ~future_suitable] = 1
    out[now_suitable & future_suitable] = 2
    out[gained & (habitat > 0) & reached] = 3
    out[gained & (habitat > 0) & ~reached] = 4
    out[gained & ~(habitat > 0)] = 5
    out[~valid] = REACH_NODATA
    return out


def _float_values(values) -> np.ndarray:
    """``values`` as a float array, without a copy when they are float already."""
    arr = np.asarray(values)
    return arr if arr.dtype.kind == "f" else arr.astype(np.float64)


def occupied_start(start, grid, dtype=np.float64) -> np.ndarray:
    """Start occupancy as a 0–1 ``dtype`` array on the grid (NaN and infinities -> 0); out-of-range values are an error.

    The range is checked on the values as given, before any conversion to ``dtype``.
    """
    arr = _float_values(start)
    if arr.shape != (grid.sizes["y"], grid.sizes["x"]):
        raise InputError(f"start occupancy has shape {arr.shape}, the climate grid {grid.shape[-2:]}")
    unset = ~np.isfinite(arr)
    lo = float(np.min(arr, where=~unset, initial=np.inf))
    hi = float(np.max(arr, where=~unset, initial=-np.inf))
    if unset.any():  # read as 0
        lo, hi = min(lo, 0.0), max(hi, 0.0)
    if lo < 0 or hi > 1:
        raise InputError(f"start occupancy must lie in 0..1, found {lo:g}..{hi:g}")
    out = arr.astype(dtype)  # a copy: the caller's array is not changed
    out[unset] = 0.0
    return out


def habitat_array(habitat, dtype=np.float64) -> np.ndarray:
    """Habitat quality as a ``dtype`` array, NaN (no data) read as 0 = no habitat; values outside 0–1 are an error.

    The range is checked on the values as given, before any conversion to ``dtype``.
    """
    hab = _float_values(getattr(habitat, "values", habitat))
    lo, hi = np.nanmin(hab), np.nanmax(hab)
    if lo < 0 or hi > 1:
        raise InputError(f"habitat must lie in 0..1, found {lo:g}..{hi:g}")
    out = hab.astype(dtype)  # a copy: the caller's array is not changed
    out[np.isnan(out)] = 0.0  # in range, so NaN is the only value that is not finite
    return out


def simulate_reach(now: xr.DataArray, futures: list, habitat: xr.DataArray, start, *, threshold: float,
                   settings: DispersalSettings, now_year: float = 2020, step_years: float = 1.0,
                   rate: float = 1.0, persistence_years: float = 0.0, replicates: int = 0, seed: int = 0,
                   snapshot_every_years: float = 10.0, cell_area_km2=None, progress=None,
                   fragmentation_band_deg: float | None = 1.0, precision: str = "auto") -> ReachResult:
    """Step habitat-gated dispersal from ``now_year`` through each future horizon.

    Parameters
    ----------
    now : DataArray (y, x)
        Suitability (0–1) today.
    futures : list of (year, DataArray)
        Suitability at each horizon year (sorted or not); the climate in between is the
        linear interpolation of the bracketing maps (:class:`ClimatePath`).
    habitat : DataArray (y, x)
        Habitat quality 0–1 on the climate grid (no habitat = 0: never colonised).
    start : ndarray (y, x)
        Occupancy today (0/1 from records or a raster).
    threshold : float
        Suitability threshold; a cell is suitable when suitability >= threshold.
    settings : DispersalSettings
        Kernel and mean dispersal distance per step.
    step_years, rate, persistence_years : float
        Years per step; colonisation rate R per step; years an occupied cell survives
        unsuitable climate before it is lost.
    replicates : int
        0: deterministic expected occupancy. N > 0: N seeded stochastic replicates; the
        occupancy is then the share of replicates in which a cell is occupied.
    cell_area_km2 : ndarray (y, x), optional
        True cell areas; computed from the grid when omitted.
    fragmentation_band_deg : float or None, default=1.0
        Width of the latitude bands of the summary's ``fragmentation_by_latitude`` (habitat
        amount and Jaeger's effective mesh size per band, habitat = fraction >= 0.5, land =
        cells with climate data; :func:`envelope.habitat.fragmentation_summary`). None: no table.
    precision : {"auto", "float64", "float32"}, default="auto"
        Precision of the spread (:class:`envelope.kernels.spread.SpreadOperator`) and of the
        occupancy kept in memory. float32 halves the memory; its FFT round-off (~1e-7) needs
        a pressure floor of 1e-5 instead of 1e-12, so colonisation pressure below 1e-5 per
        step (the kernel's far tail) is dropped. "auto": float64 up to
        :data:`FLOAT32_ABOVE_CELLS` cells, float32 above (where float64 would not fit in the
        memory of a workstation). The summary reports ``precision`` and ``pressure_floor``.

    Returns
    -------
    ReachResult
    """
    from envelope.grids import cell_area_km2 as _areas, is_geographic

    if not futures:
        raise InputError("reach needs at least one future suitability map (--future)")
    futures = sorted(futures, key=lambda t: float(t[0]))
    years = [float(y) for y, _ in futures]
    check_timing(now_year, years, step_years, rate, persistence_years)
    if replicates < 0:
        raise InputError(f"--replicates must be >= 0, got {replicates}")
    geographic = is_geographic(now)
    dtype = spread_dtype(precision, now.sizes["y"] * now.sizes["x"])
    now_arr = np.asarray(now.values, dtype=dtype)
    maps = [now_arr] + [np.asarray(f.values, dtype=dtype) for _, f in futures]
    hab = habitat_array(habitat, dtype)
    start_arr = occupied_start(start, now, dtype)
    valid = np.isfinite(now_arr)
    for _, f in futures:
        valid &= np.isfinite(np.asarray(f.values))
    if cell_area_km2 is not None:
        areas = np.asarray(cell_area_km2, dtype=np.float64)
    elif geographic and now.sizes["x"] > 1:  # areas depend on the row only: one column, broadcast
        column = np.asarray(_areas(now.isel(x=slice(0, 2))).values, dtype=np.float64)[:, :1]
        areas = np.broadcast_to(column, now.shape)
    else:
        areas = np.asarray(_areas(now).values, dtype=np.float64)

    rngs = None
    if replicates:
        seeds = np.random.SeedSequence(seed).spawn(replicates)
        rngs = [np.random.default_rng(s) for s in seeds]
    if replicates and settings.mean_distance_range_km is not None:
        lo, hi = settings.mean_distance_range_km
        draw = np.random.default_rng(np.random.SeedSequence(seed).spawn(replicates + 1)[-1])
        means = draw.uniform(lo, hi, size=replicates)
        built = [kernels_for_grid(now, settings, m, geographic) for m in means]
        operators = [SpreadOperator(now_arr.shape, k, periodic_x=spans_globe(now), dtype=dtype) for k, _ in built]
        tail_mass = max(t for _, t in built)
    else:
        kernels, tail_mass = kernels_for_grid(now, settings, None, geographic)
        operators = SpreadOperator(now_arr.shape, kernels, periodic_x=spans_globe(now), dtype=dtype)

    climate = ClimatePath([now_year] + years, maps, dtype=dtype)
    persistence_steps = int(math.ceil(persistence_years / step_years - 1e-9)) if persistence_years > 0 else 0
    end_year = years[-1]
    snaps = set(years)
    if snapshot_every_years and snapshot_every_years > 0:
        y = now_year + snapshot_every_years
        while y < end_year:
            snaps.add(float(y))
            y += snapshot_every_years
    result = run_transient(operators, start_arr, hab, climate, threshold=threshold, start_year=now_year,
                           end_year=end_year, step_years=step_years, rate=rate,
                           persistence_steps=persistence_steps, rngs=rngs, snapshot_years=sorted(snaps),
                           progress=progress, dtype=dtype)
    del operators, rngs  # the kernel spectra: about one grid's worth

    # Big arrays are let go as soon as they are used up: on a 10,000 x 10,000 grid each is
    # 0.4 GB in float32 (bench/bench_reach_scale.py).
    now_suit = valid & (now_arr >= threshold)
    fut_suit = valid & (maps[-1] >= threshold)
    del now_arr, maps, climate
    final = result.final
    classes = reach_classes(now_suit, fut_suit, hab, final >= 0.5, valid)
    occupied_horizon = _occupied_area(final, areas, valid)  # before the arrays of the edge and front exist

    def area(mask):
        return float(areas[mask].sum())

    lats = cell_lonlat(now)[0]
    start_occ = start_arr >= 0.5
    # The leading edge is measured on expected occupancy (area x occupancy weights); the
    # starting edge and front use the start cells whose climate is suitable today, so records
    # the model cannot hold (outside its climatic range) do not show up as a retreat.
    held = start_occ & now_suit
    held = held if held.any() else start_occ & valid
    edges = edge_shift_summary(lats, areas, held, valid & (final > 1e-6), occupancy_before=start_arr,
                               occupancy_after=final)
    north = edges["poleward"] != "south"
    held_start = np.where(held, start_arr, 0.0)
    del held
    front_move = front_advance_summary(lats, held_start, final, valid, north=north)

    def run_values(cls, final):
        """Areas of one run's classes, its reached share of the gain and its front advance."""
        a = {name: area(cls == code) for code, name in ((3, "gained_reached"), (4, "gained_unreached"),
                                                        (5, "gained_no_habitat"), (1, "lost"), (2, "stable"))}
        gained = a["gained_reached"] + a["gained_unreached"] + a["gained_no_habitat"]
        front_km = (front_move["front_advance_km"] if final is None else
                    front_advance_summary(lats, held_start, final, valid, north=north)["front_advance_km"])
        return {"area_km2": a, "reached_share_of_gain": a["gained_reached"] / gained if gained > 0 else None,
                "front_advance_km": front_km}

    if replicates:
        finals = (np.asarray(r, dtype=np.float64) for r in result.replicate_final)  # one at a time
        runs = [run_values(reach_classes(now_suit, fut_suit, hab, f >= 0.5, valid), f) for f in finals]
        result.replicate_final = None
    else:
        runs = [run_values(classes, None)]
    whole = run_values(classes, None) if replicates else runs[0]
    duration = end_year - now_year
    summary = {
        "area_km2": whole["area_km2"],
        "reached_share_of_gain": whole["reached_share_of_gain"],
        "occupied_km2": {"start": area(start_occ & valid), "horizon": occupied_horizon},
        "front_advance_km": front_move["front_advance_km"],
        "spread_rate_km_per_decade": (front_move["front_advance_km"] / duration * 10.0
                                      if front_move["front_advance_km"] is not None else None),
        "front_level": front_move["front_level"],
        "front_columns_used": front_move["front_columns_used"],
        "front_columns_total": front_move["front_columns_total"],
        "leading_edge_shift_km": edges["leading_edge_shift_km"],
        "poleward": edges["poleward"],
        "edge_percentile": edges["percentile"],
        "start_year": now_year,
        "horizon_years": years,
        "threshold": threshold,
        "kernel": settings.kernel,
        "mean_distance_km": settings.mean_distance_km,
        "mean_distance_range_km": list(settings.mean_distance_range_km) if settings.mean_distance_range_km else None,
        "shape": settings.shape,
        "kernel_tail_tolerance": kernel_tail_tolerance(settings),
        "kernel_tail_mass_truncated": tail_mass,
        "pressure_floor": float(DEFAULT_PRESSURE_FLOOR[dtype]),
        "precision": dtype.name,
        "step_years": step_years,
        "rate": rate,
        "persistence_years": persistence_years,
        "mode": "stochastic" if replicates else "deterministic",
        "replicates": replicates,
        "seed": seed,
        "n_start_cells": int(start_occ.sum()),
        "n_start_cells_unsuitable": int((start_occ & ~now_suit).sum()),
        "climate_interpolation": "linear in time between the given suitability maps",
    }
    del held_start, start_arr, start_occ, now_suit, fut_suit
    if fragmentation_band_deg is not None:
        summary["fragmentation_by_latitude"] = _fragmentation(now, hab, valid, fragmentation_band_deg)
    del hab
    # a template without data: each layer below gets its own array
    like = now.copy(data=np.broadcast_to(np.float32(0.0), now.shape))
    layer = _ValidLayer(like, valid)
    # the snapshots stay packed; each look-up unpacks one float32 layer (NaN off the valid cells)
    occupancy = result.snapshots.mapped(layer)
    arrival = layer(result.arrival_year)
    result.arrival_year = None
    classes_da = now.copy(data=classes).astype(np.uint8)
    del classes
    front = front_geojson(now, occupancy, level=0.5)
    # reached share: the replicates' mean occupancy, or the one run's 0/1 state (as float32)
    reached_share = layer(final if replicates else (final >= 0.5))
    return ReachResult(classes=classes_da, occupancy=occupancy, arrival_year=arrival, summary=summary, front=front,
                       runs=runs, reached_share=reached_share)


def _occupied_area(occupancy, areas, valid) -> float:
    """Sum of area x occupancy over the valid cells, float64 (the products of the valid cells only are held)."""
    weighted = areas[valid]  # a new array (areas may be a broadcast view)
    weighted *= occupancy[valid]
    return float(weighted.sum())


class _ValidLayer:
    """Values -> a float32 layer on the grid of ``like``, NaN off the valid cells (picklable).

    A float32 array handed in is taken over and changed in place; any other is converted.
    The valid cells are kept as bits.
    """

    def __init__(self, like: xr.DataArray, valid: np.ndarray):
        self.like, self.shape = like, valid.shape
        self.invalid = np.packbits(~valid)

    def __call__(self, values) -> xr.DataArray:
        values = np.asarray(values).astype(np.float32, copy=False)
        invalid = np.unpackbits(self.invalid, count=values.size).view(bool).reshape(self.shape)
        values[invalid] = np.nan
        return self.like.copy(data=values)


def _fragmentation(grid, habitat, land, band_deg, threshold=0.5) -> dict:
    """Habitat amount and effective mesh size by latitude band on the climate grid (land = cells with climate data)."""
    from envelope.habitat import fragmentation_by_latitude, fragmentation_summary

    table = fragmentation_by_latitude(grid.copy(data=habitat.astype(np.float32)), threshold=threshold,
                                      band_deg=band_deg, land_mask=grid.copy(data=land.astype(np.float32)))
    return fragmentation_summary(table, threshold=threshold, band_deg=band_deg, land="cells with climate data")


def edge_shift_summary(lat, area, before, after, percentile: float = 95.0, weights_after=None, *,
                       occupancy_before=None, occupancy_after=None) -> dict:
    """Poleward shift (km along the meridian) of the leading edge between two masks.

    The leading edge of a set of cells is the weighted ``percentile`` of their latitude
    on the poleward side (the 95th percentile in the northern hemisphere, the 5th in the
    southern; the hemisphere is that of the ``before`` cells' mean latitude). Weights are
    the cell areas, or ``weights_after`` (area x expected occupancy) for the later set;
    ``occupancy_before`` / ``occupancy_after`` weigh each set by area x that occupancy,
    multiplied on the set's cells only (no product grid is made).
    Positive shifts are poleward.
    """
    from envelope.kernels.change import meridian_arc_km, weighted_quantile

    lat = np.asarray(lat, dtype=np.float64)
    if not before.any() or not after.any():
        return {"leading_edge_shift_km": None, "poleward": None, "percentile": percentile}

    def weights(mask, occupancy, given):
        if occupancy is not None:
            return area[mask] * np.asarray(occupancy)[mask]
        return (area if given is None else np.asarray(given, dtype=np.float64))[mask]

    w_before = weights(before, occupancy_before, None)
    lat_before = lat[before]
    north = float(np.average(lat_before, weights=w_before)) >= 0
    q = percentile / 100.0 if north else 1.0 - percentile / 100.0
    q = min(max(q, 1e-9), 1.0)
    lat0 = weighted_quantile(lat_before, w_before, q)
    del lat_before, w_before
    lat1 = weighted_quantile(lat[after], weights(after, occupancy_after, weights_after), q)
    shift = meridian_arc_km(lat0, lat1)
    return {"leading_edge_shift_km": shift if north else -shift, "poleward": "north" if north else "south",
            "percentile": percentile, "edge_lat_start": lat0, "edge_lat_horizon": lat1}


def front_advance_summary(lat, before, after, valid, *, north: bool = True, level: float = 0.5) -> dict:
    """Poleward advance (km along the meridian) of the expansion front, the ``level`` occupancy contour.

    Each cell's position is its meridian arc from the equator (WGS84), negated when poleward
    is south. In every grid column the front is the farthest poleward crossing of ``level``,
    interpolated between cell centres (:func:`envelope.kernels.front.column_front_positions`);
    the advance is the median over the columns that have a front at both times of the
    poleward shift between ``before`` and ``after``. Columns whose front lies at the grid's
    poleward edge or against cells without data are skipped.
    """
    from envelope.kernels.change import meridian_distance_m
    from envelope.kernels.front import front_shift

    lat = np.asarray(lat, dtype=np.float64)
    if lat.ndim == 2 and lat.strides[1] == 0:  # one latitude per row (a broadcast view): compute per row
        position = np.broadcast_to(meridian_distance_m(lat[:, :1]) / 1000.0 * (1.0 if north else -1.0), lat.shape)
    else:
        position = meridian_distance_m(lat) / 1000.0 * (1.0 if north else -1.0)
    moved = front_shift(np.asarray(before), np.asarray(after), position, level=level, valid=valid)
    return {"front_advance_km": moved.shift_km if moved.n_columns else None, "front_level": level,
            "front_columns_used": moved.n_columns, "front_columns_total": moved.n_columns_total}


def cell_lonlat(grid: xr.DataArray):
    """Latitude and longitude of every cell centre (2-D), via pyproj for projected grids."""
    x, y = np.asarray(grid["x"].values, dtype=np.float64), np.asarray(grid["y"].values, dtype=np.float64)
    crs = grid.rio.crs
    if crs is None or crs.is_geographic:
        # read-only broadcast views: a large grid gets no two full coordinate arrays
        shape = (y.size, x.size)
        return np.broadcast_to(y[:, None], shape), np.broadcast_to(x[None, :], shape)
    xs, ys = np.meshgrid(x, y)
    import pyproj

    tr = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(xs, ys)
    return np.asarray(lat), np.asarray(lon)


def _unwrap_degrees(lon: np.ndarray) -> np.ndarray:
    """Longitudes along a line made continuous (no 360° jumps between neighbouring vertices)."""
    if lon.size < 2:
        return lon
    return np.rad2deg(np.unwrap(np.deg2rad(lon)))


def _crossing_window(values, level):
    """``((r0, r1), (c0, c1))``: the rows and columns (with one cell of margin) where
    neighbouring cells straddle ``level`` (NaN read as 0), or None when none do. Contouring
    only that window gives the same lines as the whole grid, in a fraction of the memory."""
    above = np.greater_equal(values, level)  # NaN compares False, as 0 would
    rows = np.zeros(above.shape[0], dtype=bool)
    cols = np.zeros(above.shape[1], dtype=bool)
    if above.shape[1] > 1:
        across = above[:, 1:] != above[:, :-1]
        rows |= across.any(axis=1)
        hit = across.any(axis=0)
        cols[:-1] |= hit
        cols[1:] |= hit
        del across
    if above.shape[0] > 1:
        down = above[1:] != above[:-1]
        hit = down.any(axis=1)
        rows[:-1] |= hit
        rows[1:] |= hit
        cols |= down.any(axis=0)
        del down
    if not rows.any():
        return None
    r = np.flatnonzero(rows)
    c = np.flatnonzero(cols) if cols.any() else np.arange(above.shape[1])
    return ((max(int(r[0]) - 1, 0), min(int(r[-1]) + 2, above.shape[0])),
            (max(int(c[0]) - 1, 0), min(int(c[-1]) + 2, above.shape[1])))


def front_geojson(grid: xr.DataArray, occupancy: dict, level: float = 0.5) -> dict:
    """The expansion front: the ``level`` occupancy contour at each snapshot year, as GeoJSON.

    Lines are in longitude/latitude (RFC 7946), longitudes in −180…180; a line that crosses the
    180° meridian is cut in two there (RFC 7946 §3.1.9). Each feature carries its ``year``
    and ``level``.
    """
    import contourpy

    transform = grid.rio.transform()
    crs = grid.rio.crs
    to_lonlat = None
    if crs is not None and not crs.is_geographic:
        import pyproj

        to_lonlat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform
    features = []
    for year in sorted(occupancy):  # one layer at a time (a packed mapping unpacks on look-up)
        occ = occupancy[year]
        window = _crossing_window(occ.values, level)
        lines = []
        if window is None:
            features.append({"type": "Feature", "properties": {"year": float(year), "level": level},
                             "geometry": {"type": "MultiLineString", "coordinates": lines}})
            continue
        (r0, r1), (c0, c1) = window
        sub = occ.values[r0:r1, c0:c1]
        z = np.where(np.isfinite(sub), sub, 0.0).astype(np.float64)
        gen = contourpy.contour_generator(z=z, line_type=contourpy.LineType.Separate)
        for seg in gen.lines(level):
            cols, rows = seg[:, 0] + 0.5 + c0, seg[:, 1] + 0.5 + r0
            x, y = transform * (cols, rows)
            if to_lonlat is not None:
                x, y = to_lonlat(x, y)
                x = _unwrap_degrees(np.asarray(x, dtype=np.float64))
            # longitudes in -180..180, a line over the 180 deg meridian cut there (RFC 7946 3.1.9)
            for px, py in split_at_antimeridian(x, y):
                if px.size > 1:
                    lines.append([[round(float(a), 6), round(float(b), 6)] for a, b in zip(px, py)])
        features.append({"type": "Feature", "properties": {"year": float(year), "level": level},
                         "geometry": {"type": "MultiLineString", "coordinates": lines}})
    return {"type": "FeatureCollection", "features": features}
