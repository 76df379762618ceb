"""The hindcast pipeline on a fictional warming landscape whose species tracks its isotherms."""

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.writing import write_raster
from envelope.kernels.change import meridian_arc_km
from envelope.pipelines.hindcast import HINDCAST_FILES, HindcastOptions, hindcast_files

SPECIES = "Fictus marginalis"
WARMING = 1.5   # degrees C between the periods; temperature falls 1 degree C per degree of latitude


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    """Open-ocean grid 40-56 N, 0.2-degree cells; the species lives where 8 < t < 14 (46-52 N, then 47.5-53.5 N)."""
    tmp = tmp_path_factory.mktemp("hindcast")
    rng = np.random.default_rng(0)
    ny, nx, res = 80, 40, 0.2
    y = 56.0 - res * (np.arange(ny) + 0.5)
    x = -150.0 + res * (np.arange(nx) + 0.5)
    t0 = 20.0 - (y[:, None] - 40.0) + 0.0 * x[None, :]
    rows = []
    for k, (warming, first) in enumerate(((0.0, 1970), (WARMING, 2000))):
        t = t0 + warming
        stack = xr.DataArray(t[None].astype("float32"), dims=("variable", "y", "x"),
                             coords={"variable": ["t"], "y": y, "x": x}).rio.write_crs("EPSG:4326")
        (tmp / f"period_{k + 1}").mkdir()
        write_raster(stack.isel(variable=0, drop=True).rename("t"), tmp / f"period_{k + 1}" / "t.tif")
        occupied = rng.random((ny, nx)) < np.clip(1.0 - np.abs(t - 11.0) / 3.0, 0, 1)   # peaked niche, 8-14
        n = rng.poisson(3.0, size=(ny, nx))
        for r, c in zip(*np.nonzero(n)):
            for _ in range(n[r, c]):
                focal = occupied[r, c] and rng.random() < 0.4
                rows.append({"decimalLongitude": x[c], "decimalLatitude": y[r], "year": first + rng.integers(0, 20),
                             "scientificName": SPECIES if focal else "Alia communis"})
    pd.DataFrame(rows).to_csv(tmp / "records.csv", index=False)
    return tmp


def test_hindcast_both_ways(world, tmp_path):
    options = HindcastOptions(periods="1970-1989,2000-2019", species=SPECIES, method="envelope", background=1000,
                              folds=3, cv="random", min_records=2)
    out = hindcast_files(world / "records.csv", world / "period_1" / "t.tif", world / "period_2" / "t.tif", tmp_path / "hc",
                         options=options)
    for name in HINDCAST_FILES.values():
        assert (tmp_path / "hc" / name).exists()
    assert json.loads((tmp_path / "hc" / "hindcast.json").read_text())["forward"]["auc"] == out["forward"]["auc"]
    # Analytic: the isotherms move WARMING degrees of latitude north, so both margins move the
    # meridian arc of 1.5 degrees (~167 km); the model fitted in one period sees the same niche.
    truth = meridian_arc_km(52.0, 53.5)
    obs = out["observed"]["poleward_margin_shift_km"]
    assert obs == pytest.approx(truth, rel=0.15)
    for key, sign in (("forward", 1), ("backward", -1)):
        block = out[key]
        # Analytic bound: presence/background AUC cannot exceed 1 - (range share)/2 ~ 0.81 here;
        # common practice, no source: AUC > 0.7 and Boyce > 0.5 mark a useful model.
        assert block["auc"] > 0.7 and block["boyce"] > 0.5
        assert block["observed_poleward_margin_shift_km"] == pytest.approx(sign * obs)
        assert block["predicted_poleward_margin_shift_km"] == pytest.approx(sign * truth, rel=0.2)
        assert block["predicted_equatorward_margin_shift_km"] == pytest.approx(
            sign * meridian_arc_km(46.0, 47.5), rel=0.2)


def test_cli_bad_periods_exit_2(world, tmp_path):
    result = CliRunner().invoke(cli, ["hindcast", str(world / "records.csv"), "--climate-1", str(world / "period_1" / "t.tif"),
                                      "--climate-2", str(world / "period_2" / "t.tif"), "--periods", "1970-2005,2000-2019",
                                      "--species", SPECIES, "--out", str(tmp_path / "hc")])
    assert result.exit_code == 2 and "overlap" in result.output
    assert not (tmp_path / "hc" / "hindcast.json").exists()


def _cli_args(world, out, *extra):
    return ["hindcast", str(world / "records.csv"), "--climate-1", str(world / "period_1" / "t.tif"),
            "--climate-2", str(world / "period_2" / "t.tif"), "--periods", "1970-1989,2000-2019",
            "--species", SPECIES, "--out", str(out), "--background", "1000", "--folds", "3", "--min-records", "2",
            *extra]


def test_cli_features_and_cv_reach_the_fits(world, tmp_path):
    # --features and --cv mean what they mean for `envelope fit`: the same validation and the same fits
    bad = CliRunner().invoke(cli, _cli_args(world, tmp_path / "bad", "--features", "linear,cubic"))
    assert bad.exit_code == 2 and "--features" in bad.output
    assert not (tmp_path / "bad" / "hindcast.json").exists()
    ok = CliRunner().invoke(cli, _cli_args(world, tmp_path / "hc", "--features", "linear,quadratic", "--cv", "random"))
    assert ok.exit_code == 0, ok.output
    forward = json.loads((tmp_path / "hc" / "hindcast.json").read_text())["forward"]
    # Common practice, no source: AUC > 0.7 marks a useful model (as above)
    assert forward["auc"] > 0.7
