"""Model file: round trip, and refusal of tampered, foreign, pickled and untrusted content."""

import hashlib
import json
import pickle
import zipfile

import numpy as np
import pytest
import skops.io as sio

from envelope.errors import InputError, ModelError, OutputExistsError
from envelope.io.modelfile import (DIGEST_NAME, MANIFEST_NAME, MAX_MEMBER_BYTES, PAYLOAD_NAME, load_model,
                                   members_digest, read_manifest, save_model)
from envelope.models import (BoostedTrees, DownsampledForest, PercentileEnvelope,
                             PointProcessModel, SkillWeightedEnsemble)


def _data():
    rng = np.random.default_rng(0)
    X = np.r_[rng.normal(1, 0.5, (60, 2)), rng.normal(0, 1, (400, 2))]
    return X, np.r_[np.ones(60), np.zeros(400)]


META = {"variables": [{"name": "bio1", "units": "degC", "min": -2.1, "max": 3.0},
                      {"name": "bio12", "units": "mm", "min": -3.0, "max": 2.5}],
        "threshold": {"value": 0.42, "rule": "max_sss"},
        "cv": {"scheme": "spatial blocks", "n_folds": 5, "metrics": {"auc": {"mean": 0.81, "sd": 0.03}}},
        "provenance": {"inputs": {"records.csv": "0" * 64}, "seed": 7}}


@pytest.mark.parametrize("estimator", [
    PointProcessModel(random_state=0), PercentileEnvelope(), BoostedTrees(max_iter=20, random_state=0),
    DownsampledForest(n_estimators=5, random_state=0),
    SkillWeightedEnsemble(members=[("e", PercentileEnvelope()), ("p", PointProcessModel(random_state=0))],
                          weights_from={"e": 0.8, "p": 0.9}),
])
def test_round_trip_identical_predictions(tmp_path, estimator):
    # Common practice, no source: what is saved predicts exactly the same after loading
    X, y = _data()
    estimator.fit(X, y)
    path = save_model(tmp_path / "m.envm", estimator, META)
    loaded, meta = load_model(path)
    np.testing.assert_array_equal(loaded.predict_proba(X), estimator.predict_proba(X))
    assert meta == META
    manifest = read_manifest(path)
    assert manifest["format"] == "envelope-model" and manifest["format_version"] == 2


def test_refuses_overwrite_and_bad_metadata(tmp_path):
    # Common practice, no source: no silent overwrite; metadata must match the estimator
    X, y = _data()
    m = PercentileEnvelope().fit(X, y)
    path = save_model(tmp_path / "m.envm", m, META)
    with pytest.raises(OutputExistsError, match="--overwrite"):
        save_model(path, m, META)
    save_model(path, m, META, overwrite=True)
    with pytest.raises(InputError, match="2 variables"):
        save_model(tmp_path / "x.envm", PercentileEnvelope().fit(X[:, :1], y), META)
    assert not (tmp_path / "x.envm").exists()


def _rewrite(path, out, manifest=None, payload=None, digest=True):
    """Copy a model file with a new manifest or payload; ``digest`` recomputes the file's
    digest as a careful forger would, so the checks behind it are what the test meets."""
    with zipfile.ZipFile(path) as zf:
        man = json.loads(zf.read(MANIFEST_NAME))
        pay = zf.read(PAYLOAD_NAME)
        old_digest = zf.read(DIGEST_NAME)
    members = {MANIFEST_NAME: json.dumps(manifest if manifest is not None else man).encode(),
               PAYLOAD_NAME: payload if payload is not None else pay}
    with zipfile.ZipFile(out, "w") as zf:
        for name, data in members.items():
            zf.writestr(name, data)
        zf.writestr(DIGEST_NAME, f"sha256 {members_digest(members)}\n" if digest else old_digest)
    return man, pay


@pytest.fixture
def saved(tmp_path):
    X, y = _data()
    return save_model(tmp_path / "m.envm", PointProcessModel(random_state=0).fit(X, y), META)


def test_flipped_byte_refused(saved, tmp_path):
    # Common practice, no source: SHA-256 of the payload must match the manifest
    man, pay = _rewrite(saved, tmp_path / "copy.envm")
    tampered = bytearray(pay)
    tampered[len(tampered) // 2] ^= 0xFF
    _rewrite(saved, tmp_path / "t.envm", payload=bytes(tampered))
    with pytest.raises(ModelError, match="t.envm: estimator checksum does not match"):
        load_model(tmp_path / "t.envm")
    # a flipped byte in the raw container is refused too (zip CRC or checksum)
    raw = bytearray(saved.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    (tmp_path / "raw.envm").write_bytes(bytes(raw))
    with pytest.raises(ModelError, match="raw.envm"):
        load_model(tmp_path / "raw.envm")


def test_pickle_inside_zip_refused(saved, tmp_path):
    # Common practice, no source: a pickle is never unpickled, even with a matching checksum
    blob = pickle.dumps(PercentileEnvelope())
    man, _ = _rewrite(saved, tmp_path / "copy.envm")
    man["payload"]["sha256"] = hashlib.sha256(blob).hexdigest()
    _rewrite(saved, tmp_path / "p.envm", manifest=man, payload=blob)
    with pytest.raises(ModelError, match="p.envm: estimator payload is not a skops file"):
        load_model(tmp_path / "p.envm")
    with zipfile.ZipFile(tmp_path / "only_pickle.envm", "w") as zf:
        zf.writestr("model.pkl", blob)
    with pytest.raises(ModelError, match="only_pickle.envm: not an envelope model file"):
        load_model(tmp_path / "only_pickle.envm")


def test_random_and_foreign_files_refused(tmp_path):
    # Common practice, no source
    (tmp_path / "r.envm").write_bytes(np.random.default_rng(0).bytes(500))
    with pytest.raises(ModelError, match="r.envm: not an envelope model file"):
        read_manifest(tmp_path / "r.envm")
    with zipfile.ZipFile(tmp_path / "f.envm", "w") as zf:
        zf.writestr(MANIFEST_NAME, json.dumps({"format": "something-else", "format_version": 1}))
    with pytest.raises(ModelError, match="format 'something-else'"):
        load_model(tmp_path / "f.envm")
    with pytest.raises(InputError, match="not found"):
        load_model(tmp_path / "missing.envm")


def test_newer_format_version_refused(saved, tmp_path):
    # Common practice, no source
    man, _ = _rewrite(saved, tmp_path / "copy.envm")
    man["format_version"] = 99
    _rewrite(saved, tmp_path / "v.envm", manifest=man)
    with pytest.raises(ModelError, match="newer envelope"):
        read_manifest(tmp_path / "v.envm")


class Intruder:
    """A class skops does not know: stands for any foreign object in a payload."""

    def __init__(self):
        self.payload = [1, 2, 3]


def test_untrusted_type_refused(saved, tmp_path):
    # Source: skops.io trust model (get_untrusted_types); a foreign class must not load
    blob = sio.dumps(Intruder())
    assert sio.get_untrusted_types(data=blob)  # the premise of this test
    man, _ = _rewrite(saved, tmp_path / "copy.envm")
    man["payload"]["sha256"] = hashlib.sha256(blob).hexdigest()
    _rewrite(saved, tmp_path / "u.envm", manifest=man, payload=blob)
    with pytest.raises(ModelError, match="u.envm: refusing to load untrusted type"):
        load_model(tmp_path / "u.envm")


def test_untrusted_callable_refused_at_save(tmp_path):
    # Common practice, no source: what cannot be loaded safely is not written
    X, y = _data()

    def my_score(est, X_, y_, groups):
        return 0.9

    ens = SkillWeightedEnsemble(members=[("e", PercentileEnvelope())], score_func=my_score).fit(X, y)
    with pytest.raises(ModelError, match="cannot store type"):
        save_model(tmp_path / "e.envm", ens, META)
    assert not (tmp_path / "e.envm").exists()


OLD_FILE = __import__("pathlib").Path(__file__).parent / "data" / "pointprocess_v1_auto.envm"


def test_model_file_from_before_cv_feature_choice_still_loads_and_projects():
    # Common practice, no source: a file written by the previous release (classes="auto", no
    # feature_selection_, no metadata feature_classes; made with the code of commit 351e82f)
    # loads, predicts what it predicted then, compiles to the fast table, and is described.
    from envelope.kernels.predict import compile_pointprocess, suitability_table
    from envelope.io.modelfile import model_summary
    from envelope.models import feature_classes_report

    model, meta = load_model(OLD_FILE)
    assert model.classes == "auto" and model.expander_.classes_used_ == ("linear", "quadratic", "hinge")
    P = np.array([[0.0, 0.0], [0.5, 0.5], [-1.0, 2.0], [1.5, -0.5]])
    # Source: predict_proba of the previous release on the same file (printed when it was written)
    expected = [0.70495875, 0.92507414, 0.20276821, 0.49519101]
    np.testing.assert_allclose(model.predict_proba(P)[:, 1], expected, atol=1e-8)
    ex = model.expander_
    table = compile_pointprocess(ex.mean_, ex.scale_, ex.knots_, ex.classes_used_, model.coef_,
                                 model.intercept_ + model.offset_)
    np.testing.assert_allclose(suitability_table(table, P.T), expected, atol=1e-8)
    assert feature_classes_report(model) == {"chosen": ["linear", "quadratic", "hinge"], "rule": "not recorded",
                                             "criterion": None, "scores": []}
    assert model_summary(read_manifest(OLD_FILE))["feature_classes"] is None
    # refitting the old settings reads "auto" as the cross-validated choice
    X, y = _data()
    refit = PointProcessModel(**{**model.get_params(), "Cs": [3.0, 30.0]}).fit(X, y)
    assert refit.feature_selection_["rule"] == "one-standard-error"


def test_feature_classes_travel_in_the_manifest(tmp_path):
    # Common practice, no source: the fit's record of the chosen classes is kept and summarised
    from envelope.io.modelfile import model_summary
    from envelope.models import feature_classes_report

    X, y = _data()
    model = PointProcessModel(classes="cv", C=10.0, random_state=0).fit(X, y)
    path = save_model(tmp_path / "m.envm", model, {**META, "feature_classes": feature_classes_report(model)})
    fc = model_summary(read_manifest(path))["feature_classes"]
    assert fc["rule"] == "one-standard-error" and fc["chosen"] == list(model.expander_.classes_used_)
    assert [s["classes"] for s in fc["scores"]] == [["linear", "quadratic"], ["linear", "quadratic", "hinge"],
                                                    ["linear", "quadratic", "product", "hinge"]]


# --------------------------------------------------------------------------- one digest over every member


def test_edited_manifest_refused(saved, tmp_path):
    # Common practice, no source: a SHA-256 over every member detects an edit of any of them
    man, _ = _rewrite(saved, tmp_path / "copy.envm")
    man["metadata"]["threshold"]["value"] = 0.01
    _rewrite(saved, tmp_path / "edited.envm", manifest=man, digest=False)
    for reader in (read_manifest, load_model):
        with pytest.raises(ModelError, match="edited.envm: checksum does not match the file's contents"):
            reader(tmp_path / "edited.envm")
    # the digest itself is checked against hashlib's SHA-256 of the members as documented
    with zipfile.ZipFile(saved) as zf:
        members = {n: zf.read(n) for n in (MANIFEST_NAME, PAYLOAD_NAME)}
        stated = zf.read(DIGEST_NAME).decode().split()
    h = hashlib.sha256()  # Source: hashlib, over name, NUL, 8-byte length, bytes, in name order
    for name in sorted(members):
        h.update(name.encode() + b"\0" + len(members[name]).to_bytes(8, "big") + members[name])
    assert stated == ["sha256", h.hexdigest()]


def test_duplicate_member_refused(saved, tmp_path):
    # Common practice, no source: zip allows two members of one name; readers differ on which wins
    with zipfile.ZipFile(saved) as zf:
        members = [(i.filename, zf.read(i)) for i in zf.infolist()]
    with pytest.warns(UserWarning, match="Duplicate name"):
        with zipfile.ZipFile(tmp_path / "dup.envm", "w") as zf:
            for name, data in members:
                zf.writestr(name, data)
            zf.writestr(MANIFEST_NAME, members[0][1])
    with pytest.raises(ModelError, match="dup.envm: member 'manifest.json' appears twice"):
        load_model(tmp_path / "dup.envm")


def test_oversized_member_refused_before_reading(saved, tmp_path, monkeypatch):
    # Common practice, no source: a small compressed member that expands past the limit is
    # refused from the zip directory, before it is decompressed
    limit = MAX_MEMBER_BYTES[MANIFEST_NAME]
    with zipfile.ZipFile(tmp_path / "bomb.envm", "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(MANIFEST_NAME, b" " * (limit + 1))
        zf.writestr(PAYLOAD_NAME, b"x")
    assert (tmp_path / "bomb.envm").stat().st_size < limit // 100  # the premise: it compresses well
    opened = []
    monkeypatch.setattr(zipfile.ZipFile, "open", lambda self, *a, **k: opened.append(a) or (_ for _ in ()).throw(
        AssertionError("a member was opened")))
    with pytest.raises(ModelError, match="bomb.envm: member manifest.json would expand to"):
        load_model(tmp_path / "bomb.envm")
    assert not opened


def test_unexpected_member_refused(saved, tmp_path):
    # Common practice, no source
    with zipfile.ZipFile(saved) as zf:
        members = [(i.filename, zf.read(i)) for i in zf.infolist()]
    with zipfile.ZipFile(tmp_path / "extra.envm", "w") as zf:
        for name, data in members + [("notes.txt", b"hi")]:
            zf.writestr(name, data)
    with pytest.raises(ModelError, match="extra.envm: unexpected member 'notes.txt'"):
        read_manifest(tmp_path / "extra.envm")


def test_format_1_file_still_loads_with_a_warning(caplog):
    # Common practice, no source: files of the previous format stay usable, checked the old way
    with caplog.at_level("WARNING", logger="envelope.io.modelfile"):
        model, _ = load_model(OLD_FILE)
    assert "model file format 1" in caplog.text and "not its manifest" in caplog.text
    assert read_manifest(OLD_FILE)["format_version"] == 1
