"""Presence/background estimators (scikit-learn compatible, 2-D tables only) and their registry."""

from __future__ import annotations

import importlib

from envelope.errors import InputError

__all__ = [
    "BIAS_METHODS", "COVARIATE_METHODS", "FEATURE_CLASSES", "METHODS", "METHOD_NAMES", "BoostedTrees", "DownsampledForest",
    "PercentileEnvelope", "PointProcessModel", "SkillWeightedEnsemble", "feature_classes_report", "make_estimator",
    "response_curves",
]

# The registry: method name (as given on the command line / in a study file) -> estimator class.
# Classes are imported when first used, so that the command line and the study validator can
# read the names without importing scikit-learn.
_REGISTRY = {
    "pointprocess": ("envelope.models.pointprocess", "PointProcessModel"),
    "envelope": ("envelope.models.percentile", "PercentileEnvelope"),
    "brt": ("envelope.models.trees", "BoostedTrees"),
    "forest": ("envelope.models.trees", "DownsampledForest"),
    "ensemble": ("envelope.models.ensemble", "SkillWeightedEnsemble"),
}
#: The one list of method names: CLI choices, the study validator and the messages read it.
METHOD_NAMES = tuple(_REGISTRY)
#: How a bias (recording-effort) layer is used in a fit; "auto" picks per model family.
BIAS_METHODS = ("auto", "covariate", "weighted")
#: Model families whose linear predictor can hold log effort as a covariate.
COVARIATE_METHODS = ("pointprocess",)
#: Feature classes of the point-process model (envelope.models.features.FeatureExpander).
FEATURE_CLASSES = ("linear", "quadratic", "product", "hinge")
_CLASSES = {cls: module for module, cls in _REGISTRY.values()}


def __getattr__(name):
    if name == "METHODS":
        return {method: __getattr__(cls) for method, (_, cls) in _REGISTRY.items()}
    if name in _CLASSES:
        return getattr(importlib.import_module(_CLASSES[name]), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def make_estimator(method: str, **params):
    """A new, unfitted estimator for ``method`` (a key of :data:`METHODS`) with ``params``.

    Unknown methods or parameters raise InputError naming them and what is allowed.

    Examples
    --------
    >>> make_estimator("pointprocess", C=5.0)
    PointProcessModel(C=5.0)
    """
    if method not in METHOD_NAMES:
        raise InputError(f"method: got {method!r}; expected one of {', '.join(METHOD_NAMES)}")
    cls = __getattr__(_REGISTRY[method][1])
    allowed = cls().get_params(deep=False)
    unknown = [p for p in params if p not in allowed]
    if unknown:
        raise InputError(f"method {method!r}: unknown parameter {unknown[0]!r} "
                         f"(expected one of {', '.join(allowed) or 'none'})")
    return cls(**params)


def feature_classes_report(estimator) -> dict | None:
    """How a fitted model's feature classes were chosen, for the fit summary and the model file.

    For a :class:`PointProcessModel` its ``feature_selection_`` (``chosen``, ``rule``,
    ``criterion``, ``scores``; see there); for an ensemble the same for its point-process
    member, with ``member`` naming it; None for models without feature classes. Models
    fitted before the classes were chosen by cross-validation report ``chosen`` with
    ``rule = "not recorded"``.
    """
    SkillWeightedEnsemble, PointProcessModel = __getattr__("SkillWeightedEnsemble"), __getattr__("PointProcessModel")
    if isinstance(estimator, SkillWeightedEnsemble):
        for name, member in getattr(estimator, "members_", []):
            report = feature_classes_report(member)
            if report is not None:
                return {"member": name, **report}
        return None
    if not isinstance(estimator, PointProcessModel) or not hasattr(estimator, "expander_"):
        return None
    selection = getattr(estimator, "feature_selection_", None)
    if selection is None:
        return {"chosen": list(estimator.expander_.classes_used_), "rule": "not recorded",
                "criterion": None, "scores": []}
    return {k: (list(v) if isinstance(v, tuple) else v) for k, v in selection.items()}


def response_curves(estimator, X_reference, feature_names, n_points: int = 50) -> dict:
    """Suitability along each variable with the others held at their median.

    Each variable is varied over ``n_points`` evenly spaced values between its minimum
    and maximum in ``X_reference`` while every other variable is fixed at its median in
    ``X_reference`` (the usual one-at-a-time response curve; Elith et al. 2005 call these
    "evaluation strips").

    Parameters
    ----------
    estimator : fitted estimator with ``predict_proba``
    X_reference : array-like of shape (n_samples, n_variables)
        E.g. the background sample; NaN rows are ignored.
    feature_names : sequence of str, length n_variables
    n_points : int, default=50

    Returns
    -------
    dict of str -> dict with "value" (n_points,) and "suitability" (n_points,)

    References
    ----------
    Elith, J., Ferrier, S., Huettmann, F. & Leathwick, J. (2005) The evaluation strip: a
    new and robust method for plotting predicted responses from species distribution
    models. Ecological Modelling 186: 280–289.
    """
    import numpy as np

    X = np.asarray(X_reference, dtype=np.float64)
    names = [str(n) for n in feature_names]
    if X.ndim != 2 or X.shape[1] != len(names):
        raise InputError(f"X_reference: got shape {X.shape}; expected (n, {len(names)}) for "
                         f"variables {', '.join(names)}")
    X = X[np.isfinite(X).all(axis=1)]
    if X.shape[0] == 0:
        raise InputError("X_reference: every row holds NaN; expected some complete rows")
    if n_points < 2:
        raise InputError(f"n_points: got {n_points}; expected at least 2")
    median = np.median(X, axis=0)
    grids = [np.linspace(X[:, j].min(), X[:, j].max(), n_points) for j in range(len(names))]
    # one call for all curves: row block j varies variable j
    rows = np.tile(median, (len(names) * n_points, 1))
    for j, g in enumerate(grids):
        rows[j * n_points:(j + 1) * n_points, j] = g
    if hasattr(estimator, "feature_names_in_"):
        import pandas as pd

        rows = pd.DataFrame(rows, columns=names)
    s = estimator.predict_proba(rows)[:, 1]
    return {n: {"value": grids[j], "suitability": s[j * n_points:(j + 1) * n_points]}
            for j, n in enumerate(names)}
