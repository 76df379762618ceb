"""`envelope inspect`: text and JSON output, bad files."""

import json

import numpy as np
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.modelfile import save_model
from envelope.models import PercentileEnvelope

META = {"variables": [{"name": "bio1", "units": "degC", "min": -2.0, "max": 3.0}],
        "threshold": {"value": 0.42, "rule": "max_sss"},
        "cv": {"scheme": "spatial blocks", "n_folds": 5, "metrics": {"auc": {"mean": 0.81, "sd": 0.03}}},
        "provenance": {"inputs": {"records.csv": "ab" * 32}, "seed": 7}}


def _model(tmp_path):
    X = np.r_[np.linspace(0, 1, 20), np.linspace(-1, 2, 50)][:, None]
    y = np.r_[np.ones(20), np.zeros(50)]
    return save_model(tmp_path / "m.envm", PercentileEnvelope().fit(X, y), META)


def test_text_output(tmp_path):
    # Common practice, no source: the summary names method, variables, threshold, CV, provenance
    result = CliRunner().invoke(cli, ["inspect", str(_model(tmp_path))])
    assert result.exit_code == 0, result.output
    for phrase in ["envelope (envelope.models.percentile.PercentileEnvelope)", "bio1 [degC]",
                   "training range -2 .. 3", "0.42 (rule: max_sss)", "auc", "0.81 ± 0.03",
                   "records.csv", "seed: 7"]:
        assert phrase in result.output


def test_json_output_keys(tmp_path):
    # Common practice, no source
    result = CliRunner().invoke(cli, ["inspect", str(_model(tmp_path)), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert {"method", "variables", "threshold", "cv", "provenance", "software", "file_format"} <= set(data)
    assert data["method"] == "envelope" and data["threshold"]["rule"] == "max_sss"


def test_bad_file_exit_2(tmp_path):
    # Common practice, no source: EnvelopeError -> one line on stderr, exit status 2
    bad = tmp_path / "bad.envm"
    bad.write_text("not a model")
    result = CliRunner().invoke(cli, ["inspect", str(bad)])
    assert result.exit_code == 2
    assert "bad.envm: not an envelope model file" in result.output


def test_text_shows_flat_cv_metrics_and_software_once(tmp_path):
    # Common practice, no source: the table repeats the CV summary `envelope fit` writes as flat
    # keys (auc_mean, auc_sd, ...) and lists the software versions on one line
    import re

    meta = {**META, "cv": {"scheme": "block", "n_folds": 3, "auc_mean": 0.812, "auc_sd": 0.031,
                           "tss_mean": 0.5, "tss_sd": 0.1, "omission_p10": None},
            "provenance": {"inputs": {"records.csv": "ab" * 32}, "seed": 7, "software": {"gdal-test": "9.9"}}}
    X = np.r_[np.linspace(0, 1, 20), np.linspace(-1, 2, 50)][:, None]
    y = np.r_[np.ones(20), np.zeros(50)]
    path = save_model(tmp_path / "m.envm", PercentileEnvelope().fit(X, y), meta)
    result = CliRunner().invoke(cli, ["inspect", str(path)])
    assert result.exit_code == 0, result.output
    assert re.search(r"AUC\s+0\.812 ± 0\.031", result.output)
    assert re.search(r"TSS\s+0\.5 ± 0\.1", result.output)
    assert result.output.count("software") == 1
    assert "gdal-test 9.9" in result.output and "scikit-learn" in result.output and "xarray" in result.output



def test_text_shows_feature_classes_and_their_cv_scores(tmp_path):
    # Common practice, no source: the chosen set, the rule and every candidate's score are shown
    from envelope.models import PointProcessModel, feature_classes_report

    rng = np.random.default_rng(0)
    X = np.r_[rng.normal(0.5, 0.5, (40, 1)), rng.normal(0, 1, (300, 1))]
    y = np.r_[np.ones(40), np.zeros(300)]
    model = PointProcessModel(classes="cv", C=10.0, random_state=0).fit(X, y)
    fc = feature_classes_report(model)
    path = save_model(tmp_path / "pp.envm", model, {**META, "feature_classes": fc})
    result = CliRunner().invoke(cli, ["inspect", str(path)])
    assert result.exit_code == 0, result.output
    chosen = ", ".join(fc["chosen"])
    assert f"Features     {chosen} (chosen by cross-validation, one-standard-error rule)" in result.output
    assert result.output.count("AUC ") == 3 and result.output.count("<- chosen") == 1
    data = json.loads(CliRunner().invoke(cli, ["inspect", str(path), "--json"]).output)
    assert data["feature_classes"]["chosen"] == fc["chosen"] and len(data["feature_classes"]["scores"]) == 3
    # a point-process file without the record (written before it existed) says so
    old = save_model(tmp_path / "old.envm", model, META)
    assert "Features     not recorded" in CliRunner().invoke(cli, ["inspect", str(old)]).output


class Foreign:
    """A class skops does not know: stands for any foreign object in a payload."""

    def __init__(self):
        self.values = [1, 2]


def test_inspect_refuses_what_project_refuses(tmp_path):
    # Source: skops.io trust model (get_untrusted_types): a payload with a foreign type is
    # refused by loading, so inspect refuses it too, even with every checksum recomputed
    import hashlib
    import zipfile

    import skops.io as sio

    from envelope.io.modelfile import DIGEST_NAME, MANIFEST_NAME, PAYLOAD_NAME, members_digest

    path = _model(tmp_path)
    with zipfile.ZipFile(path) as zf:
        manifest = json.loads(zf.read(MANIFEST_NAME))
    blob = sio.dumps(Foreign())
    assert sio.get_untrusted_types(data=blob)
    manifest["payload"]["sha256"] = hashlib.sha256(blob).hexdigest()
    members = {MANIFEST_NAME: json.dumps(manifest).encode(), PAYLOAD_NAME: blob}
    with zipfile.ZipFile(tmp_path / "u.envm", "w") as zf:
        for name, data in members.items():
            zf.writestr(name, data)
        zf.writestr(DIGEST_NAME, f"sha256 {members_digest(members)}\n")
    for args in (["inspect", str(tmp_path / "u.envm")],
                 ["project", str(tmp_path / "u.envm"), "--climate", str(path), "--out", str(tmp_path / "s.tif")]):
        result = CliRunner().invoke(cli, args)
        assert result.exit_code == 2, result.output
        assert "u.envm: refusing to load untrusted type" in result.output
