"""Point-process presence/background model: penalised, heavily background-weighted logistic regression."""

from __future__ import annotations

import numpy as np
from scipy.special import expit, logsumexp
from sklearn.base import BaseEstimator
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GroupKFold, StratifiedKFold

from envelope.errors import InputError, ModelError
from envelope.models.features import DEFAULT_CLASSES, FEATURE_CLASSES, FeatureExpander
from envelope.models.base import PresenceBackgroundClassifier
from envelope.models.selection import one_standard_error_choice
from envelope.models.tuning import clear_path_cache, score_paths  # noqa: F401 (clear_path_cache: re-exported)

# Multiplier of the default background weight: total background weight = 100 x presences.
# Fithian & Hastie (2013) show the weighted fit tends to the IPP as this grows; at 100 the
# slopes are within ~0.05 % of the limit in REFERENCES item 9 (W = 100 row).
BACKGROUND_WEIGHT_FACTOR = 100.0
DEFAULT_CS = np.logspace(0, 3, 7)  # 1 ... 1000, on the per-presence scale of C
_LOG_LN2 = np.log(np.log(2.0))     # eta at which 1 - exp(-exp(eta)) = 0.5
# The log-effort column is standardised and multiplied by this before the penalised solve,
# so its penalty is 100 times weaker than a climate feature's (the device liblinear's
# intercept_scaling uses for the intercept); the intercept and the effort slope are then
# solved again without any penalty for the fitted climate slopes.
EFFORT_SCALING = 100.0

#: Candidate feature sets of ``classes="cv"``, simplest first; each adds one class to the last.
FEATURE_SETS = (("linear", "quadratic"), ("linear", "quadratic", "hinge"),
                ("linear", "quadratic", "product", "hinge"))
#: What ``classes="cv"`` and ``C="cv"`` score on each held-out fold.
CV_CRITERION = "held-out AUC of the linear predictor (presences against background), mean over folds"


class PointProcessModel(PresenceBackgroundClassifier, BaseEstimator):
    """Inhomogeneous Poisson point-process model fitted as weighted logistic regression.

    Presences get weight 1 and every background point weight ``background_weight``, so
    that the total background weight is much larger than the number of presences; as it
    grows, the logistic fit converges to the Poisson point-process (IPP) fit with the
    background as quadrature points (Fithian & Hastie 2013; Renner & Warton 2013). The
    slopes are then the IPP slopes and ``intercept_ + log(W)`` (W = total background
    weight) is the IPP intercept per unit of background region.

    The penalised objective, with features ``f`` from :class:`~envelope.models.features.FeatureExpander`,
    weights ``w_i`` and ``n_p`` the (weighted) number of presences, is::

        (1/n_p) * sum_i w_i * logloss(y_i, intercept + f_i . beta)
            + (1/C) * [l1_ratio * |beta|_1 + (1 - l1_ratio)/2 * |beta|_2^2]

    (``penalty="l1"`` sets ``l1_ratio = 1``). Dividing by ``n_p`` makes ``C`` mean the same
    for 50 or 5 000 presences.

    Suitability is the complementary log-log mapping of the log-intensity (Fithian & Hastie
    2013; Phillips et al. 2017): ``suitability = 1 - exp(-exp(eta))`` with
    ``eta = linear_predictor(x) + offset_`` and ``offset_ = -log(mean over background of
    exp(linear_predictor))`` (weighted by the background weights). So ``exp(eta)`` is the
    intensity relative to the study-region average: a cell of average intensity gets
    ``1 - exp(-1) = 0.632`` whatever the number of presences, background points or
    weights, which keeps values comparable across fits. For the unpenalised IPP,
    ``exp(eta) = lambda(x) / n_p`` exactly (the IPP score equation makes the
    background-mean intensity equal ``n_p``).

    **Recording effort as a covariate** (model-based bias correction; Warton, Renner &
    Ramp 2013; Fithian et al. 2015). With ``fit(..., effort=e)`` the intensity of the
    *records* is modelled as ``exp(intercept + f(x) . beta + gamma * log(e))``: log effort
    enters the linear predictor as one linear, unpenalised term (never expanded into
    quadratic, hinge or product features). For prediction effort is fixed at one common
    value, ``effort_reference_`` (``effort_reference="max"``: the highest effort among the
    training rows, i.e. the pattern expected if every cell were recorded as intensively as
    the best-recorded one), so maps show the species' response to climate without the
    observers' pattern. The cloglog suitability does not depend on that choice (the
    offset below rescales to the background mean); ``log_intensity`` does.

    ``predict`` returns 1 where suitability >= 0.5 (relative intensity >= ln 2); maps should
    use a threshold rule instead. ``decision_function`` is ``eta - log(ln 2)``, positive
    exactly where suitability > 0.5.

    Parameters
    ----------
    classes : "cv" or sequence of str, default=("linear", "quadratic", "hinge")
        Feature classes, see :class:`~envelope.models.features.FeatureExpander`. ``"cv"`` chooses
        among :data:`FEATURE_SETS` (linear + quadratic; + hinge; + product) by the same
        cross-validation as ``C="cv"`` (same folds, same score): each set gets its best C,
        and the simplest set whose mean held-out AUC is within one standard error of the
        best set's is kept (:func:`~envelope.models.selection.one_standard_error_choice`).
        ``"auto"`` is read as ``"cv"`` (models saved by earlier versions used it for a
        presence-count rule).
    n_knots : int, default=10
        Hinge knots per variable.
    standardize : bool, default=True
        Build features from z-scores; ``False`` keeps raw values (linear slopes on the
        variables' own scale).
    penalty : {"l1", "elasticnet"}, default="l1"
    l1_ratio : float, default=0.5
        L1 share of the elastic-net penalty (used only with ``penalty="elasticnet"``).
    C : float or "cv", default=10.0
        Inverse penalty strength on the per-presence scale above; ``np.inf`` means no
        penalty. ``"cv"`` picks C from ``Cs`` by cross-validated AUC (presence against
        background) over folds given by ``groups`` in :meth:`fit` (spatial blocks from the
        caller), or stratified random folds when ``groups`` is None.
    Cs : array-like, default=None
        Candidate values for ``C="cv"``; None means ``np.logspace(0, 3, 7)``.
    n_folds : int, default=5
        Folds for ``C="cv"``.
    background_weight : float or "auto", default="auto"
        Weight of each background point. ``"auto"``: ``100 * n_presence / n_background``,
        so the total background weight is 100 times the presences (weighted counts).
    solver : {"auto", "liblinear", "saga", "lbfgs"}, default="auto"
        "auto" uses lbfgs without penalty, liblinear for L1 and saga for elastic net.
        liblinear was ~50-100x faster than saga for L1 at the same objective (1 000
        presences, 10 000 background, 204 features: 0.1-0.2 s against 10-25 s), because
        saga's step size shrinks with the largest sample weight. liblinear penalises the
        intercept, so it is run with ``intercept_scaling=100`` and the intercept is then
        re-solved without penalty for the fitted slopes. Elastic net has only saga here
        (~8 s at that size). Unpenalised fits (C = inf) use lbfgs plus Newton steps.
    max_iter : int, default=1000
    tol : float, default=1e-4
        Solver tolerance of the final fit.
    cv_tol : float, default=3e-3
        Solver tolerance of the tuning solves of ``C="cv"`` / ``classes="cv"``: they only
        rank settings by held-out AUC. Measured once on the data of bench/bench_fit.py
        (1 000 presences, 10 000 background, 8 variables, nested 5-fold block CV): 3e-3
        instead of 1e-4 cut the CPU time of the tuning by more than half and moved no set's
        mean CV AUC by more than 0.002, with the same feature set and C chosen.
    path_patience : int or None, default=2
        Stop a feature set's C path (strongest penalty first) once its mean held-out AUC has
        not improved for this many consecutive Cs; None scores the whole grid
        (:func:`envelope.models.tuning.score_paths`).
    random_state : int or None, default=None
        Seed of the random folds (``C="cv"`` without groups) and of saga/liblinear.
    effort_reference : "max" or float, default="max"
        Recording effort at which predictions are made when the model was fitted with
        ``effort``: ``"max"`` = the largest effort among the training rows, or a positive
        number on the effort layer's own scale.

    Attributes
    ----------
    expander_ : FeatureExpander
    coef_ : ndarray of shape (n_features_out,)
        Slopes on the expanded features (plain array, no sklearn needed to use it).
    intercept_ : float
    offset_ : float
        Added to the linear predictor before the cloglog mapping (see above).
    background_weight_ : float
        Weight given to each background point.
    total_background_weight_ : float
    n_iter_ : int
        Solver iterations of the final fit.
    C_ : float
        The C used for the final fit (chosen one for ``C="cv"``).
    cv_results_ : dict or None
        ``{"C": [...], "mean_auc": [...], "fold_auc": [[...], ...]}`` of the chosen feature
        set for ``C="cv"`` or ``classes="cv"``, plus ``"sets"``: the same per candidate set.
    feature_selection_ : dict
        ``chosen`` (the classes used), ``rule`` (``"one-standard-error"`` or ``"given"``),
        ``criterion``, and for ``classes="cv"`` ``scores``: per candidate set its
        ``classes``, best ``C``, ``mean_auc`` and ``se`` (SD over folds / sqrt(folds)),
        plus ``best`` and ``threshold`` (best mean AUC minus its standard error).
    feature_names_out_ : ndarray of str
    classes_ : ndarray, ``[0, 1]``
    effort_coef_ : float or None
        Slope of log recording effort (None when fitted without ``effort``); 1 means records
        proportional to effort.
    effort_reference_ : float or None
        The effort prediction is made at (see ``effort_reference``).
    effort_term_ : float
        ``effort_coef_ * log(effort_reference_)`` (0 without effort), part of the linear
        predictor of every prediction.

    References
    ----------
    Breiman, L., Friedman, J.H., Olshen, R.A. & Stone, C.J. (1984) Classification and
    Regression Trees. Wadsworth (the one-standard-error rule).
    Fithian, W. & Hastie, T. (2013) Finite-sample equivalence in statistical models for
    presence-only data. Annals of Applied Statistics 7: 1917–1939.
    Warton, D.I. & Shepherd, L.C. (2010) Poisson point process models solve the
    "pseudo-absence problem" for presence-only data in ecology. Ann. Appl. Stat. 4: 1383–1402.
    Renner, I.W. et al. (2015) Point process models for presence-only analysis. Methods in
    Ecology and Evolution 6: 366–379.
    Warton, D.I., Renner, I.W. & Ramp, D. (2013) Model-based control of observer bias for
    the analysis of presence-only data in ecology. PLoS ONE 8: e79168.
    Fithian, W., Elith, J., Hastie, T. & Keith, D.A. (2015) Bias correction in species
    distribution models: pooling survey and collection data for multiple species. Methods
    in Ecology and Evolution 6: 424–438.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = np.r_[rng.normal(1, 0.5, (50, 2)), rng.normal(0, 1, (500, 2))]
    >>> y = np.r_[np.ones(50), np.zeros(500)]
    >>> m = PointProcessModel(classes=("linear", "quadratic")).fit(X, y)
    >>> bool(m.predict_proba([[1.0, 1.0]])[0, 1] > m.predict_proba([[-2.0, -2.0]])[0, 1])
    True
    """

    # Defaults of parameters added after model files were first written: estimators loaded
    # from such files lack the instance attribute, and get_params falls back to these.
    effort_reference = "max"
    cv_tol = 3e-3
    path_patience = 2

    def __init__(self, *, classes=DEFAULT_CLASSES, n_knots=10, standardize=True, penalty="l1",
                 l1_ratio=0.5, C=10.0, Cs=None, n_folds=5, background_weight="auto",
                 solver="auto", max_iter=1000, tol=1e-4, random_state=None, effort_reference="max",
                 cv_tol=3e-3, path_patience=2):
        self.classes = classes
        self.n_knots = n_knots
        self.standardize = standardize
        self.penalty = penalty
        self.l1_ratio = l1_ratio
        self.C = C
        self.Cs = Cs
        self.n_folds = n_folds
        self.background_weight = background_weight
        self.solver = solver
        self.max_iter = max_iter
        self.tol = tol
        self.random_state = random_state
        self.effort_reference = effort_reference
        self.cv_tol = cv_tol
        self.path_patience = path_patience

    # -- fitting ---------------------------------------------------------------------

    def _check_params(self):
        if self.penalty not in ("l1", "elasticnet"):
            raise InputError(f"penalty: got {self.penalty!r}; expected 'l1' or 'elasticnet'")
        if self.penalty == "elasticnet" and not 0.0 <= float(self.l1_ratio) <= 1.0:
            raise InputError(f"l1_ratio: got {self.l1_ratio!r}; expected a number in [0, 1]")
        if self.solver not in ("auto", "liblinear", "saga", "lbfgs"):
            raise InputError(f"solver: got {self.solver!r}; expected auto, liblinear, saga or lbfgs")
        if isinstance(self.C, str):
            if self.C != "cv":
                raise InputError(f"C: got {self.C!r}; expected a positive number, inf or 'cv'")
        elif not float(self.C) > 0:
            raise InputError(f"C: got {self.C!r}; expected a positive number, inf or 'cv'")
        if isinstance(self.classes, str) and self.classes not in ("cv", "auto", *FEATURE_CLASSES):
            raise InputError(f"classes: got {self.classes!r}; expected 'cv' or a list of "
                             f"{', '.join(FEATURE_CLASSES)}")
        bw = self.background_weight
        if not (bw == "auto" or (not isinstance(bw, str) and float(bw) > 0)):
            raise InputError(f"background_weight: got {bw!r}; expected 'auto' or a positive number")
        ref = self.effort_reference
        if not (ref == "max" or (not isinstance(ref, (str, bool)) and np.isfinite(float(ref)) and float(ref) > 0)):
            raise InputError(f"effort_reference: got {ref!r}; expected 'max' or a positive number")

    def _weights(self, y, w):
        n_presence = w[y == 1].sum()
        n_background = w[y == 0].sum()
        if self.background_weight == "auto":
            bw = BACKGROUND_WEIGHT_FACTOR * n_presence / n_background
        else:
            bw = float(self.background_weight)
        return np.where(y == 1, 1.0, bw) * w, float(bw), float(n_presence)

    def _solve(self, F, y, weights, n_presence, C, tol=None):
        """Fit one penalised logistic regression; returns (coef, intercept, n_iter)."""
        l1_ratio = 1.0 if self.penalty == "l1" else float(self.l1_ratio)
        solver = self.solver
        if solver == "auto":
            solver = "lbfgs" if np.isinf(C) else ("liblinear" if l1_ratio == 1.0 else "saga")
        if np.isinf(C) and solver != "lbfgs":
            solver = "lbfgs"
        kwargs = {}
        if solver == "liblinear":
            kwargs["intercept_scaling"] = 100.0
        if solver == "lbfgs":
            l1_ratio = 0.0  # no penalty with C = inf; lbfgs refuses l1_ratio > 0
        if F.shape[1] == 0:
            return np.zeros(0), _intercept_given_slopes(np.zeros(len(y)), y, weights, 0.0), 1
        model = LogisticRegression(
            C=np.inf if np.isinf(C) else C / n_presence, l1_ratio=l1_ratio, solver=solver,
            max_iter=self.max_iter, tol=self.tol if tol is None else tol, random_state=self.random_state, **kwargs,
        )
        model.fit(F, y, sample_weight=weights)
        coef = model.coef_[0].astype(np.float64)
        intercept = float(model.intercept_[0])
        if solver == "liblinear":
            intercept = _intercept_given_slopes(F @ coef, y, weights, intercept)
        elif np.isinf(C):
            coef, intercept = _newton_polish(F, y, weights, coef, intercept)
        return coef, intercept, int(np.max(model.n_iter_))

    def _fit_once(self, X, y, w, C, log_effort=None, classes=None):
        """One fit; ``log_effort`` (or None) enters as an unpenalised linear term.

        Returns (expander, F, weights, bw, coef, intercept, n_iter, effort_coef); the
        intercept is on the raw log-effort scale (``lp = intercept + F @ coef + effort_coef
        * log_effort``), effort_coef is None without effort.
        """
        expander = FeatureExpander(classes=self.classes if classes is None else classes, n_knots=self.n_knots,
                                   standardize=self.standardize).fit(X, y, sample_weight=w)
        F = expander.transform(X)
        weights, bw, n_presence = self._weights(y, w)
        coef, intercept, n_iter, effort_coef = self._solve_with_effort(F, y, w, weights, n_presence, C, log_effort)
        return expander, F, weights, bw, coef, intercept, n_iter, effort_coef

    def _solve_with_effort(self, F, y, w, weights, n_presence, C, log_effort, tol=None):
        """``(coef, intercept, n_iter, effort_coef)`` of one penalised solve; effort (if any) unpenalised."""
        if log_effort is None:
            coef, intercept, n_iter = self._solve(F, y, weights, n_presence, C, tol)
            return coef, intercept, n_iter, None
        centre = float(np.average(log_effort, weights=w))
        spread = float(np.sqrt(np.average((log_effort - centre) ** 2, weights=w)))
        if not spread > 0:
            # constant effort cannot be told from the intercept: no effort term
            coef, intercept, n_iter = self._solve(F, y, weights, n_presence, C, tol)
            return coef, intercept, n_iter, 0.0
        column = (log_effort - centre) * (EFFORT_SCALING / spread)
        coef_all, intercept, n_iter = self._solve(np.column_stack([F, column]), y, weights, n_presence, C, tol)
        coef = coef_all[:-1]
        effort_coef = float(coef_all[-1] * EFFORT_SCALING / spread)
        intercept, effort_coef = _free_terms_given_slopes(F @ coef, log_effort, y, weights,
                                                          intercept - effort_coef * centre, effort_coef)
        return coef, intercept, n_iter, effort_coef

    def fit(self, X, y, sample_weight=None, groups=None, effort=None):
        """Fit to presences (y = 1) and background points (y = 0).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_variables)
            Climate at presences and background points; NaN is refused.
        y : array-like of shape (n_samples,)
            1 = presence, 0 = background.
        sample_weight : array-like of shape (n_samples,), optional
            Multiplies the presence/background weights (e.g. bias correction).
        groups : array-like of shape (n_samples,), optional
            Fold ids (spatial blocks) for ``C="cv"`` and ``classes="cv"``.
        effort : array-like of shape (n_samples,), optional
            Recording effort (> 0) at every presence and background point. Its log enters
            the linear predictor as one unpenalised linear term, and predictions are made
            at ``effort_reference`` (model-based bias correction, see the class notes).

        Returns
        -------
        self
        """
        self._check_params()
        X, y, w = self._validate_fit_input(X, y, sample_weight)
        log_effort = _log_effort(effort, y.shape[0])
        select = isinstance(self.classes, str) and self.classes in ("cv", "auto")
        classes = None
        if self.C == "cv" or select:
            classes, self.C_, self.cv_results_, self.feature_selection_ = self._choose_C(X, y, w, groups, log_effort)
        else:
            self.C_, self.cv_results_ = float(self.C), None
        (self.expander_, F, weights, bw, self.coef_, self.intercept_,
         self.n_iter_, self.effort_coef_) = self._fit_once(X, y, w, self.C_, log_effort, classes)
        if not select:
            self.feature_selection_ = {"chosen": list(self.expander_.classes_used_), "rule": "given",
                                       "criterion": None, "scores": []}
        self.effort_reference_ = None
        self.effort_term_ = 0.0
        if log_effort is not None:
            used = w > 0
            self.effort_reference_ = (float(np.exp(log_effort[used].max())) if self.effort_reference == "max"
                                      else float(self.effort_reference))
            self.effort_term_ = float(self.effort_coef_ * np.log(self.effort_reference_))
        self.background_weight_ = bw
        self.total_background_weight_ = float(weights[y == 0].sum())
        self.feature_names_out_ = self.expander_.get_feature_names_out(
            getattr(self, "feature_names_in_", None))
        lp_background = self.intercept_ + self.effort_term_ + F[y == 0] @ self.coef_
        wb = weights[y == 0]
        # offset_ = -log(weighted mean of exp(lp) over background), in log space for safety
        self.offset_ = float(-(logsumexp(lp_background, b=wb) - np.log(wb.sum())))
        return self

    def _choose_C(self, X, y, w, groups, log_effort=None):
        """Cross-validate every (feature set, C) pair on the same folds; return the choice.

        Returns ``(classes, C, cv_results, feature_selection)``; ``classes`` is None when
        the classes were given. :func:`envelope.models.tuning.score_paths` scores every
        candidate set along the C path on the same folds. Each set keeps its best C (ties:
        the smallest, i.e. the strongest penalty); with several candidate sets the
        one-standard-error rule picks the set.
        """
        select = isinstance(self.classes, str) and self.classes in ("cv", "auto")
        if self.C == "cv":
            Cs = DEFAULT_CS if self.Cs is None else np.asarray(self.Cs, dtype=float)
            if Cs.ndim != 1 or Cs.size == 0 or not (Cs > 0).all():
                raise InputError(f"Cs: got {self.Cs!r}; expected a list of positive numbers")
        else:
            Cs = np.array([float(self.C)])
        sets = FEATURE_SETS if select else (self.classes,)
        if groups is not None:
            groups = np.asarray(groups)
            if groups.shape[0] != y.shape[0]:
                raise InputError(f"groups: got {groups.shape[0]} fold ids; expected {y.shape[0]} (one per row)")
            n_groups = np.unique(groups).size
            if n_groups < 2:
                raise InputError("groups: only one fold id; expected at least 2 for C='cv' or classes='cv'")
            splits = GroupKFold(n_splits=min(self.n_folds, n_groups)).split(X, y, groups)
        else:
            n_splits = int(min(self.n_folds, np.bincount(y).min()))
            if n_splits < 2:
                raise InputError("C='cv' and classes='cv' need at least 2 presences and 2 background points")
            splits = StratifiedKFold(n_splits=n_splits, shuffle=True,
                                     random_state=self.random_state).split(X, y)
        splits = [(train, test) for train, test in splits
                  # AUC needs both kinds of row in the held-out fold
                  if np.unique(y[test]).size == 2 and np.unique(y[train]).size == 2]
        if not splits:
            raise ModelError("C='cv': no fold holds both presences and background; give more groups")
        # held-out rows are scored by the model of the records, effort term included
        auc, names = score_paths(self, X, y, w, splits, sets, Cs, log_effort)  # (fold, set, C)
        mean_auc = auc.mean(axis=0)  # NaN where a path stopped early
        # ties go to the smallest C (strongest penalty, simplest model)
        order = np.argsort(Cs, kind="stable")
        best_c = []
        for m in mean_auc:
            top = np.nanmax(m)
            best_c.append(int(order[np.flatnonzero(np.nan_to_num(m[order], nan=-np.inf) >= top - 1e-12)[0]]))
        def listed(a):  # None where the path stopped before this C
            return [listed(v) for v in a] if np.ndim(a) > 1 else [None if np.isnan(v) else float(v) for v in a]

        results = {"C": Cs.tolist(), "sets": [{"classes": names[j], "mean_auc": listed(mean_auc[j]),
                                               "fold_auc": listed(auc[:, j, :])} for j in range(len(sets))]}
        if not select:
            results.update(mean_auc=listed(mean_auc[0]), fold_auc=listed(auc[:, 0, :]))
            return None, float(Cs[best_c[0]]), results, {"chosen": names[0], "rule": "given",
                                                         "criterion": None, "scores": []}
        choice = one_standard_error_choice([auc[:, j, c] for j, c in enumerate(best_c)])
        i = choice["chosen"]
        results.update(mean_auc=listed(mean_auc[i]), fold_auc=listed(auc[:, i, :]))
        selection = {"chosen": names[i], "rule": "one-standard-error", "criterion": CV_CRITERION,
                     "n_folds": int(auc.shape[0]), "best": names[choice["best"]],
                     "threshold": choice["threshold"],
                     "scores": [{"classes": names[j], "C": float(Cs[best_c[j]]), "mean_auc": choice["mean"][j],
                                 "se": choice["se"][j]} for j in range(len(sets))]}
        return tuple(names[i]), float(Cs[best_c[i]]), results, selection

    # -- prediction ------------------------------------------------------------------

    def linear_predictor(self, X, effort=None):
        """``intercept_ + effort_term_ + features(X) @ coef_``, shape (n_samples,).

        ``effort`` (n_samples,), for a model fitted with effort: use
        ``effort_coef_ * log(effort)`` instead of ``effort_term_`` (the model of the records
        as observed, rather than at the common reference effort).
        """
        X = self._validate_input(X)
        lp = self._linear_predictor(X)
        if effort is not None:
            if getattr(self, "effort_coef_", None) is None:
                raise InputError("effort: given, but the model was fitted without effort")
            lp = lp - self.effort_term_ + self.effort_coef_ * _log_effort(effort, X.shape[0])
        return lp

    def _linear_predictor(self, X):
        # getattr: model files written before the effort term existed have none
        return self.intercept_ + getattr(self, "effort_term_", 0.0) + self.expander_.transform(X) @ self.coef_

    def log_intensity(self, X):
        """IPP log-intensity per unit of background region: linear predictor + log(total background weight).

        Fithian & Hastie (2013): the weighted-logistic intercept diverges like
        ``-log W``; adding ``log W`` recovers the point-process intercept.
        """
        return self.linear_predictor(X) + np.log(self.total_background_weight_)

    def _eta(self, X):
        return self._linear_predictor(X) + self.offset_

    def _suitability(self, X):
        # cloglog: 1 - exp(-exp(eta)), via expm1 for accuracy at small eta
        return -np.expm1(-np.exp(np.minimum(self._eta(X), 700.0)))

    def decision_function(self, X):
        """``eta - log(ln 2)``: positive exactly where suitability > 0.5."""
        X = self._validate_input(X)
        return self._eta(X) - _LOG_LN2


def _log_effort(effort, n):
    """log of ``effort`` (n,), or None; InputError unless every value is finite and > 0."""
    if effort is None:
        return None
    e = np.asarray(effort, dtype=np.float64).ravel()
    if e.shape[0] != n:
        raise InputError(f"effort: got {e.shape[0]} values; expected {n} (one per row)")
    bad = ~(np.isfinite(e) & (e > 0))
    if bad.any():
        raise InputError(f"effort: {int(bad.sum())} values are not positive finite numbers; expected "
                         "recording effort > 0 at every presence and background point")
    return np.log(e)


def _newton_logistic(A, offset, y, weights, start, n_iter):
    """Full Newton steps on the unpenalised weighted logistic log-likelihood of ``offset + A @ theta``.

    The objective is convex; the start is returned when a step fails (singular Hessian, e.g.
    under perfect separation) to improve on it or leaves the finite numbers.
    """
    start = np.asarray(start, dtype=np.float64)
    theta = start
    for _ in range(n_iter):
        p = expit(offset + A @ theta)
        grad = A.T @ (weights * (p - y))
        hess = (A * (weights * p * (1.0 - p))[:, None]).T @ A
        try:
            step = np.linalg.solve(hess, grad)
        except np.linalg.LinAlgError:
            break
        if not np.all(np.isfinite(step)):
            break
        theta = theta - step
        if np.max(np.abs(step)) < 1e-12:
            break
    if not np.all(np.isfinite(theta)) or (_weighted_nll(offset + A @ theta, y, weights)
                                          > _weighted_nll(offset + A @ start, y, weights)):
        return start
    return theta


def _free_terms_given_slopes(lp0, u, y, weights, intercept, slope, n_iter=50):
    """Unpenalised intercept and slope of ``u`` for fixed other slopes (Newton on two parameters).

    Maximises the weighted logistic log-likelihood of ``intercept + slope * u + lp0``; the
    start is kept if Newton fails to improve on it.
    """
    A = np.column_stack([np.ones(u.shape[0]), u])
    theta = _newton_logistic(A, lp0, y, weights, [intercept, slope], n_iter)
    return float(theta[0]), float(theta[1])


def _intercept_given_slopes(lp0, y, weights, start, n_iter=50):
    """Unpenalised weighted-logistic intercept for fixed slopes (Newton on one parameter).

    Solves sum_i w_i (sigmoid(b + lp0_i) - y_i) = 0; the objective is convex in b.
    """
    b = float(start)
    for _ in range(n_iter):
        p = 1.0 / (1.0 + np.exp(-(b + lp0)))
        grad = np.sum(weights * (p - y))
        hess = np.sum(weights * p * (1.0 - p))
        if hess <= 0:
            break
        step = grad / hess
        b -= step
        if abs(step) < 1e-12:
            break
    return b


def _newton_polish(F, y, weights, coef, intercept, n_iter=20):
    """A few full Newton steps on the unpenalised weighted log-likelihood.

    lbfgs stops on a gradient tolerance that is loose when the background weights are huge
    (W = 1e6 in REFERENCES item 9); Newton converges quadratically from there. The lbfgs
    result is kept when the Hessian is singular (e.g. perfect separation) or Newton wanders off.
    """
    A = np.column_stack([np.ones(F.shape[0]), F])
    theta = _newton_logistic(A, 0.0, y, weights, np.r_[intercept, coef], n_iter)
    return theta[1:], float(theta[0])


def _weighted_nll(eta, y, weights):
    return float(np.sum(weights * (np.logaddexp(0.0, eta) - y * eta)))
