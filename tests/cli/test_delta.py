"""`envelope delta`: single and batch forms, the scenario table, and bad inputs (exit 2, nothing written)."""

import csv

import numpy as np
import pytest
import rasterio
import rioxarray  # noqa: F401
import xarray as xr
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.study.demo import demo_dir
from envelope.io.tables import read_scenarios

# Source: REFERENCES item 5 inputs (hand-made 12-month series), used as the fine baseline.
TMIN = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8], dtype=float)
TMAX = TMIN + np.array([8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8], dtype=float)
PREC = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110], dtype=float)


def write_baseline(path, series, units):
    data = np.broadcast_to(np.asarray(series, float)[:, None, None], (12, 4, 6)).astype("float32")
    da = xr.DataArray(data, dims=("band", "y", "x"),
                      coords={"band": np.arange(1, 13), "y": 10.0 - 0.25 * (np.arange(4) + 0.5),
                              "x": -179.0 + 0.25 * (np.arange(6) + 0.5)}).rio.write_crs("EPSG:4326")
    da.rio.to_raster(path)
    with rasterio.open(path, "r+") as dst:
        for i in range(1, 13):
            dst.update_tags(i, units=units)
    return str(path)


def write_model(path, change, *, months=12, ratio=False, seed=0):
    """A global 5-degree model climatology on 0..360 longitudes with ascending latitude."""
    rng = np.random.default_rng(seed)
    lat, lon = np.arange(-87.5, 90, 5.0), np.arange(2.5, 360, 5.0)
    hist = rng.uniform(10, 40, size=(months, lat.size, lon.size))
    data = hist * change if ratio else hist + change
    ds = xr.Dataset({"v": (("month", "lat", "lon"), data.astype("float32"))},
                    coords={"month": np.arange(1, months + 1), "lat": lat, "lon": lon})
    ds.to_netcdf(path)
    hist_path = str(path).replace(".nc", "_hist.nc")
    xr.Dataset({"v": (("month", "lat", "lon"), hist.astype("float32"))}, coords=ds.coords).to_netcdf(hist_path)
    return hist_path, str(path)


def test_single_form_constant_anomaly_on_a_0_360_model(tmp_path):
    # Analytic: a constant +2 degC change interpolates to +2 everywhere (Hay et al. 2000 method),
    # including across the 0/360 seam of the model grid (baseline lies at -179 degrees).
    base = write_baseline(tmp_path / "tmin.tif", TMIN, "degC")
    hist, fut = write_model(tmp_path / "fut.nc", 2.0)
    out = tmp_path / "tmin_future.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", base, "--model-historical", hist,
                                      "--model-future", fut, "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "additive" in result.output
    with rasterio.open(out) as src:
        assert list(src.descriptions) == [f"M{m:02d}" for m in range(1, 13)]
        data = src.read()
    np.testing.assert_allclose(data, (TMIN + 2.0)[:, None, None] * np.ones((12, 4, 6)), atol=1e-4)


def test_single_form_ratio_is_chosen_from_mm_units(tmp_path):
    # Analytic: a constant ratio of 1.1 (all months above the 1 mm floor) scales the baseline.
    base = write_baseline(tmp_path / "prec.tif", PREC, "mm")
    hist, fut = write_model(tmp_path / "fut.nc", 1.1, ratio=True)
    out = tmp_path / "prec_future.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", base, "--model-historical", hist,
                                      "--model-future", fut, "--out", str(out)])
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as src:
        np.testing.assert_allclose(src.read(1), 110.0, rtol=1e-5)


def _batch_setup(tmp_path, swap=False):
    bases = {"tmin": write_baseline(tmp_path / "b_tmin.tif", TMAX if swap else TMIN, "degC"),
             "tmax": write_baseline(tmp_path / "b_tmax.tif", TMIN if swap else TMAX, "degC"),
             "prec": write_baseline(tmp_path / "b_prec.tif", PREC, "mm")}
    models = tmp_path / "models"
    models.mkdir()
    rows = []
    for name, dt, rp in (("p1-mA-2050", 1.0, 1.1), ("p1-mB-2050", 2.0, 0.9)):
        for var in ("tmin", "tmax", "prec"):
            hist, fut = write_model(models / f"{name}_{var}.nc", rp if var == "prec" else dt, ratio=var == "prec")
            rows.append([name, "p1", name.split("-")[1], 2050, var,
                         f"models/{hist.rsplit('/', 1)[1]}", f"models/{fut.rsplit('/', 1)[1]}"])
    table = tmp_path / "models.csv"
    with open(table, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["name", "pathway", "climate_model", "horizon", "variable", "historical", "future"])
        w.writerows(rows)
    args = ["delta", "--table", str(table)] + sum((["--baseline", f"{k}={v}"] for k, v in bases.items()), [])
    return args


def test_batch_with_bioclim_writes_a_scenario_table_project_can_read(tmp_path):
    # Analytic + REFERENCES item 5: +dt on tmin and tmax shifts BIO1 (6.166667) by dt and
    # leaves BIO2 (10.5); a ratio r scales BIO12 (465) by r.
    out_dir = tmp_path / "scen"
    out_dir.mkdir()
    result = CliRunner().invoke(cli, _batch_setup(tmp_path) + ["--out-dir", str(out_dir), "--bioclim"])
    assert result.exit_code == 0, result.output
    scenarios = read_scenarios(out_dir / "scenarios.csv")
    assert [s.name for s in scenarios] == ["p1-mA-2050", "p1-mB-2050"]
    assert [s.climate_model for s in scenarios] == ["mA", "mB"] and scenarios[0].horizon == 2050
    for sc, dt, r in zip(scenarios, (1.0, 2.0), (1.1, 0.9)):
        with rasterio.open(sc.path) as src:
            names = list(src.descriptions)
            np.testing.assert_allclose(src.read(names.index("BIO1") + 1), 6.166667 + dt, atol=1e-4)
            np.testing.assert_allclose(src.read(names.index("BIO2") + 1), 10.5, atol=1e-4)
            np.testing.assert_allclose(src.read(names.index("BIO12") + 1), 465 * r, rtol=1e-5)
    with open(out_dir / "monthly.csv") as fh:
        monthly = list(csv.DictReader(fh))
    assert len(monthly) == 6 and (out_dir / monthly[0]["path"]).is_file()


def test_batch_creates_its_out_dir_and_reads_table_patterns(tmp_path):
    # Common practice, no source: an output folder (and its missing parents) is created; a
    # table cell may be a glob pattern naming one series' files
    args = _batch_setup(tmp_path)
    table = tmp_path / "models.csv"
    lines = table.read_text().splitlines()
    lines[1] = lines[1].replace("models/p1-mA-2050_tmin_hist.nc", "models/p1-mA-2050_tmin_h*.nc")
    table.write_text("\n".join(lines) + "\n")
    out_dir = tmp_path / "new" / "scen"
    result = CliRunner().invoke(cli, args + ["--out-dir", str(out_dir), "--bioclim"])
    assert result.exit_code == 0, result.output
    assert (out_dir / "scenarios.csv").is_file() and (out_dir / "p1-mA-2050" / "tmin.tif").is_file()
    with rasterio.open(out_dir / "p1-mA-2050" / "tmin.tif") as src:
        assert src.tags()["model_historical"].endswith("p1-mA-2050_tmin_hist.nc")
    blocked = tmp_path / "a_file"
    blocked.write_text("x")
    result = CliRunner().invoke(cli, args + ["--out-dir", str(blocked / "scen")])
    assert result.exit_code == 2 and f"{blocked} is a file, not a folder" in result.output


@pytest.mark.parametrize("row, message", [
    ("p1-mA-2050,p1,mA,2050,tmin,models/p1-mA-2050_tmin_hist.nc", "line 2 has 6 fields; expected 7"),
    ("p1-mA-2050,p1,mA,2050,tmin,,models/p1-mA-2050_tmin_fut.nc", "line 2 column 'historical' is empty"),
    ("p1-mA-2050,p1,mA,2050,,models/a.nc,models/b.nc", "line 2 column 'variable' is empty"),
    ("p1-mA-2050,p1,mA,2050,tmin,models/none_*.nc,models/b.nc", "historical pattern 'models/none_*.nc' matches no"),
])
def test_batch_table_rows_broken_one_line_nothing_written(tmp_path, row, message):
    args = _batch_setup(tmp_path)
    table = tmp_path / "models.csv"
    table.write_text(table.read_text().splitlines()[0] + "\n" + row + "\n")
    out_dir = tmp_path / "scen"
    result = CliRunner().invoke(cli, args + ["--out-dir", str(out_dir)])
    assert result.exit_code == 2 and message in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1 and not out_dir.exists()


def test_batch_stops_before_writing_on_swapped_baselines(tmp_path):
    out_dir = tmp_path / "scen"
    out_dir.mkdir()
    result = CliRunner().invoke(cli, _batch_setup(tmp_path, swap=True) + ["--out-dir", str(out_dir), "--bioclim"])
    assert result.exit_code == 2 and "tmin > tmax in 288 cell-months" in result.output
    assert not any(out_dir.rglob("*.*"))


def test_model_with_eleven_months_and_bad_table(tmp_path):
    base = write_baseline(tmp_path / "tmin.tif", TMIN, "degC")
    hist, fut = write_model(tmp_path / "fut.nc", 2.0, months=11)
    out = tmp_path / "o.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", base, "--model-historical", hist,
                                      "--model-future", fut, "--out", str(out)])
    assert result.exit_code == 2 and "fut_hist.nc: 11 steps along 'month'; expected 12" in result.output
    assert not out.exists()
    table = tmp_path / "t.csv"
    table.write_text("name,pathway,horizon\nx,p1,2050\n")
    result = CliRunner().invoke(cli, ["delta", "--table", str(table), "--baseline", f"tmin={base}",
                                      "--out-dir", str(tmp_path)])
    assert result.exit_code == 2 and "column 'climate_model' missing" in result.output


@pytest.mark.parametrize("extra,phrase", [
    (["--out-dir", "x"], "belong to the batch form"),
    ([], "single form needs"),
])
def test_form_mixups(tmp_path, extra, phrase):
    base = write_baseline(tmp_path / "tmin.tif", TMIN, "degC")
    result = CliRunner().invoke(cli, ["delta", "--baseline", base, *extra])
    assert result.exit_code == 2 and phrase in result.output


DEMO_MONTHLY = demo_dir() / "monthly"
DEMO_HIST, DEMO_FUT = DEMO_MONTHLY / "model-a_historical.nc", DEMO_MONTHLY / "model-a_high_2080.nc"


def test_single_form_picks_one_variable_of_a_multi_variable_model(tmp_path):
    # Analytic: bilinear interpolation is a convex combination of the four surrounding cells
    # (Press et al., Numerical Recipes 3rd ed., section 3.6), so each month's additive change on
    # the baseline grid lies within that month's range of the model's tmin change.
    out = tmp_path / "tmin_2080.tif"
    base = DEMO_MONTHLY / "tmin.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(base), "--model-historical", str(DEMO_HIST),
                                      "--model-future", str(DEMO_FUT), "--variable", "tmin", "--out", str(out)])
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as src, rasterio.open(base) as b, \
            xr.open_dataset(DEMO_HIST) as hist, xr.open_dataset(DEMO_FUT) as fut:
        assert src.count == 12
        change = src.read().astype(float) - b.read().astype(float)
        model_change = (fut["tmin"] - hist["tmin"]).values
    for m in range(12):
        got = change[m][np.isfinite(change[m])]
        assert got.size > 0
        assert np.nanmin(model_change[m]) - 1e-3 <= got.min() and got.max() <= np.nanmax(model_change[m]) + 1e-3
    # Common practice, no source: without --variable the baseline's stem (tmin.tif -> tmin) picks the same one
    again = tmp_path / "default.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(base), "--model-historical", str(DEMO_HIST),
                                      "--model-future", str(DEMO_FUT), "--out", str(again)])
    assert result.exit_code == 0, result.output
    with rasterio.open(out) as a, rasterio.open(again) as b:
        np.testing.assert_array_equal(a.read(), b.read())


def test_multi_variable_model_without_a_match_names_the_variables(tmp_path):
    # Common practice, no source: an ambiguous file is refused with the choices and the way out
    base = tmp_path / "lowest.tif"
    base.write_bytes((DEMO_MONTHLY / "tmin.tif").read_bytes())
    out = tmp_path / "o.tif"
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(base), "--model-historical", str(DEMO_HIST),
                                      "--model-future", str(DEMO_FUT), "--out", str(out)])
    assert result.exit_code == 2
    assert "3 gridded variables (tmin, tmax, prec)" in result.output and "--variable" in result.output
    assert not out.exists()
    result = CliRunner().invoke(cli, ["delta", "--baseline", str(base), "--model-historical", str(DEMO_HIST),
                                      "--model-future", str(DEMO_FUT), "--variable", "tavg", "--out", str(out)])
    assert result.exit_code == 2 and "no variable 'tavg'" in result.output


def test_batch_model_variable_column(tmp_path):
    # Common practice, no source: the model_variable column reads the same NetCDF variable the
    # row's variable would by default, so both rows give identical grids.
    table = tmp_path / "models.csv"
    table.write_text("name,pathway,climate_model,horizon,variable,model_variable,historical,future\n"
                     f"a,high,model-a,2080,tmin,,{DEMO_HIST},{DEMO_FUT}\n"
                     f"a,high,model-a,2080,lowest,tmin,{DEMO_HIST},{DEMO_FUT}\n")
    out_dir = tmp_path / "scen"
    out_dir.mkdir()
    base = str(DEMO_MONTHLY / "tmin.tif")
    result = CliRunner().invoke(cli, ["delta", "--table", str(table), "--baseline", f"tmin={base}",
                                      "--baseline", f"lowest={base}", "--out-dir", str(out_dir)])
    assert result.exit_code == 0, result.output
    with rasterio.open(out_dir / "a" / "tmin.tif") as a, rasterio.open(out_dir / "a" / "lowest.tif") as b:
        assert a.count == 12
        np.testing.assert_array_equal(a.read(), b.read())
