"""Ensemble of presence/background models weighted by their cross-validated AUC."""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.base import BaseEstimator, clone
from sklearn.model_selection import GroupKFold, StratifiedKFold

from envelope.errors import InputError, ModelError
from envelope.models.base import PresenceBackgroundClassifier
from envelope.models.memory import BoundedMemory, content_key, fit_in_parallel, usable_cores

#: Member fits remembered across ensemble fits. A 5-fold nested cross-validation of a
#: three-member ensemble meets 16 distinct training sets per member (all rows, the 5
#: "all folds but k" and the 10 "all folds but j and k"); a fitted member is at most a
#: few MiB (the 50 trees of the down-sampled forest).
MEMBER_FIT_CACHE_SIZE = 64
#: Folds of the cross-validation that scores each member (:func:`default_cv_auc`).
INNER_FOLDS = 5
_FITS = BoundedMemory(MEMBER_FIT_CACHE_SIZE)


def _fit_key(estimator, X, y, w, groups) -> str | None:
    """Content hash of a member's settings and training rows; None when the fit is not
    repeatable (a ``random_state`` of None anywhere in its settings)."""
    params = estimator.get_params(deep=True)
    if any(k.endswith("random_state") and v is None for k, v in params.items()):
        return None
    settings = (f"{type(estimator).__module__}.{type(estimator).__qualname__}"
                + repr(sorted(estimator.get_params(deep=False).items())))
    return content_key(settings, X, y, w, groups)


def _usable_groups(groups):
    """``groups``, or None when it holds fewer than two fold ids (nothing to split by)."""
    if groups is None or np.unique(groups).size < 2:
        return None
    return groups


def fit_member(estimator, X, y, sample_weight=None, groups=None):
    """``clone(estimator).fit(X, y, ...)``, remembered by the content of the training rows.

    Fold ids go to members whose ``fit`` takes ``groups`` (the point-process penalty is
    tuned on them). The same member on the same rows, weights and fold ids is the same
    fit, so it is fitted once (see :data:`MEMBER_FIT_CACHE_SIZE`); the returned estimator
    is shared and must not be refitted in place. Fold ids that leave a single id (an
    inner part of a 3-fold cross-validation) are dropped: the member tunes on its own
    random folds then, as without fold ids.
    """
    groups = _usable_groups(groups)
    key = _fit_key(estimator, X, y, sample_weight, groups)
    known = None if key is None else _FITS.get(key)
    if known is not None:
        return known
    fitted = clone(estimator).fit(X, y, sample_weight=sample_weight, **_groups_for(estimator, groups))
    if key is not None:
        _FITS.put(key, fitted)
    return fitted


def clear_member_fits() -> None:
    """Forget every remembered member fit (see :func:`fit_member`)."""
    _FITS.clear()


def _cv_splits(y, groups, n_folds, random_state) -> list:
    """The (train, test) index pairs of :func:`default_cv_auc`."""
    if groups is not None:
        cv = GroupKFold(n_splits=min(n_folds, np.unique(groups).size))
    else:
        cv = StratifiedKFold(n_splits=int(min(n_folds, np.bincount(y.astype(int)).min())), shuffle=True,
                             random_state=random_state)
    return list(cv.split(np.zeros((y.size, 1)), y, groups))


def default_cv_auc(estimator, X, y, groups=None, *, n_folds=INNER_FOLDS, random_state=0, sample_weight=None) -> float:
    """Mean held-out AUC of ``estimator``: GroupKFold over ``groups`` or stratified random folds.

    Each training part is fitted with :func:`fit_member` (its weights and fold ids go
    along), so the nested cross-validation of an ensemble never fits the same member on
    the same rows twice. AUC is scikit-learn's ``roc_auc`` scorer; a fold whose fit
    fails scores NaN with a warning, as in ``sklearn.model_selection.cross_val_score``.
    """
    X, y = np.asarray(X), np.asarray(y)
    groups = None if groups is None else np.asarray(groups)
    from sklearn.metrics import get_scorer

    scorer = get_scorer("roc_auc")
    scores = []
    for train, test in _cv_splits(y, groups, n_folds, random_state):
        part = (lambda a: None if a is None else np.asarray(a)[train])
        try:
            fitted = fit_member(estimator, X[train], y[train], part(sample_weight), part(groups))
        except Exception as exc:  # noqa: BLE001 - cross_val_score's error_score=nan behaviour
            warnings.warn(f"{type(estimator).__name__}: a cross-validation fit failed ({exc}); its AUC is NaN",
                          stacklevel=2)
            scores.append(np.nan)
            continue
        scores.append(scorer(fitted, X[test], y[test]))
    return float(np.mean(scores))


def prefit_members(ensemble, X, y, folds, *, sample_weight=None, groups=None, n_jobs=None, progress=None) -> int:
    """Fit, in parallel processes, every member fit a cross-validation of ``ensemble`` over
    ``folds`` followed by a fit on all rows will ask for, and remember them (:func:`fit_member`).

    A K-fold cross-validation of an ensemble scored by :func:`default_cv_auc` fits each
    member on every outer training part, on every inner training part of each (with
    K = 5: "all folds but j and k", ten distinct sets) and on all rows; those fits do not
    depend on one another, so they run ``n_jobs`` at a time (loky worker processes, one
    thread each). The fits are the ones the serial code would make, so results are
    unchanged; only the order of the work is. Nothing is done when the ensemble has
    ``weights_from`` or a ``score_func`` (no inner cross-validation), when ``n_jobs`` < 2,
    or for members whose fits are not repeatable (see :func:`fit_member`).

    Parameters
    ----------
    ensemble : SkillWeightedEnsemble (unfitted)
    X, y, sample_weight : the rows the cross-validation and the final fit are given
    folds : array-like (n_samples,), the outer fold of every row
    groups : array-like (n_samples,), optional
        The fold ids passed to ``fit`` as ``groups`` (default: ``folds``).
    n_jobs : int, optional
        Worker processes; default the cores this process may use.
    progress : callable(done, total), optional
        Called as fits finish.

    Returns
    -------
    int, the number of member fits made.
    """
    if ensemble.weights_from is not None or ensemble.score_func is not None:
        return 0
    n_jobs = usable_cores() if n_jobs is None else n_jobs
    if n_jobs < 2:
        return 0
    folds = np.asarray(folds)
    groups = folds if groups is None else np.asarray(groups)
    w_all = None if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
    parts = [~(folds == k) for k in np.unique(folds)] + [np.ones(folds.size, dtype=bool)]
    tasks = {}
    for rows in parts:
        probe = clone(ensemble)
        Xt, yt, wt = probe._validate_fit_input(np.asarray(X)[rows], np.asarray(y)[rows],
                                               None if w_all is None else w_all[rows])
        gt = groups[rows]
        for _, member in probe.members:
            sets = [train for train, _ in _cv_splits(yt, gt, INNER_FOLDS, 0)] + [np.arange(yt.size)]
            for train in sets:
                args = (member, Xt[train], yt[train], wt[train], _usable_groups(gt[train]))
                key = _fit_key(*args)
                if key is not None and key not in tasks and key not in _FITS:
                    tasks[key] = args
    if not tasks:
        return 0
    # a fit that fails gives None here; the serial code meets the failure again and reports it
    jobs = [(clone(m), Xs, ys, {"sample_weight": ws, **_groups_for(m, gs)}) for m, Xs, ys, ws, gs in tasks.values()]
    for key, est in zip(tasks, fit_in_parallel(jobs, n_jobs=n_jobs, progress=progress, tolerate=True)):
        if est is not None:
            _FITS.put(key, est)
    return len(tasks)


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
            if self.score_func is not None:
                auc = {n: float(self.score_func(est, X, y, groups)) for n, est in self.members}
            else:
                auc = {n: default_cv_auc(est, X, y, groups, sample_weight=w) for n, est in self.members}
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
        self.members_ = [(n, fit_member(by_name[n], X, y, w, groups)) for n in kept]
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
