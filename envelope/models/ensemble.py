"""Ensemble of presence/background models weighted by their cross-validated AUC."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, clone
from sklearn.model_selection import GroupKFold, StratifiedKFold, cross_val_score

from envelope.errors import InputError, ModelError
from envelope.models.base import PresenceBackgroundClassifier


def default_cv_auc(estimator, X, y, groups=None, *, n_folds=5, random_state=0) -> float:
    """Mean held-out AUC of ``estimator``: GroupKFold over ``groups`` or stratified random folds."""
    if groups is not None:
        cv = GroupKFold(n_splits=min(n_folds, np.unique(groups).size))
    else:
        cv = StratifiedKFold(n_splits=int(min(n_folds, np.bincount(y).min())), shuffle=True,
                             random_state=random_state)
    return float(np.mean(cross_val_score(clone(estimator), X, y, groups=groups, cv=cv,
                                         scoring="roc_auc")))


class SkillWeightedEnsemble(PresenceBackgroundClassifier, BaseEstimator):
    """Weighted mean of member suitabilities, weights from cross-validated AUC.

    Each member with AUC >= ``auc_floor`` gets weight ``(AUC_m - 0.5) / sum_k (AUC_k - 0.5)``
    (skill above a random ranking; Marmion et al. 2009 weight by AUC in the same spirit);
    members below the floor are dropped. Suitability is ``sum_m weight_m * s_m(x)``;
    :meth:`member_spread` gives the weighted standard deviation across members,
    ``sqrt(sum_m weight_m * (s_m(x) - s(x))**2)``, a measure of model disagreement.
    ``predict`` is suitability >= 0.5; ``decision_function`` is ``suitability - 0.5``.

    Parameters
    ----------
    members : list of (str, estimator)
        Named presence/background estimators; they are cloned and refitted on all rows.
    weights_from : dict of str -> float, default=None
        Cross-validated AUC of each member (e.g. from ``envelope.evaluation.cross_validate``).
    score_func : callable, default=None
        ``score_func(estimator, X, y, groups) -> AUC``, used when ``weights_from`` is None.
        If both are None, :func:`default_cv_auc` (5-fold, spatial folds if ``groups``).
    auc_floor : float, default=0.7
        Members with AUC below this are dropped; if all are, :meth:`fit` raises ModelError.

    Attributes
    ----------
    members_ : list of (str, fitted estimator)
        The kept members, refitted.
    auc_ : dict of str -> float
        AUC of every member.
    weights_ : ndarray of shape (n_kept,)
        Weights of ``members_``, summing to 1.
    dropped_ : list of str

    References
    ----------
    Marmion, M., Parviainen, M., Luoto, M., Heikkinen, R.K. & Thuiller, W. (2009)
    Evaluation of consensus methods in predictive species distribution modelling.
    Diversity and Distributions 15: 59–69.

    Examples
    --------
    >>> import numpy as np
    >>> from envelope.models import PercentileEnvelope, PointProcessModel
    >>> rng = np.random.default_rng(0)
    >>> X = np.r_[rng.normal(1, 0.5, (50, 2)), rng.normal(0, 1, (500, 2))]
    >>> y = np.r_[np.ones(50), np.zeros(500)]
    >>> ens = SkillWeightedEnsemble(
    ...     members=[("envelope", PercentileEnvelope()), ("pointprocess", PointProcessModel())],
    ...     weights_from={"envelope": 0.8, "pointprocess": 0.9}).fit(X, y)
    >>> ens.weights_.round(3).tolist()
    [0.429, 0.571]
    """

    def __init__(self, *, members=None, weights_from=None, score_func=None, auc_floor=0.7):
        self.members = members
        self.weights_from = weights_from
        self.score_func = score_func
        self.auc_floor = auc_floor

    def _check_members(self):
        members = self.members
        if not members:
            raise InputError("members: got none; expected a list of (name, estimator) pairs")
        names = []
        for item in members:
            if not (isinstance(item, tuple) and len(item) == 2 and isinstance(item[0], str)
                    and hasattr(item[1], "fit")):
                raise InputError(f"members: got {item!r}; expected a (name, estimator) pair")
            names.append(item[0])
        if len(set(names)) != len(names):
            raise InputError(f"members: names {names} repeat; expected distinct names")
        return names

    def fit(self, X, y, sample_weight=None, groups=None):
        """Score (or look up) each member, drop the weak ones, refit the rest on all rows.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_variables)
        y : array-like of shape (n_samples,), 1 = presence, 0 = background
        sample_weight : array-like of shape (n_samples,), optional
            Passed to each member's ``fit``.
        groups : array-like of shape (n_samples,), optional
            Fold ids for ``score_func`` / the default cross-validation.

        Returns
        -------
        self
        """
        names = self._check_members()
        X, y, w = self._validate_fit_input(X, y, sample_weight)
        if self.weights_from is not None:
            missing = [n for n in names if n not in self.weights_from]
            if missing:
                raise InputError(f"weights_from: no AUC for member {missing[0]!r} "
                                 f"(have {', '.join(map(str, self.weights_from))})")
            auc = {n: float(self.weights_from[n]) for n in names}
        else:
            score = self.score_func if self.score_func is not None else default_cv_auc
            auc = {n: float(score(est, X, y, groups)) for n, est in self.members}
        kept = [n for n in names if auc[n] >= self.auc_floor]
        if not kept:
            shown = ", ".join(f"{n} {a:.3f}" for n, a in auc.items())
            raise ModelError(f"ensemble: every member has AUC below the floor {self.auc_floor} ({shown})")
        skill = np.array([auc[n] - 0.5 for n in kept])
        self.auc_ = auc
        self.weights_ = skill / skill.sum()
        self.dropped_ = [n for n in names if n not in kept]
        by_name = dict(self.members)
        # members that tune themselves on folds (the point-process penalty) get the same
        # spatial folds the ensemble was given
        self.members_ = [(n, clone(by_name[n]).fit(X, y, sample_weight=w, **_groups_for(by_name[n], groups)))
                         for n in kept]
        return self

    def _member_suitability(self, X):
        # members validate their own input again; X is already a checked float array
        return np.stack([est.predict_proba(X)[:, 1] for _, est in self.members_])

    def _suitability(self, X):
        return self.weights_ @ self._member_suitability(X)

    def member_spread(self, X):
        """Weighted standard deviation of member suitabilities, shape (n_samples,)."""
        X = self._validate_input(X)
        S = self._member_suitability(X)
        mean = self.weights_ @ S
        return np.sqrt(np.maximum(self.weights_ @ (S - mean) ** 2, 0.0))


def _groups_for(estimator, groups) -> dict:
    import inspect

    if groups is None:
        return {}
    return {"groups": groups} if "groups" in inspect.signature(estimator.fit).parameters else {}
