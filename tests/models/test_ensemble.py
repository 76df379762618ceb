"""SkillWeightedEnsemble: weights proportional to AUC - 0.5, floor, all-dropped error."""

import numpy as np
import pytest

from envelope.errors import ModelError
from envelope.models import PercentileEnvelope, PointProcessModel, SkillWeightedEnsemble


def _data():
    rng = np.random.default_rng(0)
    X = np.r_[rng.normal(1, 0.5, (60, 2)), rng.normal(0, 1, (600, 2))]
    return X, np.r_[np.ones(60), np.zeros(600)]


MEMBERS = [("envelope", PercentileEnvelope()), ("pp", PointProcessModel(random_state=0)),
           ("pp_strong", PointProcessModel(C=2.0, random_state=0))]


def test_weights_floor_mean_and_spread():
    # Source: definition in the docstring: w_m = (AUC_m - 0.5) / sum(AUC_k - 0.5) for AUC_m >= floor
    X, y = _data()
    ens = SkillWeightedEnsemble(members=MEMBERS, weights_from={"envelope": 0.75, "pp": 0.9,
                                                               "pp_strong": 0.65}).fit(X, y)
    np.testing.assert_allclose(ens.weights_, [0.25 / 0.65, 0.4 / 0.65])
    assert ens.dropped_ == ["pp_strong"]
    S = np.stack([est.fit(X, y).predict_proba(X)[:, 1] for _, est in MEMBERS[:2]])
    mean = ens.weights_ @ S
    np.testing.assert_allclose(ens.predict_proba(X)[:, 1], mean)
    # Source: numpy weighted SD as reference: sqrt(average((S - mean)^2, weights))
    np.testing.assert_allclose(ens.member_spread(X),
                               np.sqrt(np.average((S - mean) ** 2, axis=0, weights=ens.weights_)))


def test_all_dropped_is_an_error():
    # Common practice, no source
    X, y = _data()
    ens = SkillWeightedEnsemble(members=MEMBERS, weights_from={"envelope": 0.6, "pp": 0.69, "pp_strong": 0.5})
    with pytest.raises(ModelError, match="every member has AUC below the floor 0.7"):
        ens.fit(X, y)


def test_score_func_is_used():
    # Common practice, no source: the callable's AUCs decide the weights
    X, y = _data()
    calls = []

    def score(est, X_, y_, groups):
        calls.append(type(est).__name__)
        return 0.8 if isinstance(est, PercentileEnvelope) else 0.95

    ens = SkillWeightedEnsemble(members=MEMBERS[:2], score_func=score).fit(X, y)
    assert calls == ["PercentileEnvelope", "PointProcessModel"]
    np.testing.assert_allclose(ens.weights_, [0.3 / 0.75, 0.45 / 0.75])


def test_feature_classes_report_names_the_point_process_member():
    # Common practice, no source: an ensemble reports its point-process member's feature choice;
    # a model without feature classes reports none
    from envelope.models import feature_classes_report

    X, y = _data()
    ens = SkillWeightedEnsemble(members=[("envelope", PercentileEnvelope()),
                                         ("pp", PointProcessModel(classes="cv", C=10.0, random_state=0))],
                                weights_from={"envelope": 0.75, "pp": 0.9}).fit(X, y)
    report = feature_classes_report(ens)
    pp = dict(ens.members_)["pp"]
    assert report["member"] == "pp" and report["chosen"] == list(pp.expander_.classes_used_)
    assert report["rule"] == "one-standard-error" and len(report["scores"]) == 3
    assert feature_classes_report(dict(ens.members_)["envelope"]) is None
