"""The bundled fictional demo study: files load, layers agree, the truth is what it says."""

import csv
import hashlib
import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
from scipy import ndimage, stats

from envelope.study.demo import (
    CLIMATE_UNITS,
    CLIMATE_VARIABLES,
    DARWIN_CORE_COLUMNS,
    DEMO_DIR_ENV,
    NICHE,
    OCEAN_BOX,
    SCENARIO_COLUMNS,
    SPECIES,
    demo_dir,
    true_suitability,
)
from envelope.errors import InputError

REPO = Path(__file__).resolve().parents[2]
SCRIPT = REPO / "sample_grids" / "make_demo.py"
DEMO = REPO / "sample_grids" / "demo"
STUDY_GRID_FILES = ("baseline.tif", "elevation.tif", "landmask.tif", "habitat.tif", "landcover.tif",
                    "effort.tif", "true_suitability.tif")


def read(name, band=None):
    with rasterio.open(DEMO / name) as src:
        data = src.read() if band is None else src.read(band)
    return data.astype("float64") if data.dtype.kind == "f" else data


def scenario_table():
    return pd.read_csv(DEMO / "scenarios.csv", dtype={"horizon": int})


@pytest.fixture(scope="module")
def baseline():
    return dict(zip(CLIMATE_VARIABLES, read("baseline.tif")))


@pytest.fixture(scope="module")
def land():
    return read("landmask.tif", 1) == 1


def test_demo_dir_finds_the_bundled_study(monkeypatch):
    monkeypatch.delenv(DEMO_DIR_ENV, raising=False)
    assert demo_dir() == DEMO.resolve()


def test_demo_dir_names_the_missing_folder_and_the_fix(monkeypatch, tmp_path):
    monkeypatch.setenv(DEMO_DIR_ENV, str(tmp_path))
    with pytest.raises(InputError, match="demo study not found.*make_demo.py"):
        demo_dir()


def test_study_grids_share_crs_transform_and_shape():
    with rasterio.open(DEMO / "baseline.tif") as ref:
        crs, transform, shape = ref.crs, ref.transform, ref.shape
    assert crs.to_epsg() == 4326
    assert shape == (250, 250)
    names = list(STUDY_GRID_FILES) + list(scenario_table().path)
    for name in names:
        with rasterio.open(DEMO / name) as src:
            assert (src.crs, src.transform, src.shape) == (crs, transform, shape), name


def test_climate_files_carry_band_names_and_units():
    for name in ["baseline.tif"] + list(scenario_table().path):
        with rasterio.open(DEMO / name) as src:
            assert src.descriptions == CLIMATE_VARIABLES, name
            assert [src.tags(i)["units"] for i in range(1, src.count + 1)] == [CLIMATE_UNITS[v] for v in CLIMATE_VARIABLES]
            assert src.dtypes[0] == "float32" and np.isnan(src.nodata)


def test_the_grid_lies_in_the_open_ocean_box():
    with rasterio.open(DEMO / "baseline.tif") as src:
        b = src.bounds
    west, south, east, north = OCEAN_BOX
    assert west <= b.left < b.right <= east and south <= b.bottom < b.top <= north
    # From memory: no land at all between 30-50 N and 130-170 W: the Hawaiian chain (Hawaii
    # 18.9 N to Kure Atoll 28.4 N) lies south of 29 N, the Aleutians north of 51 N, and the
    # North American coast east of 124.2 W.
    assert -170.0 <= west and east <= -130.0 and 30.0 <= south and north <= 50.0


def test_no_real_land_in_the_box_per_hadisst():
    # Source: HadISST1 sea-surface temperature, 1-degree (Rayner et al. 2003, JGR 108(D14)
    # 4407), as shipped in cartopy's data folder; its land cells are missing values. Islands
    # much smaller than a degree would not show; the memory check above covers those.
    cartopy = pytest.importorskip("cartopy")
    path = Path(cartopy.__file__).parent / "data" / "netcdf" / "HadISST1_SST_update.nc"
    if not path.is_file():
        pytest.skip("cartopy ships no HadISST file here")
    import xarray as xr

    with xr.open_dataset(path, decode_times=False) as ds:
        sst = ds["sst"].isel(time=0)
        west, south, east, north = OCEAN_BOX
        box = sst.where((sst.lon > west - 1) & (sst.lon < east + 1) & (sst.lat > south - 1) & (sst.lat < north + 1), drop=True)
        assert box.size >= 144 and bool(np.isfinite(box).all())
        assert np.isnan(float(sst.sel(lat=40.5, lon=-100.5)))  # Kansas is land: the mask works


def test_climate_is_nan_exactly_off_the_invented_land(baseline, land):
    assert 0.3 < land.mean() < 0.6
    for name, layer in baseline.items():
        assert np.array_equal(np.isfinite(layer), land), name
    for name in ("elevation.tif", "habitat.tif", "effort.tif", "true_suitability.tif"):
        assert np.array_equal(np.isfinite(read(name, 1)), land), name


def check_consistent(layers, where):
    """The bioclim definitions order the layers whatever the climate."""
    # Source: O'Donnell & Ignizio (2012) definitions (REFERENCES.md section 5): BIO5 is the
    # largest monthly Tmax and BIO6 the smallest monthly Tmin, so BIO6 < BIO1 < BIO5.
    assert np.all(layers["bio6"][where] < layers["bio1"][where])
    assert np.all(layers["bio1"][where] < layers["bio5"][where])
    # Analytic: the 12 rolling quarters count each month three times, so they average
    # BIO12/4 and the driest (BIO17) cannot exceed it.
    assert np.all(layers["bio17"][where] < layers["bio12"][where] / 4)
    assert np.all(layers["bio17"][where] > 0)


def test_baseline_layers_are_physically_consistent(baseline, land):
    check_consistent(baseline, land)
    assert 5.0 < np.nanmean(baseline["bio1"]) < 20.0
    assert 300.0 < np.nanmean(baseline["bio12"]) < 2500.0


def test_scenario_layers_are_physically_consistent(land):
    for path in scenario_table().path:
        check_consistent(dict(zip(CLIMATE_VARIABLES, read(path))), land)


def test_gdd5_is_consistent_with_bio1(baseline, land):
    bio1, bio5, gdd5 = baseline["bio1"][land], baseline["bio5"][land], baseline["gdd5"][land]
    # Analytic (Jensen's inequality): max(T - 5, 0) is convex, so a year's degree days are at
    # least 365 max(mean - 5, 0), and at most 365 max(warmest - 5, 0). Slack: bio1 is
    # rounded to 0.1 degC (365 x 0.05) and gdd5 to 1.
    assert np.all(gdd5 >= 365.0 * np.maximum(bio1 - 5.0, 0.0) - 20.0)
    assert np.all(gdd5 <= 365.0 * np.maximum(bio5 - 5.0, 0.0))
    assert stats.spearmanr(bio1, gdd5).statistic > 0.95  # Common practice, no source


def test_monthly_grids_reproduce_the_annual_layers(baseline):
    monthly = {}
    for name in ("tmin", "tmax", "prec"):
        with rasterio.open(DEMO / "monthly" / f"{name}.tif") as src:
            assert src.count == 12 and src.descriptions == tuple(f"m{k:02d}" for k in range(1, 13))
            assert src.res == (0.2, 0.2) and src.shape == (50, 50)
            monthly[name] = src.read().astype("float64")

    def block_mean(a):
        blocks = a.reshape(50, 5, 50, 5).transpose(0, 2, 1, 3).reshape(50, 50, 25)
        count = np.isfinite(blocks).sum(-1)
        return np.where(count > 0, np.nansum(blocks, -1) / np.maximum(count, 1), np.nan)

    expected = {v: block_mean(baseline[v]) for v in ("bio1", "bio5", "bio6", "bio12")}
    ok = np.isfinite(expected["bio1"])
    assert np.array_equal(ok, np.isfinite(monthly["tmin"][0]))
    # Source: O'Donnell & Ignizio (2012) (REFERENCES.md section 5): BIO1 = mean of monthly
    # (Tmax+Tmin)/2, BIO5 = max Tmax, BIO6 = min Tmin, BIO12 = sum of P. Slack: 0.1-degC and
    # 0.1-mm monthly rounding, 1-mm annual rounding.
    bio1 = ((monthly["tmin"] + monthly["tmax"]) / 2).mean(0)
    np.testing.assert_allclose(bio1[ok], expected["bio1"][ok], atol=0.1)
    np.testing.assert_allclose(monthly["tmax"].max(0)[ok], expected["bio5"][ok], atol=0.15)
    np.testing.assert_allclose(monthly["tmin"].min(0)[ok], expected["bio6"][ok], atol=0.15)
    np.testing.assert_allclose(monthly["prec"].sum(0)[ok], expected["bio12"][ok], atol=1.5)


def test_model_netcdf_pair_is_coarse_0_360_ascending_and_warms_like_its_scenario(baseline):
    import xarray as xr

    with xr.open_dataset(DEMO / "monthly" / "model-a_historical.nc") as hist, \
            xr.open_dataset(DEMO / "monthly" / "model-a_high_2080.nc") as fut:
        for ds in (hist, fut):
            assert set(ds.data_vars) == {"tmin", "tmax", "prec"}
            assert ds["tmax"].dims == ("month", "lat", "lon") and ds.sizes["month"] == 12
            assert bool((ds.lon > 180).all()) and bool((np.diff(ds.lat) > 0).all())
            assert float(ds.lat[1] - ds.lat[0]) == 1.0
            assert bool((ds.tmin < ds.tmax).all()) and bool((ds.prec >= 0).all())
        warming = float((((fut.tmin + fut.tmax) - (hist.tmin + hist.tmax)) / 2).mean())
    scenario = dict(zip(CLIMATE_VARIABLES, read("scenarios/high_model-a_2080.tif")))
    land_warming = np.nanmean(scenario["bio1"] - baseline["bio1"])
    # Common practice, no source: the coarse pair is the same invented model, so its mean
    # change (sea included) is near the land-mean change of its GeoTIFF scenario.
    assert abs(warming - land_warming) < 0.5


def test_scenario_table_and_warming_order(baseline):
    table = scenario_table()
    assert tuple(table.columns) == SCENARIO_COLUMNS
    assert set(table.pathway) == {"low", "high"} and set(table.horizon) == {2050, 2080}
    assert len(set(table.climate_model)) >= 3 and len(table) == 12
    assert all((DEMO / p).is_file() for p in table.path)
    warming, wetting = {}, {}
    for row in table.itertuples():
        layers = dict(zip(CLIMATE_VARIABLES, read(row.path)))
        key = (row.pathway, row.climate_model, row.horizon)
        warming[key] = np.nanmean(layers["bio1"] - baseline["bio1"])
        wetting[key] = np.nanmean(layers["bio12"] / baseline["bio12"] - 1)
    for model in set(table.climate_model):
        w = {(p, h): warming[(p, model, h)] for p in ("low", "high") for h in (2050, 2080)}
        assert 0 < w["low", 2050] < w["low", 2080] and 0 < w["high", 2050] < w["high", 2080], model
        assert w["high", 2050] > w["low", 2050] and w["high", 2080] > w["low", 2080], model
    # The models disagree: real spread in warming and opposite signs of precipitation change.
    at_2080 = [warming[("high", m, 2080)] for m in set(table.climate_model)]
    assert max(at_2080) - min(at_2080) > 1.0
    signs = {np.sign(wetting[("high", m, 2080)]) for m in set(table.climate_model)}
    assert signs == {-1.0, 1.0}


def test_scenario_change_patterns_differ_between_models(baseline, land):
    table = scenario_table()
    rows = table[(table.pathway == "high") & (table.horizon == 2080)]
    patterns = [(read(p, 1) - baseline["bio1"])[land] for p in rows.path]
    for i in range(len(patterns)):
        for j in range(i + 1, len(patterns)):
            # Common practice, no source: different spatial patterns = correlation well below 1.
            assert np.corrcoef(patterns[i], patterns[j])[0, 1] < 0.9


def test_habitat_is_a_fraction_and_fragments_poleward(land):
    habitat = read("habitat.tif", 1)
    assert np.nanmin(habitat) >= 0.0 and np.nanmax(habitat) <= 1.0
    rows = np.flatnonzero(land.any(axis=1))
    third = len(rows) // 3
    north, south = rows[:third], rows[-third:]  # row 0 is north

    def patches(r):
        # Common practice, no source: a patch is a 4-connected run of cells with habitat > 0.5.
        labels, n = ndimage.label(habitat[r] > 0.5)
        sizes = np.bincount(labels.ravel())[1:]
        return n / land[r].sum(), sizes.mean()

    (density_n, size_n), (density_s, size_s) = patches(north), patches(south)
    assert density_n < density_s and size_n < size_s
    assert np.nanmean(habitat[north]) < np.nanmean(habitat[south])


def test_landcover_codes_are_in_the_class_table_and_match_habitat(land):
    classes = pd.read_csv(DEMO / "landcover_classes.csv")
    assert list(classes.columns) == ["code", "name", "habitat_quality"]
    assert classes.code.is_unique and classes.habitat_quality.between(0, 1).all()
    with rasterio.open(DEMO / "landcover.tif") as src:
        assert src.dtypes[0] == "uint8" and src.nodata == 0
        cover = src.read(1)
    assert set(np.unique(cover[land])) <= set(classes.code)
    assert np.all(cover[~land] == 0)
    quality = np.zeros(256)
    quality[classes.code] = classes.habitat_quality
    habitat = read("habitat.tif", 1)
    # Common practice, no source: the habitat fraction is the mean class quality of a finer
    # land cover whose commonest class is the cell's class, so the two agree closely.
    assert np.corrcoef(quality[cover[land]], habitat[land])[0, 1] > 0.8


def test_true_suitability_recomputes_from_the_baseline(baseline, land):
    truth = read("true_suitability.tif", 1)
    np.testing.assert_allclose(truth[land], true_suitability(baseline)[land], atol=1e-4)
    assert np.nanmin(truth) >= 0 and np.nanmax(truth) <= 1
    species = json.loads((DEMO / "species.json").read_text())
    assert species["niche"] == NICHE and species["scientific_name"] == SPECIES["scientific_name"]
    assert species["fictional"] is True
    # Warm-loving: suitable in the south, the cold edge through the middle, absent up north.
    rows = np.flatnonzero(land.any(axis=1))
    third = len(rows) // 3
    assert np.nanmean(truth[rows[-third:]]) > 0.5
    assert 0.1 < np.nanmean(truth[rows[third:-third]]) < 0.5
    assert np.nanmean(truth[rows[:third]]) < 0.1


def test_true_suitability_function_at_known_points():
    # Analytic: each logistic is 1/2 at its midpoint and the Gaussian is 1 at its optimum.
    at_mid = {"bio5": 29.0, "bio6": -1.0, "gdd5": 3400.0, "bio12": 1600.0}
    assert float(true_suitability(at_mid)) == pytest.approx(0.125)
    assert np.isnan(true_suitability({**at_mid, "bio6": np.nan}))
    with pytest.raises(InputError, match="variable 'gdd5' missing"):
        true_suitability({"bio5": 1.0, "bio6": 1.0, "bio12": 1.0})


def test_presences_are_darwin_core_with_the_usual_faults(baseline):
    with open(DEMO / "presences.csv", newline="") as f:
        header = next(csv.reader(f))
    assert tuple(header) == DARWIN_CORE_COLUMNS
    rec = pd.read_csv(DEMO / "presences.csv", dtype=str, keep_default_na=False)
    assert rec.occurrenceID.is_unique and set(rec.scientificName) == {SPECIES["scientific_name"]}
    assert 300 <= (rec.occurrenceStatus == "present").sum() <= 600
    assert set(rec.occurrenceStatus) == {"present", "absent"}
    assert (rec.coordinateUncertaintyInMeters == "5000").sum() >= 5
    lon = pd.to_numeric(rec.decimalLongitude, errors="coerce")
    lat = pd.to_numeric(rec.decimalLatitude, errors="coerce")
    assert (lon.isna() | lat.isna()).sum() >= 2  # blank or text coordinates
    years = rec.year.astype(int)
    assert years.min() == 1975 and years.max() == 2024
    assert (rec.eventDate.str[:4] == rec.year).all()
    assert rec.drop(columns="occurrenceID").duplicated().sum() >= 3
    west, south, east, north = OCEAN_BOX
    ok = lon.notna() & lat.notna()
    inside = ok & lon.between(west, east) & lat.between(south, north)
    assert (ok & ~inside).sum() >= 1  # off the grid
    col = ((lon[inside] - west) / 0.04).astype(int).clip(0, 249)
    row = ((north - lat[inside]) / 0.04).astype(int).clip(0, 249)
    in_sea = np.isnan(baseline["bio1"][row, col])
    assert 1 <= in_sea.sum() <= 20  # a few NaN-climate records, not many


def test_presences_are_biased_toward_effort():
    effort, truth = read("effort.tif", 1), read("true_suitability.tif", 1)
    rec = pd.read_csv(DEMO / "presences.csv")
    rec = rec[rec.occurrenceStatus == "present"]
    lon = pd.to_numeric(rec.decimalLongitude, errors="coerce")
    lat = pd.to_numeric(rec.decimalLatitude, errors="coerce")
    col = np.floor((lon - OCEAN_BOX[0]) / 0.04)
    row = np.floor((OCEAN_BOX[3] - lat) / 0.04)
    ok = col.between(0, 249) & row.between(0, 249)
    e = effort[row[ok].astype(int), col[ok].astype(int)]
    e = e[np.isfinite(e)]
    # Common practice, no source: records drawn in proportion to suitability x effort sit at
    # higher effort than suitable land at large.
    assert e.mean() > 1.5 * np.nanmean(effort[truth > 0.5])


def test_truth_sample_is_a_bernoulli_draw_of_the_truth():
    sample = pd.read_csv(DEMO / "truth_sample.csv")
    assert list(sample.columns) == ["lon", "lat", "true_suitability", "present"]
    assert len(sample) == 2000 and set(sample.present) <= {0, 1}
    truth = read("true_suitability.tif", 1)
    col = np.floor((sample.lon - OCEAN_BOX[0]) / 0.04).astype(int)
    row = np.floor((OCEAN_BOX[3] - sample.lat) / 0.04).astype(int)
    np.testing.assert_allclose(sample.true_suitability, truth[row, col], atol=1e-4)
    p = sample.true_suitability.to_numpy()
    # Source: the Bernoulli variance p(1-p): the count of presences lies within 4 sd of sum(p).
    assert abs(sample.present.sum() - p.sum()) < 4 * np.sqrt((p * (1 - p)).sum())


def test_regeneration_is_byte_identical(tmp_path):
    out = tmp_path / "demo"
    subprocess.run([sys.executable, str(SCRIPT), "--out", str(out)], check=True, capture_output=True, timeout=120)

    def digests(root):
        return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
                for p in sorted(root.rglob("*")) if p.is_file()}

    assert digests(out) == digests(DEMO)


def test_script_refuses_a_folder_that_is_not_a_demo_study(tmp_path):
    spec = importlib.util.spec_from_file_location("make_demo", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    (tmp_path / "notes.txt").write_text("mine")
    with pytest.raises(InputError, match="not a demo study"):
        module.main(["--out", str(tmp_path)])
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]
