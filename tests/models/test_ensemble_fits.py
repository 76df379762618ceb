"""Ensemble member fits: remembered by content, prefitted in parallel, results unchanged."""

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.model_selection import GroupKFold, cross_val_score

import envelope.models.ensemble as ens_mod
from envelope.evaluation import cross_validate
from envelope.models import BoostedTrees, DownsampledForest, PointProcessModel, SkillWeightedEnsemble
from envelope.models.ensemble import clear_member_fits, default_cv_auc, fit_member, prefit_members


def _data(seed=0):
    rng = np.random.default_rng(seed)
    X = np.r_[rng.normal(0.8, 0.6, (120, 3)), rng.normal(0, 1, (900, 3))]
    y = np.r_[np.ones(120, dtype=int), np.zeros(900, dtype=int)]
    # five "spatial" folds: contiguous blocks of rows of each class
    folds = np.r_[np.arange(120) * 5 // 120, np.arange(900) * 5 // 900]
    return X, y, folds


def _ensemble():
    return SkillWeightedEnsemble(members=[
        ("pointprocess", PointProcessModel(C="cv", classes=("linear", "quadratic"), random_state=0)),
        ("brt", BoostedTrees(max_iter=30, random_state=0)),
        ("forest", DownsampledForest(n_estimators=10, random_state=0)),
    ], auc_floor=0.5)


def _run(X, y, folds):
    per_fold, summary = cross_validate(_ensemble, X, y, folds, fit_params={"groups": folds})
    final = _ensemble().fit(X, y, groups=folds)
    return per_fold, final


def test_default_cv_auc_equals_scikit_learn_cross_val_score():
    # Source: scikit-learn's own cross_val_score with GroupKFold and the roc_auc scorer, for a
    # member whose fit takes no fold ids and no weights given
    X, y, folds = _data()
    clear_member_fits()
    brt = BoostedTrees(max_iter=30, random_state=0)
    ours = default_cv_auc(brt, X, y, folds)
    ref = cross_val_score(clone(brt), X, y, groups=folds, cv=GroupKFold(n_splits=5), scoring="roc_auc").mean()
    assert ours == pytest.approx(ref, abs=1e-15)


def test_same_member_same_rows_is_fitted_once():
    # Definition of the memory: the same settings on the same rows are one fit; other rows are not
    X, y, folds = _data()
    clear_member_fits()
    brt = BoostedTrees(max_iter=30, random_state=0)
    a = fit_member(brt, X, y)
    assert fit_member(clone(brt), X.copy(), y.copy()) is a
    assert fit_member(brt, X[1:], y[1:]) is not a
    assert fit_member(BoostedTrees(max_iter=31, random_state=0), X, y) is not a
    # no seed: the fit would not repeat, so nothing is remembered
    unseeded = BoostedTrees(max_iter=30)
    assert fit_member(unseeded, X, y) is not fit_member(unseeded, X, y)


def test_prefit_leaves_results_unchanged_and_makes_every_fit(monkeypatch):
    # Exact equality with the serial nested cross-validation (each fit's own seed makes it repeatable)
    X, y, folds = _data()
    clear_member_fits()
    serial_folds, serial_final = _run(X, y, folds)
    clear_member_fits()
    n = prefit_members(_ensemble(), X, y, folds, n_jobs=2)
    # 3 members x (all rows + 5 outer parts + 10 "all folds but j and k")
    assert n == 3 * 16

    def no_new_fit(*args, **kwargs):
        raise AssertionError("a member fit was not prefitted")

    monkeypatch.setattr(ens_mod, "clone", no_new_fit)
    par_folds, par_final = _run(X, y, folds)
    np.testing.assert_array_equal(par_folds["auc"].to_numpy(), serial_folds["auc"].to_numpy())
    np.testing.assert_array_equal(par_final.weights_, serial_final.weights_)
    np.testing.assert_array_equal(par_final.predict_proba(X), serial_final.predict_proba(X))


def test_prefit_does_nothing_with_given_weights_or_one_job():
    X, y, folds = _data()
    clear_member_fits()
    given = SkillWeightedEnsemble(members=_ensemble().members, weights_from={"pointprocess": 0.8, "brt": 0.8,
                                                                             "forest": 0.8})
    assert prefit_members(given, X, y, folds, n_jobs=2) == 0
    assert prefit_members(_ensemble(), X, y, folds, n_jobs=1) == 0
