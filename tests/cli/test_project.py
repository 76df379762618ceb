"""Tests of `envelope project`: single grid, scenario batch with ensembles, and refusals (exit 2, nothing written)."""

import csv

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.modelfile import save_model
from envelope.io.rasters import open_layer, read_tags
from envelope.io.writing import write_raster
from envelope.kernels.mess import reference_from_training
from envelope.models import PointProcessModel

NAMES = ["t", "p"]


def _grid(values, res=0.5, crs="EPSG:4326"):
    values = np.asarray(values, dtype=np.float32)
    _, ny, nx = values.shape
    da = xr.DataArray(values, dims=("variable", "y", "x"),
                      coords={"variable": NAMES, "y": -40.0 - res * (np.arange(ny) + 0.5),
                              "x": -150.0 + res * (np.arange(nx) + 0.5)}, name="climate")
    return da.rio.write_crs(crs)


@pytest.fixture
def study(tmp_path):
    rng = np.random.default_rng(0)
    X = np.r_[rng.normal(0.5, 0.5, (80, 2)), rng.normal(0, 1, (800, 2))]
    y = np.r_[np.ones(80), np.zeros(800)]
    model = PointProcessModel(classes=("linear", "quadratic"), C=20.0).fit(X, y)
    meta = {"variables": [{"name": n, "min": float(X[:, j].min()), "max": float(X[:, j].max())}
                          for j, n in enumerate(NAMES)],
            "threshold": {"value": 0.3, "rule": "max_tss"}, "mess_reference": reference_from_training(X).to_dict()}
    save_model(tmp_path / "m.envm", model, meta)
    for i, name in enumerate(("a1", "a2", "a3")):
        write_raster(_grid(rng.normal(0.2 * i, 1.2, (2, 10, 12))), tmp_path / f"{name}.tif")
    (tmp_path / "scen.csv").write_text("name,pathway,climate_model,horizon,path\n"
                                       "low-m1,low,m1,2050,a1.tif\nlow-m2,low,m2,2050,a2.tif\n"
                                       "low-m3,low,m3,2050,a3.tif\n")
    return tmp_path


def test_single_projection(study):
    # Common practice, no source: outputs exist with the threshold in the tags; share printed
    res = CliRunner().invoke(cli, ["project", str(study / "m.envm"), "--climate", str(study / "a1.tif"),
                                   "--out", str(study / "s.tif"), "--mess", str(study / "mess.tif"),
                                   "--binary", str(study / "b.tif")])
    assert res.exit_code == 0, res.output
    assert "novel climate (MESS < 0)" in res.output
    assert read_tags(study / "s.tif")["threshold"] == 0.3
    assert (study / "mess.tif").exists() and (study / "b.tif").exists()


def test_scenario_batch_and_ensembles(study):
    # Source: numpy mean / count over the three written suitability rasters
    out = study / "proj"
    res = CliRunner().invoke(cli, ["project", str(study / "m.envm"), "--scenarios", str(study / "scen.csv"),
                                   "--out-dir", str(out), "--mess"])
    assert res.exit_code == 0, res.output
    with open(out / "suitability_table.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["name"] for r in rows] == ["low-m1", "low-m2", "low-m3"]
    assert all(r["mess_path"].endswith("_mess.tif") and 0 <= float(r["novel_share"]) <= 1 for r in rows)
    S = np.stack([open_layer(out / r["path"]).values for r in rows]).astype(np.float64)
    np.testing.assert_allclose(open_layer(out / "ensemble_low_2050_mean.tif").values, S.mean(0), rtol=1e-6)
    count = open_layer(out / "ensemble_low_2050_count.tif", categorical=True).values
    np.testing.assert_array_equal(count, (S >= 0.3).sum(0))
    consensus = open_layer(out / "ensemble_low_2050_consensus.tif", categorical=True).values
    np.testing.assert_array_equal(consensus, ((S >= 0.3).sum(0) >= 2).astype(consensus.dtype))
    tags = read_tags(out / "ensemble_low_2050_consensus.tif")
    assert tags["consensus_min_models"] == 2 and tags["n_models"] == 3


def test_scenario_grids_must_match(study):
    # Common practice, no source: the error names both scenarios; nothing is written
    rng = np.random.default_rng(1)
    write_raster(_grid(rng.normal(0, 1, (2, 10, 12)), res=0.25), study / "a2.tif", overwrite=True)
    out = study / "proj"
    res = CliRunner().invoke(cli, ["project", str(study / "m.envm"), "--scenarios", str(study / "scen.csv"),
                                   "--out-dir", str(out)])
    assert res.exit_code == 2
    assert "scenario low-m2" in res.output and "scenario low-m1" in res.output and "resolution" in res.output
    assert not out.exists() or not any(out.iterdir())


def test_missing_variable_exit_2(study):
    # Common practice, no source
    one = _grid(np.zeros((2, 4, 4))).assign_coords(variable=["t", "r"])
    write_raster(one, study / "one.tif")
    res = CliRunner().invoke(cli, ["project", str(study / "m.envm"), "--climate", str(study / "one.tif"),
                                   "--out", str(study / "s.tif")])
    assert res.exit_code == 2 and "'p' needed by the model is missing" in res.output
    assert not (study / "s.tif").exists()


def test_unreadable_model_exit_2(study):
    # Common practice, no source
    (study / "junk.envm").write_text("junk")
    res = CliRunner().invoke(cli, ["project", str(study / "junk.envm"), "--climate", str(study / "a1.tif"),
                                   "--out", str(study / "s.tif")])
    assert res.exit_code == 2 and "junk.envm" in res.output
    assert not (study / "s.tif").exists()


def test_output_exists_needs_overwrite(study):
    # Common practice, no source: refusal names --overwrite; the old file is untouched
    (study / "s.tif").write_bytes(b"old")
    args = ["project", str(study / "m.envm"), "--climate", str(study / "a1.tif"), "--out", str(study / "s.tif"),
            "--mess", str(study / "mess.tif")]
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 2 and "--overwrite" in res.output
    assert (study / "s.tif").read_bytes() == b"old" and not (study / "mess.tif").exists()
    assert CliRunner().invoke(cli, args + ["--overwrite"]).exit_code == 0


def test_usage_errors(study):
    # Common practice, no source: option combinations are checked before any work
    runner = CliRunner()
    res = runner.invoke(cli, ["project", str(study / "m.envm"), "--scenarios", str(study / "scen.csv")])
    assert res.exit_code == 2 and "--out-dir" in res.output
    res = runner.invoke(cli, ["project", str(study / "m.envm"), "--climate", str(study / "a1.tif"),
                              "--out", str(study / "s.tif"), "--mess"])
    assert res.exit_code == 2 and "needs a file name" in res.output
    res = runner.invoke(cli, ["project", str(study / "m.envm"), "--scenarios", str(study / "scen.csv"),
                              "--out-dir", str(study / "o"), "--agreement", "1.5"])
    assert res.exit_code == 2 and "1.5" in res.output
