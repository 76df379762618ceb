"""`envelope evaluate` on the fictional demo study: metrics against scikit-learn, background mode, bad input."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn.metrics import cohen_kappa_score, roc_auc_score

from envelope.cli.main import cli
from envelope.io.modelfile import load_model
from envelope.io.rasters import open_climate
from envelope.records import cells_of, values_at
from envelope.study.demo import demo_dir

DEMO = demo_dir()


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("evaluate")
    model = folder / "m.envm"
    # the baseline's bands named by the user, as a portal's unnamed files would be
    res = run("fit", "--presences", DEMO / "presences.csv", "--climate", f"bio1={DEMO / 'baseline.tif'}:1",
              "--climate", f"bio12={DEMO / 'baseline.tif'}:4", "--background", 1500, "--folds", 3,
              "--features", "linear,quadratic", "--out", model)
    assert res.exit_code == 0, res.output
    truth = pd.read_csv(DEMO / "truth_sample.csv").sample(500, random_state=3)
    test = pd.DataFrame({"decimalLongitude": truth["lon"], "decimalLatitude": truth["lat"],
                         "scientificName": "Fictocarabus demonstratus",
                         "occurrenceStatus": np.where(truth["present"] == 1, "present", "absent")})
    test.to_csv(folder / "test.csv", index=False)
    return folder, model


def _expected_scores(model, test_csv):
    estimator, meta = load_model(model)
    stack = open_climate(DEMO / "baseline.tif").isel(variable=[0, 3])
    test = pd.read_csv(test_csv)
    rows, cols, _ = cells_of(stack, test["decimalLongitude"].to_numpy(), test["decimalLatitude"].to_numpy())
    cells = pd.DataFrame({"r": rows, "c": cols, "p": test["occurrenceStatus"] == "present"})
    cells = cells.sort_values("p", ascending=False, kind="stable").drop_duplicates(["r", "c"]).sort_index()
    X = values_at(stack, cells["r"], cells["c"])
    keep = np.isfinite(X).all(axis=1)
    lo = [v["min"] for v in meta["variables"]]
    hi = [v["max"] for v in meta["variables"]]
    score = estimator.predict_proba(np.clip(X[keep], lo, hi))[:, 1]
    return cells["p"].to_numpy()[keep].astype(int), score, meta["threshold"]["value"]


def test_presence_absence_metrics_match_scikit_learn(fitted):
    folder, model = fitted
    res = run("evaluate", model, "--records", folder / "test.csv", "--climate", f"bio1={DEMO / 'baseline.tif'}:bio1",
              "--climate", f"bio12={DEMO / 'baseline.tif'}:bio12", "--summary", folder / "eval.json",
              "--calibration", folder / "cal.png")
    assert res.exit_code == 0, res.output
    summary = json.loads((folder / "eval.json").read_text())
    for key in ("auc", "tss", "kappa", "boyce", "omission", "threshold", "n_presences", "n_absences"):
        assert key in summary
    assert "n_background" not in summary and summary["data"] == "presence-absence"
    y, score, threshold = _expected_scores(model, folder / "test.csv")
    assert summary["threshold"] == pytest.approx(threshold)
    assert summary["n_presences"] == int(y.sum()) and summary["n_absences"] == int((1 - y).sum())
    # Source: scikit-learn roc_auc_score and cohen_kappa_score on predictions made here independently
    assert summary["auc"] == pytest.approx(roc_auc_score(y, score), abs=1e-9)
    assert summary["kappa"] == pytest.approx(cohen_kappa_score(y, (score >= threshold).astype(int)), abs=1e-9)
    sens, spec = np.mean(score[y == 1] >= threshold), np.mean(score[y == 0] < threshold)
    assert summary["tss"] == pytest.approx(sens + spec - 1, abs=1e-9)
    assert summary["omission"] == pytest.approx(1 - sens, abs=1e-9)
    assert (folder / "cal.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the calibration bins hold every scored record
    assert sum(b["n"] for b in summary["calibration"]) == y.size


def test_presences_only_are_scored_against_background(fitted):
    folder, model = fitted
    res = run("evaluate", model, "--records", folder / "test.csv", "--climate", f"bio1={DEMO / 'baseline.tif'}:1",
              "--climate", f"bio12={DEMO / 'baseline.tif'}:4", "--no-absences", "--background", 800,
              "--summary", folder / "bg.json")
    assert res.exit_code == 0, res.output
    summary = json.loads((folder / "bg.json").read_text())
    assert summary["data"] == "presence-background" and "n_absences" not in summary
    assert 0 < summary["n_background"] <= 800 and 0.5 < summary["auc"] <= 1.0


def test_bad_inputs_exit_2(fitted, tmp_path):
    folder, model = fitted
    # the model's variables are bio1 and bio12; the file's bands are named otherwise
    res = run("evaluate", model, "--records", folder / "test.csv", "--climate", f"temp={DEMO / 'baseline.tif'}:1")
    assert res.exit_code == 2 and "'bio1' needed by the model is missing" in res.output
    res = run("evaluate", model, "--records", folder / "test.csv", "--climate", DEMO / "baseline.tif",
              "--species", "Fictocarabus demonstrates")
    assert res.exit_code == 2 and "nearest names: Fictocarabus demonstratus" in res.output
    res = run("evaluate", model, "--records", folder / "test.csv", "--climate", DEMO / "baseline.tif",
              "--calibration", tmp_path / "cal.jpg")
    assert res.exit_code == 2 and "expected a .png" in res.output
