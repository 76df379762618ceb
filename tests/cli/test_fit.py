"""`envelope fit` from the command line: outputs, contract keys, bad input."""

import json

import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.study.demo import demo_dir

DEMO = demo_dir()
BASE = ["fit", "--presences", str(DEMO / "presences.csv"), "--climate", str(DEMO / "baseline.tif"),
        "--background", "1000", "--folds", "3", "--method", "envelope"]


def test_fit_writes_model_summary_and_folds(tmp_path):
    out = tmp_path / "m.envm"
    result = CliRunner().invoke(cli, BASE + ["--out", str(out), "--summary", str(tmp_path / "fit.json")])
    assert result.exit_code == 0, result.output
    assert out.exists() and (tmp_path / "fit.folds.csv").exists()
    summary = json.loads((tmp_path / "fit.json").read_text())
    for key in ("n_presences", "n_background", "method", "variables", "threshold", "cv"):
        assert key in summary
    assert summary["method"] == "envelope"
    # Common practice, no source: 1000 draws with replacement per unit area; repeats are weights
    bg = summary["background"]
    assert summary["bias_correction"] == bg["bias_correction"] == "none" and bg["per_area"] is True
    assert bg["n_draws"] == 1000 and bg["weight_sum"] == 1000
    assert summary["n_background"] == bg["n_cells"] <= 1000
    assert "background: 1000 draws with replacement" in " ".join(result.output.split())
    assert "duplicate cell" in result.output  # the record-cleaning table

    again = CliRunner().invoke(cli, BASE + ["--out", str(out)])
    assert again.exit_code == 2 and "--overwrite" in again.output

    inspect = CliRunner().invoke(cli, ["inspect", str(out), "--json"])
    assert inspect.exit_code == 0


@pytest.mark.parametrize("extra, phrase", [
    (["--variables", "bio1,nope"], "'nope'"),
    (["--threshold-rule", "best"], "not a rule"),
    (["--threshold-rule", "1.5"], "0..1"),
    (["--features", "linear,cubic"], "--features"),
])
def test_bad_input_exit_2_and_no_model(tmp_path, extra, phrase):
    out = tmp_path / "m.envm"
    result = CliRunner().invoke(cli, BASE + ["--out", str(out)] + extra)
    assert result.exit_code == 2
    assert phrase in result.output
    assert list(tmp_path.iterdir()) == []


def test_presences_without_usable_rows(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("decimalLongitude,decimalLatitude\nabc,def\n,\n")
    result = CliRunner().invoke(cli, ["fit", "--presences", str(bad), "--climate", str(DEMO / "baseline.tif"),
                                      "--out", str(tmp_path / "m.envm")])
    assert result.exit_code == 2
    assert "bad.csv" in result.output
    assert not (tmp_path / "m.envm").exists()


@pytest.mark.parametrize("extra, phrase", [
    (["--bias-method", "weighted"], "needs a bias"),
    (["--bias", str(DEMO / "effort.tif"), "--bias-method", "covariate"], "point-process model only"),
    (["--bias-method", "both"], "'both' is not one of"),
])
def test_bad_bias_method_exit_2(tmp_path, extra, phrase):
    # Common practice, no source: one-line errors naming the problem, nothing written
    result = CliRunner().invoke(cli, BASE + ["--out", str(tmp_path / "m.envm")] + extra)
    assert result.exit_code == 2
    assert phrase in result.output
    assert list(tmp_path.iterdir()) == []


def test_bias_method_default_is_covariate_for_pointprocess(tmp_path):
    # Common practice, no source: --bias with the point-process model takes log effort as a covariate by
    # default, and the model file and summary say so (Warton, Renner & Ramp 2013 model-based correction).
    from envelope.io.modelfile import load_model

    out = tmp_path / "m.envm"
    args = ["fit", "--presences", str(DEMO / "presences.csv"), "--climate", str(DEMO / "baseline.tif"),
            "--variables", "bio5,bio6,bio12", "--background", "1000", "--folds", "3", "--blocks-km", "60",
            "--bias", str(DEMO / "effort.tif"), "--out", str(out)]
    result = CliRunner().invoke(cli, args)
    assert result.exit_code == 0, result.output
    summary = json.loads(out.with_name("m.fit.json").read_text())
    assert summary["bias_correction"] == "covariate"
    effort = summary["background"]["effort"]
    assert effort["coef"] > 0 and effort["reference_rule"] == "max"
    estimator, metadata = load_model(out)
    assert metadata["bias_correction"] == "covariate"
    assert estimator.effort_coef_ == pytest.approx(effort["coef"]) and estimator.effort_term_ != 0.0
    assert "bias correction covariate (log-effort slope" in " ".join(result.output.split())

    weighted = CliRunner().invoke(cli, args[:-1] + [str(tmp_path / "w.envm"), "--bias-method", "weighted"])
    assert weighted.exit_code == 0, weighted.output
    summary = json.loads((tmp_path / "w.fit.json").read_text())
    assert summary["bias_correction"] == "weighted-background" and "effort" not in summary["background"]
    assert "area x bias" in summary["background"]["probability"].replace("true cell ", "")


def test_bias_file_recorded_in_provenance(tmp_path):
    # Common practice, no source: every input file of a fit, the bias raster included, is checksummed
    import hashlib

    from envelope.io.modelfile import read_manifest

    bias = DEMO / "effort.tif"
    out = tmp_path / "m.envm"
    result = CliRunner().invoke(cli, BASE + ["--bias", str(bias), "--out", str(out)])
    assert result.exit_code == 0, result.output
    inputs = read_manifest(out)["metadata"]["provenance"]["inputs"]
    # Source: hashlib (Python standard library) computes the reference digest
    assert inputs[str(bias)] == hashlib.sha256(bias.read_bytes()).hexdigest()


def test_forced_feature_classes_reach_the_model_and_inspect(tmp_path):
    # Common practice, no source: --features fixes the point-process classes (no CV choice among sets)
    from envelope.io.modelfile import load_model

    out = tmp_path / "m.envm"
    args = [a if a != "envelope" else "pointprocess" for a in BASE]
    result = CliRunner().invoke(cli, args + ["--features", "quadratic,linear", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "features: linear, quadratic (given)" in result.output
    model, meta = load_model(out)
    assert model.expander_.classes_used_ == ("linear", "quadratic")
    assert meta["feature_classes"]["rule"] == "given" and meta["feature_classes"]["chosen"] == ["linear", "quadratic"]
    shown = CliRunner().invoke(cli, ["inspect", str(out)])
    assert "Features     linear, quadratic (given)" in shown.output


def test_two_folds_work_for_the_default_method(tmp_path):
    # Common practice, no source: --folds accepts 2 (its documented minimum); with two folds the
    # point-process model's own CV splits each training half by spatial block, and the summary says so
    result = CliRunner().invoke(cli, ["fit", "--presences", str(DEMO / "presences.csv"), "--climate",
                                      str(DEMO / "baseline.tif"), "--background", "1000", "--folds", "2",
                                      "--features", "linear,quadratic", "--out", str(tmp_path / "m.envm")])
    assert result.exit_code == 0, result.output
    summary = json.loads((tmp_path / "m.fit.json").read_text())
    assert summary["cv"]["n_folds"] == 2
    assert any("--folds 2" in note for note in summary["notes"])
