"""Observed range-margin shifts (envelope.margins): a simulated species whose margin moves a known distance."""

from collections import OrderedDict

import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr
import rioxarray  # noqa: F401

from envelope.errors import InputError
from envelope.kernels.change import meridian_arc_km
from envelope.margins import margin_shifts, parse_periods, select_species
from envelope.records import Records

SPECIES = "Fictus marginalis"
PERIODS = "1970-1989,2000-2019"
MARGINS = ((52.0, 1970, 1989), (53.5, 2000, 2019))   # true poleward margin (ramp top) per period


def simulate(seed, *, hemisphere=1, nx=800, lat0=48.0, lat1=56.0, res=0.1, lam=3.0, network=0.035, p_focal=0.3,
             ramp_deg=2.0):
    """Records of a fictional species and its companions on an invented grid in open ocean.

    Occupancy falls linearly from 1 to 0 over ``ramp_deg`` below the margin; the margin moves
    1.5 degrees poleward between the periods. Every cell gets Poisson(``lam``) records of all
    taxa, except that in the first period only a sparse network (``network`` of the cells)
    was recorded north of 49 degrees. A record in an occupied cell is of the focal species
    with probability ``p_focal``.
    """
    rng = np.random.default_rng(seed)
    ny = int(round((lat1 - lat0) / res))
    lats = lat1 - res * (np.arange(ny) + 0.5)
    y = hemisphere * lats
    x = -150.0 + res * (np.arange(nx) + 0.5)
    grid = xr.DataArray(np.ones((1, ny, nx), "float32"), dims=("variable", "y", "x"),
                        coords={"variable": ["t"], "y": y, "x": x}).rio.write_crs("EPSG:4326")
    if hemisphere < 0:
        grid = grid.isel(y=slice(None, None, -1))
    abslat = np.broadcast_to(lats[:, None], (ny, nx))   # simulated in the northern row order
    net = rng.random((ny, nx)) < network
    parts = []
    for period, (margin, first, last) in enumerate(MARGINS):
        psi = np.clip((margin - abslat) / ramp_deg, 0, 1)
        occupied = rng.random((ny, nx)) < psi
        lam_cell = np.full((ny, nx), lam)
        if period == 0:
            lam_cell[(abslat >= 49) & ~net] = 0.0
        k = rng.poisson(lam_cell)
        r, c = np.nonzero(k)
        r, c = np.repeat(r, k[r, c]), np.repeat(c, k[r, c])
        focal = occupied[r, c] & (rng.random(r.size) < p_focal)
        if hemisphere < 0:  # the mirrored grid is north-up too: row r of the simulation is row ny-1-r
            r = ny - 1 - r
        parts.append(pd.DataFrame({"row": r, "col": c, "year": rng.integers(first, last + 1, r.size),
                                   "scientificName": np.where(focal, SPECIES, "Alia communis")}))
    table = pd.concat(parts, ignore_index=True)
    return Records(table=table, n_read=len(table), dropped=OrderedDict(), crs="EPSG:4326"), grid


TRUTH_KM = meridian_arc_km(MARGINS[0][0], MARGINS[1][0])


@pytest.mark.parametrize("seed", [10, 14])
def test_effort_corrected_shift_recovers_the_truth_and_uncorrected_is_biased(seed):
    # Analytic truth: the occupancy profile moves rigidly by 1.5 degrees of latitude, i.e. the
    # meridian arc from 52 to 53.5 N (about 167 km). Only cells recorded well in both periods
    # see the same sampling in both, so their margin statistic moves by the truth; the
    # uncorrected figure compares a sparse first period with a dense second and overstates it.
    records, grid = simulate(seed)
    periods = parse_periods(PERIODS)
    corrected = margin_shifts(records, grid, species=SPECIES, periods=periods, min_records=2, bootstrap=0)
    uncorrected = margin_shifts(records, grid, species=SPECIES, periods=periods, min_records=2, bootstrap=0,
                                effort_correction=False)
    ratio_c = corrected["poleward_margin_shift_km"] / TRUTH_KM
    ratio_u = uncorrected["poleward_margin_shift_km"] / TRUTH_KM
    assert abs(ratio_c - 1) < 0.15                     # the tolerance
    assert ratio_u > 1.15                              # biased: it would fail the same check
    assert ratio_u - 1 > 2 * abs(ratio_c - 1)
    assert corrected["effort_correction"]["applied"] and not uncorrected["effort_correction"]["applied"]


def test_southern_hemisphere_mirror_gives_the_same_poleward_shift():
    # Analytic: mirroring the landscape about the equator makes "poleward" south; the shift in
    # km along the meridian is unchanged and stays positive.
    north = margin_shifts(*simulate(10, nx=300), species=SPECIES, periods=parse_periods(PERIODS), min_records=2,
                          bootstrap=0, effort_correction=False)
    south = margin_shifts(*simulate(10, nx=300, hemisphere=-1), species=SPECIES, periods=parse_periods(PERIODS),
                          min_records=2, bootstrap=0, effort_correction=False)
    assert north["poleward"] == "north" and south["poleward"] == "south"
    assert south["poleward_margin_shift_km"] == pytest.approx(north["poleward_margin_shift_km"], rel=1e-9)
    assert south["poleward_margin_shift_km"] > 0


def _toy(lat_rows_1, lat_rows_2, ncol=4, lat_top=60.0):
    """Every cell of the given rows occupied, one record each, on a 0.5-degree grid."""
    ny = 20
    y = lat_top - 0.5 * (np.arange(ny) + 0.5)
    grid = xr.DataArray(np.ones((1, ny, ncol), "float32"), dims=("variable", "y", "x"),
                        coords={"variable": ["t"], "y": y, "x": -150 + 0.5 * (np.arange(ncol) + 0.5)}
                        ).rio.write_crs("EPSG:4326")
    rows = []
    for rows_k, year in ((lat_rows_1, 1980), (lat_rows_2, 2010)):
        for r in rows_k:
            for c in range(ncol):
                rows.append({"row": r, "col": c, "year": year, "scientificName": SPECIES})
    table = pd.DataFrame(rows)
    return Records(table=table, n_read=len(table), dropped=OrderedDict(), crs="EPSG:4326"), grid, y


def test_margin_statistics_against_direct_latitudes_and_pyproj():
    # Period 1 occupies rows 10..15, period 2 rows 8..13; 4 cells a row, N = 4: the poleward
    # margin is the top row's latitude. Source: pyproj.Geod.inv (Karney 2013) along a meridian.
    records, grid, y = _toy(range(10, 16), range(8, 14))
    out = margin_shifts(records, grid, species=SPECIES, periods=parse_periods("1970-1990,2000-2020"), n_cells=4,
                        min_records=1, bootstrap=200, effort_correction=False)
    assert out["poleward_margin_lat"]["1970-1990"] == pytest.approx(y[10])
    assert out["equatorward_margin_lat"]["2000-2020"] == pytest.approx(y[13])
    _, _, dist = pyproj.Geod(ellps="WGS84").inv(-150, y[10], -150, y[8])
    assert out["poleward_margin_shift_km"] == pytest.approx(dist / 1000, rel=1e-9)
    _, _, dist_eq = pyproj.Geod(ellps="WGS84").inv(-150, y[15], -150, y[13])
    assert out["equatorward_margin_shift_km"] == pytest.approx(dist_eq / 1000, rel=1e-9)
    low, high = out["poleward_margin_shift_interval_km"]
    assert low <= out["poleward_margin_shift_km"] <= high
    # Analytic: each period's occupied cells sit in rows of equal area weight per row; the 95th
    # area-weighted percentile of 6 rows (weights slightly larger to the south) is the top row.
    assert out["poleward_percentile_lat"]["1970-1990"] == pytest.approx(y[10])
    assert out["n_cells_used"] == {"1970-1990": 24, "2000-2020": 24}


def test_elevation_shift_is_the_slope_times_the_mean_latitude_shift():
    # Analytic: with elevation linear in latitude, the mean elevation of the occupied cells moves
    # by the slope times the shift of their mean latitude (linearity of the mean).
    records, grid, y = _toy(range(10, 16), range(8, 14))
    dem = np.broadcast_to((100.0 * (y - 50.0))[:, None], (grid.sizes["y"], grid.sizes["x"]))
    out = margin_shifts(records, grid, species=SPECIES, periods=parse_periods("1970-1990,2000-2020"), n_cells=4,
                        min_records=1, bootstrap=0, elevation=dem, effort_correction=False)
    expected = 100.0 * (np.mean(y[8:14]) - np.mean(y[10:16]))
    assert out["elevation_shift_m"] == pytest.approx(expected)


def test_effort_raster_decides_the_cells_used():
    # Common practice, no source: an effort raster below the threshold removes its cells.
    records, grid, y = _toy(range(10, 16), range(8, 14))
    effort = np.ones((grid.sizes["y"], grid.sizes["x"]))
    effort[:10] = 0.0   # rows 0..9 unrecorded in both periods: the second period's rows 8-9 drop out
    out = margin_shifts(records, grid, species=SPECIES, periods=parse_periods("1970-1990,2000-2020"), n_cells=4,
                        min_records=1, bootstrap=0, effort=effort)
    assert out["poleward_margin_lat"]["2000-2020"] == pytest.approx(y[10])
    assert out["poleward_margin_shift_km"] == pytest.approx(0.0, abs=1e-9)
    assert out["effort_correction"]["source"] == "effort raster"


@pytest.mark.parametrize("text, match", [
    ("1970-1995,1990-2010", "overlap"),
    ("1970-1989", "two periods"),
    ("1990-1970,2000-2010", "ends before"),
    ("2000-2010,1970-1980", "earlier period first"),
    ("1970-89x,2000-2010", "not FIRST-LAST"),
])
def test_bad_periods(text, match):
    with pytest.raises(InputError, match=match):
        parse_periods(text)


def test_a_period_without_records_and_too_few_cells_are_errors():
    records, grid, _ = _toy(range(10, 16), range(8, 14))
    with pytest.raises(InputError, match="no records in period 2030-2040"):
        margin_shifts(records, grid, species=SPECIES, periods=parse_periods("1970-1990,2030-2040"), n_cells=4,
                      min_records=1, bootstrap=0)
    with pytest.raises(InputError, match="--n-cells: 30 most poleward cells .* only 16"):
        margin_shifts(records, grid, species=SPECIES, periods=parse_periods("1970-1990,2000-2020"), n_cells=30,
                      min_records=1, bootstrap=0)


def test_species_selection_matches_names_with_authorship_and_case():
    table = pd.DataFrame({"scientificName": ["Fictus marginalis (Author, 1850)", "fictus  MARGINALIS", "Fictus other",
                                             None]})
    assert select_species(table, SPECIES).tolist() == [True, True, False, False]
    with pytest.raises(InputError, match="--species 'Nullus' matches no record"):
        select_species(table, "Nullus")
    with pytest.raises(InputError, match="no species, acceptedScientificName, scientificName column"):
        select_species(pd.DataFrame({"x": [1]}), SPECIES)
