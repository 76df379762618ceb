"""Regenerate the fictional demo study (invented island, invented species) byte for byte.

    python sample_grids/make_demo.py [--out sample_grids/demo]

Everything is drawn from fixed seeds (numpy default_rng); GeoTIFFs are written with fixed
creation options and no timestamps, NetCDF as classic netCDF-3, CSVs with fixed number
formats, so two runs give identical files. See sample_grids/README.md for what each file is.
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import shutil
import sys
from pathlib import Path

import numpy as np
from scipy import ndimage

from envelope.study.demo import (
    CLIMATE_UNITS,
    CLIMATE_VARIABLES,
    DARWIN_CORE_COLUMNS,
    NICHE,
    OCEAN_BOX,
    SCENARIO_COLUMNS,
    SPECIES,
    true_suitability,
)
from envelope.errors import InputError

os.environ.setdefault("GDAL_PAM_ENABLED", "NO")  # no .aux.xml side files

SEED = 20240611
RES = 0.04  # degrees; 250 x 250 cells over the 10 x 10 degree box
MARGIN = 1.0  # degrees of open sea around the box in the work grid (for the 1-degree model grid)
FINE = 4  # land cover is drawn 4x finer than the study grid, then aggregated
COARSE_MONTHLY = 5  # monthly GeoTIFFs on a 5x coarser grid (0.2 degrees)
MODEL_RES = 1.0  # the coarse "climate model" NetCDF grid
KM_PER_DEG_LAT = 111.2  # From memory: mean length of one degree of latitude, km
LAPSE_RATE = 0.0065  # degC per m; common practice (the standard-atmosphere lapse rate), no source
DAYS = 365.0

PATHWAYS = {"low": {2050: 1.1, 2080: 1.5}, "high": {2050: 1.7, 2080: 3.2}}  # regional warming, degC
MODELS = ("model-a", "model-b", "model-c")

LANDCOVER_CLASSES = (  # code, name, habitat quality for an open-ground beetle
    (1, "open grassland", 1.0),
    (2, "heath and scrub", 0.6),
    (3, "woodland", 0.05),
    (4, "farmland", 0.15),
    (5, "bare ground and rock", 0.3),
    (6, "wetland", 0.0),
    (7, "settlement", 0.0),
)

N_PRESENCES = 420
N_TRUTH = 2000


# --------------------------------------------------------------------------- helpers

def rng_for(part):
    """An independent stream per part, so changing one part leaves the others as they were."""
    return np.random.default_rng([SEED, sum(ord(c) * 31**i for i, c in enumerate(part)) % 2**32])


def smooth_noise(rng, shape, sigma):
    """Gaussian-filtered white noise scaled to mean 0, standard deviation 1."""
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="reflect")
    return (field - field.mean()) / field.std()


def block_mean(a, k):
    """Mean over k x k blocks of the last two axes, ignoring NaN (NaN where a block is all NaN)."""
    *lead, ny, nx = a.shape
    b = a.reshape(*lead, ny // k, k, nx // k, k)
    valid = np.isfinite(b)
    total = np.where(valid, b, 0.0).sum(axis=(-3, -1))
    count = valid.sum(axis=(-3, -1))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def quantise(a, step):
    """Round to a multiple of step (so the files compress), keeping NaN."""
    return (np.round(np.asarray(a, dtype="float64") / step) * step).astype("float32")


class Grid:
    """A north-up lon/lat grid: centres, transform and cell sizes in km."""

    def __init__(self, west, south, east, north, res):
        self.west, self.south, self.east, self.north, self.res = west, south, east, north, res
        self.nx = int(round((east - west) / res))
        self.ny = int(round((north - south) / res))
        self.lon = west + res * (np.arange(self.nx) + 0.5)
        self.lat = north - res * (np.arange(self.ny) + 0.5)
        self.LON, self.LAT = np.meshgrid(self.lon, self.lat)

    @property
    def transform(self):
        from rasterio.transform import from_origin

        return from_origin(self.west, self.north, self.res, self.res)

    def cell_km(self):
        """(dy, dx) of a cell in km at the box's mid-latitude: enough for smooth distances."""
        mid = np.deg2rad(0.5 * (self.south + self.north))
        return self.res * KM_PER_DEG_LAT, self.res * KM_PER_DEG_LAT * np.cos(mid)


def write_geotiff(path, grid, bands, *, names, units, tags=None, dtype="float32", nodata=np.nan, categories=None):
    """Tiled DEFLATE GeoTIFF with band descriptions and per-band ``units`` tags."""
    import rasterio

    bands = np.asarray(bands)
    if bands.ndim == 2:
        bands = bands[None]
    floating = np.dtype(dtype).kind == "f"
    profile = {
        "driver": "GTiff",
        "width": grid.nx,
        "height": grid.ny,
        "count": bands.shape[0],
        "dtype": dtype,
        "crs": "EPSG:4326",
        "transform": grid.transform,
        "nodata": nodata,
        "tiled": True,
        "blockxsize": 128,
        "blockysize": 128,
        "compress": "DEFLATE",
        "zlevel": 9,
        "predictor": 3 if floating else 2,
        "interleave": "band",
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(bands.astype(dtype))
        for i, (name, unit) in enumerate(zip(names, units), start=1):
            dst.set_band_description(i, name)
            dst.update_tags(i, units=unit)
        base = {"fictional": "yes: invented landscape in the open North Pacific, no real place"}
        if categories:
            base["categories"] = ";".join(f"{c}={n}" for c, n, _ in categories)
        dst.update_tags(**base, **(tags or {}))


def write_csv(path, header, rows):
    with open(path, "w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)


# --------------------------------------------------------------------------- landscape

def make_land(work):
    """Invented island: an ellipse with noisy edges (smooth noise + radial falloff)."""
    rng = rng_for("land")
    # rotate ~20 degrees so the island runs NNE-SSW
    u0, v0 = (work.LON + 147.0) / 3.4, (work.LAT - 41.0) / 3.9
    th = np.deg2rad(20.0)
    u, v = u0 * np.cos(th) - v0 * np.sin(th), u0 * np.sin(th) + v0 * np.cos(th)
    field = 1.0 - (u**2 + v**2) + 0.30 * smooth_noise(rng, work.LAT.shape, 14) + 0.12 * smooth_noise(rng, work.LAT.shape, 4)
    # keep the coast at least ~0.5 degree inside the box whatever the noise does
    inside = np.minimum.reduce([work.LON - OCEAN_BOX[0], OCEAN_BOX[2] - work.LON,
                                work.LAT - OCEAN_BOX[1], OCEAN_BOX[3] - work.LAT])
    field -= 3.0 * np.clip((0.8 - inside) / 0.8, 0.0, None)
    land = field > 0.0
    labels, n = ndimage.label(land)
    sizes = ndimage.sum(land, labels, index=np.arange(1, n + 1))
    keep = np.isin(labels, 1 + np.flatnonzero(sizes >= 40))  # drop specks, keep a few islets
    return ndimage.binary_fill_holes(keep)


def distance_to_coast_km(work, land):
    return ndimage.distance_transform_edt(land, sampling=work.cell_km())


def make_elevation(work, land, dist):
    """Sum of a NNE ridge, a few Gaussian hills and filtered noise, tapered to 0 at the coast."""
    rng = rng_for("elevation")
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    ridge_lon = -147.6 + 0.35 * (work.LAT - 41.0) + 0.35 * np.sin((work.LAT - 36.0) / 1.7)
    across = (work.LON - ridge_lon) * km_x
    along = 0.75 + 0.25 * smooth_noise(rng, work.LAT.shape, 20)
    elev = 1900.0 * np.exp(-0.5 * (across / 38.0) ** 2) * along
    for _ in range(7):
        lon = rng.uniform(-150.0, -144.0)
        lat = rng.uniform(37.5, 44.5)
        height = rng.uniform(250.0, 900.0)
        width = rng.uniform(12.0, 30.0)
        r2 = ((work.LON - lon) * km_x) ** 2 + ((work.LAT - lat) * KM_PER_DEG_LAT) ** 2
        elev += height * np.exp(-0.5 * r2 / width**2)
    elev += 120.0 * smooth_noise(rng, work.LAT.shape, 4)
    elev = np.maximum(elev, 5.0) * (1.0 - np.exp(-dist / 12.0))
    return np.where(land, elev, 0.0), ridge_lon


def baseline_state(work, dist, elev, ridge_lon):
    """The smooth fields behind every climate layer (defined over sea too, for the model grid).

    bio1 (annual mean), amp (half the annual range of monthly means), dtr (diurnal range),
    prec (annual total) and dry (summer-drought strength of the monthly precipitation cycle).
    """
    rng = rng_for("climate")
    shape = work.LAT.shape
    cont = 1.0 - np.exp(-dist / 55.0)  # continentality: 0 on the coast, ->1 inland
    bio1 = 19.0 - 0.75 * (work.LAT - 36.0) - LAPSE_RATE * elev + 0.5 * cont + 0.5 * smooth_noise(rng, shape, 15)
    amp = 5.0 + 4.5 * cont + 0.1 * (work.LAT - 36.0) + 0.3 * smooth_noise(rng, shape, 15)
    dtr = np.maximum(6.0 + 6.0 * cont + 0.4 * smooth_noise(rng, shape, 10), 3.0)
    windward = np.tanh((ridge_lon - work.LON) / 0.8)  # westerlies: wet west slope, rain shadow east
    prec = (
        520.0
        + 650.0 * np.exp(-dist / 45.0)
        + 0.8 * elev
        + 220.0 * windward
        + 35.0 * (work.LAT - 36.0)
        + 110.0 * smooth_noise(rng, shape, 12)
    )
    prec = np.maximum(prec, 150.0)
    dry = np.clip(0.88 - 0.05 * (work.LAT - 36.0) + 0.08 * cont + 0.04 * smooth_noise(rng, shape, 15), 0.15, 0.95)
    return {"bio1": bio1, "amp": amp, "dtr": dtr, "prec": prec, "dry": dry, "cont": cont}


def gdd_sinusoid(mean, amp, base=5.0):
    """Degree days above ``base`` of a year whose daily mean is mean + amp cos(2 pi t / 365).

    Analytic: with cos(theta0) = (base - mean)/amp clipped to [-1, 1], the yearly sum is
    365/pi ((mean - base) theta0 + amp sin(theta0)). The diurnal cycle is ignored.
    """
    # Analytic, no source beyond the integral of a clipped cosine.
    theta0 = np.arccos(np.clip((base - mean) / amp, -1.0, 1.0))
    return DAYS / np.pi * ((mean - base) * theta0 + amp * np.sin(theta0))


def monthly(state):
    """Monthly tmin, tmax, prec (12, ...) from the state: cosine cycles, July warmest, winter wettest."""
    m = np.arange(12).reshape(12, *([1] * np.ndim(state["bio1"])))
    tavg = state["bio1"] + state["amp"] * np.cos(2 * np.pi * (m - 6) / 12.0)
    tmax = tavg + state["dtr"] / 2.0
    tmin = tavg - state["dtr"] / 2.0
    prec = state["prec"] / 12.0 * (1.0 + state["dry"] * np.cos(2 * np.pi * m / 12.0))
    return tmin, tmax, prec


def layers(state):
    """The six annual layers, consistent with ``monthly(state)`` by construction.

    bio5 = max monthly tmax = bio1 + amp + dtr/2 (July), bio6 = bio1 - amp - dtr/2 (January),
    bio17 = the Jun-Aug sum = prec/12 (3 - dry (1 + sqrt 3)), gdd5 from the sinusoid.
    """
    bio1 = state["bio1"]
    return {
        "bio1": bio1,
        "bio5": bio1 + state["amp"] + state["dtr"] / 2.0,
        "bio6": bio1 - state["amp"] - state["dtr"] / 2.0,
        "bio12": state["prec"],
        "bio17": state["prec"] / 12.0 * (3.0 - state["dry"] * (1.0 + np.sqrt(3.0))),
        "gdd5": gdd_sinusoid(bio1, state["amp"]),
    }


STEPS = {"bio1": 0.1, "bio5": 0.1, "bio6": 0.1, "bio12": 1.0, "bio17": 1.0, "gdd5": 1.0}


def climate_bands(state, land):
    out = layers(state)
    return np.stack([np.where(land, quantise(out[v], STEPS[v]), np.nan) for v in CLIMATE_VARIABLES]).astype("float32")


def scenario_state(work, state, elev, pathway, model, horizon):
    """Perturb the baseline state: the three invented models warm by different amounts and
    patterns, and disagree on the sign of the precipitation change."""
    rng = rng_for(f"pattern-{model}")
    shape = work.LAT.shape
    t = (work.LAT - 41.0) / 5.0  # -1 south .. +1 north
    if model == "model-a":  # mild, poleward-amplified, wetter
        sens, pattern = 0.8, 1.0 + 0.25 * t
        d_amp, d_dtr, d_dry = 0.15, 0.05, 0.02
        wet_per_deg = 0.035 + 0.01 * t
    elif model == "model-b":  # middling, inland-amplified, drier
        sens, pattern = 1.05, 1.0 + 0.35 * (state["cont"] - 0.5)
        d_amp, d_dtr, d_dry = -0.10, 0.0, 0.04
        wet_per_deg = -0.045 + 0.0 * t
    else:  # model-c: hot, elevation-dependent, wetter north / drier south
        sens, pattern = 1.35, 1.0 + 0.2 * elev / 1000.0 - 0.12 * t + 0.1 * smooth_noise(rng, shape, 30)
        d_amp, d_dtr, d_dry = 0.05, 0.1, 0.03
        wet_per_deg = 0.055 * t - 0.01
    warming = PATHWAYS[pathway][horizon] * sens * pattern
    return {
        "bio1": state["bio1"] + warming,
        "amp": state["amp"] + d_amp * warming,
        "dtr": state["dtr"] + d_dtr * warming,
        "prec": state["prec"] * np.maximum(1.0 + wet_per_deg * warming, 0.2),
        "dry": np.clip(state["dry"] + d_dry * warming, 0.15, 0.97),
        "cont": state["cont"],
    }


# --------------------------------------------------------------------------- habitat

def open_patches(rng, fine, land_f):
    """Open-ground patches as a Poisson scatter of noisy discs: poleward the patches get fewer
    (intensity falls 4-fold) and smaller (median radius falls from 6 to 2.5 km)."""
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    south, north = OCEAN_BOX[1], OCEAN_BOX[3]
    area_km2 = (OCEAN_BOX[2] - OCEAN_BOX[0]) * km_x * (north - south) * KM_PER_DEG_LAT
    peak = 3.0e-3  # patches per km2 at the southern edge
    n = rng.poisson(peak * area_km2)
    lon = rng.uniform(OCEAN_BOX[0], OCEAN_BOX[2], n)
    lat = rng.uniform(south, north, n)
    t = (lat - south) / (north - south)
    keep = rng.random(n) < 1.0 - 0.75 * t  # thinning: intensity 4x lower at the northern edge
    radius = (6.0 - 3.5 * t) * np.exp(0.35 * rng.standard_normal(n))
    field = np.full(fine.LAT.shape, -1.0)
    r_cells = fine.res * KM_PER_DEG_LAT
    for x0, y0, r in zip(lon[keep], lat[keep], radius[keep]):
        j = int((x0 - fine.west) / fine.res)
        i = int((fine.north - y0) / fine.res)
        w = int(np.ceil(1.5 * r / (fine.res * km_x))) + 1
        rows, cols = slice(max(i - w, 0), i + w + 1), slice(max(j - w, 0), j + w + 1)
        d = np.hypot((fine.LON[rows, cols] - x0) * km_x, (fine.LAT[rows, cols] - y0) * KM_PER_DEG_LAT)
        np.maximum(field[rows, cols], 1.0 - d / r, out=field[rows, cols])
    rough = 0.25 * smooth_noise(rng, fine.LAT.shape, 2.5 / r_cells)  # ragged patch edges
    return land_f & (field + rough > 0.0)


def make_landcover(grid, land, elev, towns_lonlat):
    """Land cover drawn on a 4x finer grid: open patches get fewer and smaller poleward."""
    rng = rng_for("landcover")
    fine = Grid(grid.west, grid.south, grid.east, grid.north, grid.res / FINE)
    shape = fine.LAT.shape
    land_f = np.repeat(np.repeat(land, FINE, 0), FINE, 1)
    elev_f = ndimage.zoom(elev, FINE, order=1, mode="nearest")
    open_ground = open_patches(rng, fine, land_f)
    kind = smooth_noise(rng, shape, 10)
    farm = smooth_noise(rng, shape, 16)
    wet = smooth_noise(rng, shape, 8)
    rock_noise = smooth_noise(rng, shape, 6)
    cover = np.full(shape, 3, dtype="uint8")  # woodland by default
    cover[(farm > 0.3) & (elev_f < 450)] = 4
    cover[open_ground & (kind > -0.3)] = 1
    cover[open_ground & (kind <= -0.3)] = 2
    cover[(wet > 1.3) & (elev_f < 150)] = 6
    cover[elev_f + 250 * rock_noise > 1500] = 5
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    for lon, lat in towns_lonlat:
        r = np.hypot((fine.LON - lon) * km_x, (fine.LAT - lat) * KM_PER_DEG_LAT)
        cover[r < 3.5] = 7
    cover[~land_f] = 0
    quality = np.zeros(8)
    for code, _, q in LANDCOVER_CLASSES:
        quality[code] = q
    habitat = block_mean(np.where(land_f, quality[cover], np.nan), FINE)
    # Study-grid class: the commonest fine class in each block (ties -> lowest code).
    blocks = cover.reshape(grid.ny, FINE, grid.nx, FINE).transpose(0, 2, 1, 3).reshape(grid.ny, grid.nx, FINE * FINE)
    counts = np.stack([(blocks == c).sum(-1) for c in range(8)], axis=-1)
    counts[..., 0] = 0
    landcover = np.where(land, counts.argmax(-1), 0).astype("uint8")
    return np.where(land, quantise(habitat, 0.01), np.nan), landcover


def place_towns(grid, land, dist):
    """Seven invented towns: mostly on the coast, more in the south; then the roads between them."""
    rng = rng_for("towns")
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    coastal = land & (dist > 2.0) & (dist < 10.0)
    weight = np.where(coastal, np.exp(-(grid.LAT - 36.0) / 7.0), 0.0).ravel()
    towns = []
    while len(towns) < 6:
        i = rng.choice(weight.size, p=weight / weight.sum())
        lon, lat = grid.LON.flat[i], grid.LAT.flat[i]
        if all(np.hypot((lon - a) * km_x, (lat - b) * KM_PER_DEG_LAT) > 90.0 for a, b in towns):
            towns.append((float(lon), float(lat)))
    inland = land & (dist > 40.0)
    i = rng.choice(np.flatnonzero(inland.ravel()))
    towns.append((float(grid.LON.flat[i]), float(grid.LAT.flat[i])))
    # Coast road: towns 0-5 in order of angle round the island; two roads to the inland town.
    cx, cy = -147.0, 41.0
    ring = sorted(range(6), key=lambda k: np.arctan2(towns[k][1] - cy, towns[k][0] - cx))
    segments = [(towns[ring[k]], towns[ring[(k + 1) % 6]]) for k in range(6)]
    near = sorted(range(6), key=lambda k: np.hypot(towns[k][0] - towns[6][0], towns[k][1] - towns[6][1]))[:2]
    segments += [(towns[6], towns[k]) for k in near]
    return towns, segments


def distance_to_segments_km(grid, segments):
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    px, py = grid.LON * km_x, grid.LAT * KM_PER_DEG_LAT
    best = np.full(px.shape, np.inf)
    for (x0, y0), (x1, y1) in segments:
        ax, ay, bx, by = x0 * km_x, y0 * KM_PER_DEG_LAT, x1 * km_x, y1 * KM_PER_DEG_LAT
        dx, dy = bx - ax, by - ay
        s = np.clip(((px - ax) * dx + (py - ay) * dy) / (dx * dx + dy * dy), 0.0, 1.0)
        best = np.minimum(best, np.hypot(px - ax - s * dx, py - ay - s * dy))
    return best


def make_effort(grid, land, dist, towns, segments):
    """Relative recording effort: near towns, along roads and on the coast (0-1)."""
    km_x = KM_PER_DEG_LAT * np.cos(np.deg2rad(41.0))
    d_town = np.min([np.hypot((grid.LON - a) * km_x, (grid.LAT - b) * KM_PER_DEG_LAT) for a, b in towns], axis=0)
    d_road = distance_to_segments_km(grid, segments)
    effort = 0.02 + 0.9 * np.exp(-d_town / 20.0) + 0.35 * np.exp(-d_road / 6.0) + 0.15 * np.exp(-dist / 8.0)
    effort /= effort[land].max()
    return np.where(land, quantise(effort, 0.001), np.nan)


# --------------------------------------------------------------------------- records

def make_records(grid, land, truth, effort):
    """Presences drawn with probability proportional to climate suitability x effort, plus the
    usual faults of a real download (absences, imprecise, malformed, duplicate, off-grid rows)."""
    rng = rng_for("records")
    valid = np.isfinite(truth) & np.isfinite(effort)
    weight = np.where(valid, truth * effort, 0.0).ravel()
    cells = rng.choice(weight.size, size=N_PRESENCES, p=weight / weight.sum())
    years = np.arange(1975, 2025)
    year_w = np.exp((years - 1975) / 12.0)

    def record(lon, lat, uncertainty, status="present", year=None):
        year = int(rng.choice(years, p=year_w / year_w.sum())) if year is None else year
        month = int(rng.integers(4, 10))
        day = int(rng.integers(1, 29))
        basis = "PreservedSpecimen" if rng.random() < (0.5 if year < 1995 else 0.08) else "HumanObservation"
        return [lon, lat, uncertainty, f"{year:04d}-{month:02d}-{day:02d}", str(year), status, basis]

    def jitter(i):
        lon = grid.LON.flat[i] + rng.uniform(-0.5, 0.5) * grid.res
        lat = grid.LAT.flat[i] + rng.uniform(-0.5, 0.5) * grid.res
        return f"{lon:.5f}", f"{lat:.5f}"

    precise = np.array([10, 25, 50, 100, 250, 1000])
    rows = [record(*jitter(i), str(int(rng.choice(precise)))) for i in cells]
    rows[0] = record(*jitter(cells[0]), "1000", year=1975)  # the series spans 1975-2024 exactly
    rows[1] = record(*jitter(cells[1]), "10", year=2024)
    for i in cells[:15]:  # imprecise: coordinates rounded to 0.1 degree
        rows.append(record(f"{grid.LON.flat[i]:.1f}", f"{grid.LAT.flat[i]:.1f}", "5000"))
    surveyed = np.where(valid, effort, 0.0).ravel()
    for i in rng.choice(surveyed.size, size=8, p=surveyed / surveyed.sum()):  # surveyed, not found
        rows.append(record(*jitter(i), "100", status="absent"))
    rows.append(record("", f"{grid.LAT.flat[cells[0]]:.5f}", "100"))  # malformed: blank longitude
    rows.append(record("", "", "250"))  # malformed: no coordinates
    rows.append(record("unknown", "41 12 N", "1000"))  # malformed: text coordinates
    for k in rng.choice(len(cells), size=6, replace=False):  # exact duplicates of earlier rows
        rows.append(list(rows[k]))
    rows.append(record("-155.21370", "40.11820", "50"))  # west of the grid
    rows.append(record("-147.50310", "47.30550", "50"))  # north of the grid
    sea_near_coast = ~land & ndimage.binary_dilation(land, iterations=3)
    for i in rng.choice(np.flatnonzero(sea_near_coast.ravel()), size=4, replace=False):  # in the sea
        rows.append(record(*jitter(i), "30"))
    order = rng.permutation(len(rows))
    name = SPECIES["scientific_name"]
    return [[f"FDEMO-{n + 1:05d}", name, *rows[k]] for n, k in enumerate(order)]


def make_truth_sample(grid, truth):
    rng = rng_for("truth-sample")
    cells = rng.choice(np.flatnonzero(np.isfinite(truth).ravel()), size=N_TRUTH, replace=False)
    cells.sort()
    present = rng.random(N_TRUTH) < truth.flat[cells]
    return [
        [f"{grid.LON.flat[i]:.4f}", f"{grid.LAT.flat[i]:.4f}", f"{truth.flat[i]:.4f}", str(int(p))]
        for i, p in zip(cells, present)
    ]


# --------------------------------------------------------------------------- NetCDF

def write_model_netcdf(path, lon, lat, tmin, tmax, prec, title):
    """Classic netCDF-3 (byte-stable): 0-360 longitudes, ascending latitude, a month dimension."""
    import netCDF4

    with netCDF4.Dataset(path, "w", format="NETCDF3_CLASSIC") as nc:
        nc.createDimension("month", 12)
        nc.createDimension("lat", lat.size)
        nc.createDimension("lon", lon.size)
        v = nc.createVariable("month", "i4", ("month",))
        v.long_name = "calendar month of the climatology"
        v[:] = np.arange(1, 13)
        v = nc.createVariable("lat", "f8", ("lat",))
        v.units, v.standard_name = "degrees_north", "latitude"
        v[:] = lat
        v = nc.createVariable("lon", "f8", ("lon",))
        v.units, v.standard_name = "degrees_east", "longitude"
        v[:] = lon
        for name, data, units, long_name in (
            ("tmin", tmin, "degC", "monthly mean of daily minimum temperature"),
            ("tmax", tmax, "degC", "monthly mean of daily maximum temperature"),
            ("prec", prec, "mm", "monthly precipitation total"),
        ):
            v = nc.createVariable(name, "f4", ("month", "lat", "lon"), fill_value=np.float32(-9999.0))
            v.units, v.long_name = units, long_name
            v[:] = data.astype("float32")
        nc.Conventions = "CF-1.8"
        nc.title = title
        nc.source = "sample_grids/make_demo.py (fictional climate model; invented landscape)"


# --------------------------------------------------------------------------- main

def generate(out: Path):
    west, south, east, north = OCEAN_BOX
    work = Grid(west - MARGIN, south - MARGIN, east + MARGIN, north + MARGIN, RES)
    grid = Grid(west, south, east, north, RES)
    m = int(round(MARGIN / RES))
    inner = (slice(m, m + grid.ny), slice(m, m + grid.nx))

    land_w = make_land(work)
    land = land_w[inner]
    edge = np.zeros_like(land)
    edge[:3], edge[-3:], edge[:, :3], edge[:, -3:] = True, True, True, True
    if (land & edge).any():
        raise RuntimeError("invented island touches the edge of the box; change the seed or shape")
    dist_w = distance_to_coast_km(work, land_w)
    elev_w, ridge_w = make_elevation(work, land_w, dist_w)
    state_w = baseline_state(work, dist_w, elev_w, ridge_w)
    state = {k: v[inner] for k, v in state_w.items()}
    dist, elev = dist_w[inner], elev_w[inner]

    write_geotiff(out / "landmask.tif", grid, land.astype("uint8"), names=["land"], units=["1"],
                  dtype="uint8", nodata=None, tags={"meaning": "1 invented land, 0 sea"})
    write_geotiff(out / "elevation.tif", grid, np.where(land, quantise(elev, 1.0), np.nan),
                  names=["elevation"], units=["m"])
    baseline = climate_bands(state, land)
    units = [CLIMATE_UNITS[v] for v in CLIMATE_VARIABLES]
    write_geotiff(out / "baseline.tif", grid, baseline, names=CLIMATE_VARIABLES, units=units,
                  tags={"period": "baseline (invented)"})

    rows = []
    for pathway in PATHWAYS:
        for model in MODELS:
            for horizon in (2050, 2080):
                s_w = scenario_state(work, state_w, elev_w, pathway, model, horizon)
                s = {key: val[inner] for key, val in s_w.items()}
                name = f"{pathway}_{model}_{horizon}"
                rel = f"scenarios/{name}.tif"
                write_geotiff(out / rel, grid, climate_bands(s, land), names=CLIMATE_VARIABLES, units=units,
                              tags={"pathway": pathway, "climate_model": model, "horizon": str(horizon)})
                rows.append([name, pathway, model, str(horizon), rel])
    write_csv(out / "scenarios.csv", SCENARIO_COLUMNS, rows)

    # Monthly inputs for bioclim/delta: block means of the fine fields on a 5x coarser grid.
    coarse = Grid(west, south, east, north, RES * COARSE_MONTHLY)
    for name, series, step, unit in zip(("tmin", "tmax", "prec"), monthly(state), (0.1, 0.1, 0.1), ("degC", "degC", "mm")):
        data = quantise(block_mean(np.where(land, series, np.nan), COARSE_MONTHLY), step)
        write_geotiff(out / "monthly" / f"{name}.tif", coarse, data, names=[f"m{k:02d}" for k in range(1, 13)],
                      units=[unit] * 12, tags={"variable": name})
    # Coarse "climate model" pair on a 1-degree grid over the box and its margin (sea included):
    # biased like a real model (too warm, too small a diurnal range, too wet).
    k = int(round(MODEL_RES / RES))
    lon360 = block_mean(work.LON[None], k)[0, 0] % 360.0
    lat_up = block_mean(work.LAT[None], k)[0, :, 0][::-1]
    hist_w = dict(state_w)
    future_w = scenario_state(work, state_w, elev_w, "high", "model-a", 2080)
    for label, st in (("historical", hist_w), ("high_2080", future_w)):
        biased = dict(st, bio1=st["bio1"] + 0.7, dtr=np.maximum(st["dtr"] - 1.0, 2.0), prec=st["prec"] * 1.12)
        coarse_state = {key: block_mean(val[None], k)[0][::-1] for key, val in biased.items()}
        tmin, tmax, prec = (quantise(a, 0.01) for a in monthly(coarse_state))
        write_model_netcdf(out / "monthly" / f"model-a_{label}.nc", lon360, lat_up, tmin, tmax, prec,
                           f"model-a {label} monthly climatology (fictional)")

    truth = np.where(land, true_suitability(dict(zip(CLIMATE_VARIABLES, baseline))), np.nan)
    truth = quantise(truth, 0.0001)
    write_geotiff(out / "true_suitability.tif", grid, truth, names=["true_suitability"], units=["1"],
                  tags={"species": SPECIES["scientific_name"], "niche": json.dumps(NICHE, sort_keys=True)})

    towns, segments = place_towns(grid, land, dist)
    effort = make_effort(grid, land, dist, towns, segments)
    write_geotiff(out / "effort.tif", grid, effort, names=["effort"], units=["1"],
                  tags={"meaning": "relative recording effort (towns, roads, coast)"})
    habitat, landcover = make_landcover(grid, land, elev, towns)
    write_geotiff(out / "habitat.tif", grid, habitat, names=["habitat"], units=["1"],
                  tags={"meaning": "fraction of good habitat: mean class quality of a 4x finer land cover"})
    write_geotiff(out / "landcover.tif", grid, landcover, names=["landcover"], units=["class"],
                  dtype="uint8", nodata=0, categories=LANDCOVER_CLASSES)
    write_csv(out / "landcover_classes.csv", ("code", "name", "habitat_quality"),
              [[str(c), n, f"{q:.2f}"] for c, n, q in LANDCOVER_CLASSES])

    write_csv(out / "presences.csv", DARWIN_CORE_COLUMNS, make_records(grid, land, truth, effort))
    write_csv(out / "truth_sample.csv", ("lon", "lat", "true_suitability", "present"), make_truth_sample(grid, truth))

    species = {
        **SPECIES,
        "fictional": True,
        "description": "An invented warm-loving ground beetle of open, sunny ground; no real taxon.",
        "niche": NICHE,
        "niche_combination": "product of the responses",
        "true_suitability": "true_suitability.tif (baseline); envelope.study.demo.true_suitability for any climate",
        "records": {
            "file": "presences.csv",
            "sampling": "cells drawn with probability proportional to true_suitability x effort (habitat not used)",
            "presences": N_PRESENCES,
            "years": [1975, 2024],
        },
        "truth_sample": {"file": "truth_sample.csv", "cells": N_TRUTH, "present": "Bernoulli(true_suitability)"},
        "seed": SEED,
    }
    (out / "species.json").write_text(json.dumps(species, indent=2, sort_keys=True) + "\n", encoding="utf-8")


def main(argv=None):
    parser = argparse.ArgumentParser(description="Regenerate the fictional demo study.")
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "demo")
    args = parser.parse_args(argv)
    out = args.out.resolve()
    if out.exists() and any(out.iterdir()) and not (out / "species.json").is_file():
        raise InputError(f"{out}: folder exists and holds no species.json, so it is not a demo study; "
                         f"give an empty or new folder to --out")
    # Build beside the target, then swap: a failure leaves the old study untouched.
    partial = out.parent / f".{out.name}.partial"
    shutil.rmtree(partial, ignore_errors=True)
    partial.mkdir(parents=True)
    try:
        generate(partial)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    old = out.parent / f".{out.name}.old"
    if out.exists():
        shutil.rmtree(old, ignore_errors=True)
        out.rename(old)
    partial.rename(out)
    shutil.rmtree(old, ignore_errors=True)
    print(f"wrote the demo study to {out}")


if __name__ == "__main__":
    try:
        main()
    except InputError as exc:
        sys.exit(f"Error: {exc}")
