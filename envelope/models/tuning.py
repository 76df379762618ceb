"""Cross-validated tuning of the point-process model: each (feature set, C) scored on the same folds."""

from __future__ import annotations

import numpy as np
from sklearn.metrics import roc_auc_score

from envelope.models.features import FeatureExpander
from envelope.models.memory import BoundedMemory, content_key

__all__ = ["SOLVE_CACHE_SIZE", "clear_path_cache", "score_paths"]

#: Penalised solves remembered across fits (a few KiB each: one slope vector per entry).
SOLVE_CACHE_SIZE = 4096
_SOLVES = BoundedMemory(SOLVE_CACHE_SIZE)

#: Parameters that change no single solve, so they stay out of the memory key.
_KEY_FREE = ("classes", "C", "Cs", "n_folds", "path_patience")


def _training_key(model, X, y, w, log_effort) -> str | None:
    """Content hash of one training fold and the solve-relevant settings; None without a seed.

    With ``random_state=None`` liblinear's coordinate order is random, so a repeat would not
    be the same fit and nothing is remembered.
    """
    if model.random_state is None:
        return None
    params = {k: v for k, v in model.get_params(deep=False).items() if k not in _KEY_FREE}
    return content_key(repr(sorted(params.items())), X, y, w, log_effort)


class _Fold:
    """One training/held-out split of one feature set: features built once, reused for every C."""

    def __init__(self, model, X, y, w, train, test, classes, log_effort, key):
        self.model, self.classes, self.key = model, classes, key
        self.y_train, self.w_train, self.y_test = y[train], w[train], y[test]
        self.log_effort_train = None if log_effort is None else log_effort[train]
        self.log_effort_test = None if log_effort is None else log_effort[test]
        self.expander = FeatureExpander(classes=classes, n_knots=model.n_knots,
                                        standardize=model.standardize).fit(X[train], self.y_train,
                                                                            sample_weight=self.w_train)
        self.F = self.expander.transform(X[train])
        self.F_test = self.expander.transform(X[test])
        self.weights, _, self.n_presence = model._weights(self.y_train, self.w_train)

    def solve(self, C: float):
        """``(coef, intercept, effort_coef)`` at ``C``, from memory when this fold was solved before."""
        key = None if self.key is None else (self.key, tuple(self.classes), float(C))
        known = None if key is None else _SOLVES.get(key)
        if known is not None:
            return known
        coef, intercept, _, effort_coef = self.model._solve_with_effort(
            self.F, self.y_train, self.w_train, self.weights, self.n_presence, float(C), self.log_effort_train,
            tol=self.model.cv_tol)
        fit = (coef, intercept, effort_coef)
        if key is not None:
            _SOLVES.put(key, fit)
        return fit

    def score(self, C: float) -> float:
        """Held-out AUC of the linear predictor (effort term included) of the fit at ``C``."""
        coef, intercept, effort_coef = self.solve(C)
        lp = intercept + self.F_test @ coef
        if effort_coef:
            lp = lp + effort_coef * self.log_effort_test
        return float(roc_auc_score(self.y_test, lp))


def score_paths(model, X, y, w, splits, sets, Cs, log_effort=None):
    """Held-out AUC of every candidate feature set along the C path, on the same folds.

    Parameters
    ----------
    model : PointProcessModel
        Supplies the solver settings (``cv_tol``, ``path_patience``...).
    splits : list of (train, test) index arrays
    sets : sequence of feature-class tuples, simplest first
    Cs : 1-D array of positive C values (any order; the path runs from the smallest)

    Returns
    -------
    auc : ndarray (fold, set, C)
        NaN where the path of a set was stopped early (see below).
    names : list of list of str
        The feature classes each set actually used.

    Notes
    -----
    For each set the Cs are visited from the strongest penalty to the weakest, every fold
    at one C before the next C. With ``path_patience = k``, a set's
    path stops once its mean AUC has failed to beat its best for ``k`` consecutive Cs:
    weaker penalties cost the most to solve (more active features, more iterations) and,
    past the optimum, held-out AUC falls as the fit follows noise (common practice of
    path algorithms, no source). ``path_patience=None`` scores the whole grid.
    The folds run one after another: liblinear draws its coordinate order from one
    process-wide generator (scikit-learn's ``_newrand``), so solves in threads would not
    repeat. The tuning solves use ``cv_tol`` (a ranking needs less precision than the final fit,
    which uses ``tol``). Solves are remembered by the content of the training rows, so a
    training set met again (nested spatial CV meets "all folds but j and k" once inside
    outer fold j and once inside k) is not solved again.
    """
    Cs = np.asarray(Cs, dtype=np.float64)
    order = np.argsort(Cs, kind="stable")
    patience = model.path_patience
    auc = np.full((len(splits), len(sets), Cs.size), np.nan)
    names = []
    # one content hash per training fold, shared by every candidate set
    keys = [_training_key(model, X[train], y[train], w[train], None if log_effort is None else log_effort[train])
            for train, _ in splits]
    for j, classes in enumerate(sets):
        folds = [_Fold(model, X, y, w, train, test, classes, log_effort, key)
                 for (train, test), key in zip(splits, keys)]
        names.append(list(folds[0].expander.classes_used_))
        best, since_best = -np.inf, 0
        for c in order:
            auc[:, j, c] = [f.score(Cs[c]) for f in folds]
            mean = float(auc[:, j, c].mean())
            if mean > best + 1e-12:
                best, since_best = mean, 0
            else:
                since_best += 1
            if patience is not None and since_best >= int(patience):
                break
    return auc, names


def clear_path_cache() -> None:
    """Forget every remembered tuning solve (see :func:`score_paths`)."""
    _SOLVES.clear()
