"""Boosted trees and the down-sampled forest (Valavi et al. 2021): balanced bootstraps."""

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

import envelope.models.trees as trees
from envelope.models import BoostedTrees, DownsampledForest


def _data(seed=0, n_presence=80, n_background=800):
    rng = np.random.default_rng(seed)
    X = np.r_[rng.normal(1, 0.5, (n_presence, 3)), rng.normal(0, 1, (n_background, 3))]
    return X, np.r_[np.ones(n_presence), np.zeros(n_background)]


def test_each_tree_sees_balanced_sample(monkeypatch):
    # Source: Valavi et al. (2021) down-sampling: equal numbers of presences and background per tree
    seen = []

    class RecordingTree(trees.DecisionTreeClassifier):
        def fit(self, X, y, *args, **kwargs):
            seen.append((int((y == 1).sum()), int((y == 0).sum())))
            return super().fit(X, y, *args, **kwargs)

    monkeypatch.setattr(trees, "DecisionTreeClassifier", RecordingTree)
    X, y = _data()
    m = DownsampledForest(n_estimators=15, random_state=0).fit(X, y)
    assert seen == [(80, 80)] * 15
    assert m.n_presence_drawn_ == 80


def test_forest_suitability_is_mean_of_trees():
    # Source: Valavi et al. (2021): prediction = mean tree probability (sklearn trees as reference)
    X, y = _data()
    m = DownsampledForest(n_estimators=10, random_state=1).fit(X, y)
    expected = np.mean([t.predict_proba(X)[:, 1] for t in m.estimators_], axis=0)
    np.testing.assert_allclose(m.predict_proba(X)[:, 1], expected)
    # Common practice, no source: same seed, same forest
    again = DownsampledForest(n_estimators=10, random_state=1).fit(X, y)
    np.testing.assert_array_equal(again.predict_proba(X), m.predict_proba(X))


def test_boosted_trees_balanced_weights_and_skill():
    # Source: Elith, Leathwick & Hastie (2008); balanced class weights = equal class totals
    X, y = _data()
    factor = trees.balanced_class_weights(y.astype(int), np.ones(len(y)))
    assert factor[y == 1].sum() == pytest.approx(factor[y == 0].sum())
    m = BoostedTrees(random_state=0).fit(X, y)
    Xt, yt = _data(seed=5)
    assert roc_auc_score(yt, m.predict_proba(Xt)[:, 1]) > 0.8
    assert 1 <= m.n_iter_ <= 1000
