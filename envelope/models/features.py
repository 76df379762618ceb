"""Feature expansion for presence/background models: linear, quadratic, product and hinge features."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import _check_sample_weight, check_is_fitted, validate_data

from envelope.errors import InputError
from envelope.models import FEATURE_CLASSES


#: Classes used when none are given (the point-process model can instead choose them by
#: cross-validation, ``PointProcessModel(classes="cv")``).
DEFAULT_CLASSES = ("linear", "quadratic", "hinge")


def weighted_quantiles(values: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """Quantiles of ``values`` with frequency ``weights`` (inverted weighted CDF, lower value).

    With unit weights this is ``np.quantile(values, probs, method="inverted_cdf")``, so
    repeating a row and doubling its weight give the same knots.
    """
    order = np.argsort(values, kind="stable")
    v, w = values[order], weights[order]
    keep = w > 0
    v, w = v[keep], w[keep]
    cum = np.cumsum(w)
    idx = np.searchsorted(cum, probs * cum[-1], side="left")
    return v[np.clip(idx, 0, v.size - 1)]


class FeatureExpander(TransformerMixin, BaseEstimator):
    """Expand climate variables into linear, quadratic, product and hinge features.

    Each variable is first standardised to a z-score with the (weighted) mean and
    standard deviation of the training rows: ``z = (x - mean_) / scale_``. Features are
    then built from ``z``:

    - ``linear``: ``z``
    - ``quadratic``: ``z**2``
    - ``product``: ``z_i * z_j`` for every pair ``i < j``
    - ``hinge``: for each knot ``k`` a forward hinge ``max(0, z - k)`` and a reverse
      hinge ``max(0, k - z)``; the knots are ``n_knots`` evenly spaced quantiles
      (probabilities ``1/(n_knots+1), ..., n_knots/(n_knots+1)``) of the training values
      of that variable (Phillips & Dudík 2008 describe hinge features).

    ``transform`` is a pure function of the stored ``mean_``, ``scale_`` and ``knots_``,
    so a caller may transform millions of cells in chunks and get the same result.

    Parameters
    ----------
    classes : sequence of {"linear", "quadratic", "product", "hinge"}, default=("linear", "quadratic", "hinge")
        Feature classes (a single name is one class). The point-process model chooses
        among sets of them by cross-validation (``PointProcessModel(classes="cv")``).
    n_knots : int, default=10
        Knots per variable for hinge features (duplicate quantiles are merged).
    standardize : bool, default=True
        Build features from z-scores. ``False`` uses the raw values (``mean_ = 0``,
        ``scale_ = 1``), so a linear coefficient is on the variable's own scale.

    Attributes
    ----------
    classes_used_ : tuple of str
        The resolved feature classes, in a fixed order.
    mean_, scale_ : ndarray of shape (n_features_in_,)
        Standardisation of each input variable.
    knots_ : list of ndarray
        Hinge knots per variable, in z units (empty arrays without hinges).
    n_features_in_, feature_names_in_ :
        Input width and names seen by ``fit``.

    References
    ----------
    Phillips, S.J., Anderson, R.P. & Schapire, R.E. (2006) Maximum entropy modeling of species
    geographic distributions. Ecological Modelling 190: 231–259.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.array([[0.0], [1.0], [2.0], [3.0]])
    >>> fx = FeatureExpander(classes=("linear", "quadratic"), standardize=False).fit(X)
    >>> fx.transform(X)[:, 1].tolist()
    [0.0, 1.0, 4.0, 9.0]
    """

    def __init__(self, *, classes=DEFAULT_CLASSES, n_knots=10, standardize=True):
        self.classes = classes
        self.n_knots = n_knots
        self.standardize = standardize

    def _resolve_classes(self) -> tuple[str, ...]:
        requested = [self.classes] if isinstance(self.classes, str) else list(self.classes)
        unknown = [c for c in requested if c not in FEATURE_CLASSES]
        if unknown or not requested:
            hint = (" (the presence-count rule 'auto' was removed; the point-process model chooses "
                    "classes by cross-validation with classes='cv')" if "auto" in requested else "")
            raise InputError(
                f"feature classes: got {requested!r}; expected a non-empty list of "
                f"{', '.join(FEATURE_CLASSES)}{hint}"
            )
        return tuple(c for c in FEATURE_CLASSES if c in requested)

    def fit(self, X, y=None, sample_weight=None):
        """Learn standardisation and hinge knots from the training rows.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_variables)
        y : array-like of shape (n_samples,), optional
            Ignored (accepted for pipeline compatibility).
        sample_weight : array-like of shape (n_samples,), optional
            Frequency weights for the mean, standard deviation and knot quantiles.

        Returns
        -------
        self
        """
        X = validate_data(self, X, dtype=np.float64)
        w = _check_sample_weight(sample_weight, X, dtype=np.float64)
        self.classes_used_ = self._resolve_classes()
        if not (isinstance(self.n_knots, (int, np.integer)) and self.n_knots >= 1):
            raise InputError(f"n_knots: got {self.n_knots!r}; expected a whole number >= 1")
        if self.standardize:
            mean = np.average(X, axis=0, weights=w)
            sd = np.sqrt(np.average((X - mean) ** 2, axis=0, weights=w))
            # a constant variable keeps scale 1 so z stays finite (it is then all zeros)
            sd[sd == 0] = 1.0
        else:
            mean = np.zeros(X.shape[1])
            sd = np.ones(X.shape[1])
        self.mean_, self.scale_ = mean, sd
        knots = []
        if "hinge" in self.classes_used_:
            probs = np.arange(1, self.n_knots + 1) / (self.n_knots + 1)
            Z = (X - mean) / sd
            Zw = Z[w > 0]  # rows of weight 0 count as absent, as in the quantiles
            for j in range(X.shape[1]):
                k = np.unique(weighted_quantiles(Z[:, j], w, probs))
                # a knot at the maximum (or minimum) gives an all-zero hinge: drop it
                k = k[(k > Zw[:, j].min()) & (k < Zw[:, j].max())]
                knots.append(k)
        else:
            knots = [np.empty(0) for _ in range(X.shape[1])]
        self.knots_ = knots
        return self

    def _input_names(self, input_features=None):
        if input_features is not None:
            names = [str(f) for f in input_features]
            if len(names) != self.n_features_in_:
                raise InputError(
                    f"input_features: got {len(names)} names; expected {self.n_features_in_}"
                )
            return names
        if hasattr(self, "feature_names_in_"):
            return [str(f) for f in self.feature_names_in_]
        return [f"x{j}" for j in range(self.n_features_in_)]

    def get_feature_names_out(self, input_features=None):
        """Names of the output features, e.g. ``bio1``, ``bio1^2``, ``bio1*bio2``, ``hinge(bio1>12.3)``.

        Hinge names give the knot in the variable's own units.
        """
        check_is_fitted(self)
        names = self._input_names(input_features)
        out = []
        for cls in self.classes_used_:
            if cls == "linear":
                out += names
            elif cls == "quadratic":
                out += [f"{n}^2" for n in names]
            elif cls == "product":
                p = len(names)
                out += [f"{names[i]}*{names[j]}" for i in range(p) for j in range(i + 1, p)]
            elif cls == "hinge":
                for j, n in enumerate(names):
                    raw = self.knots_[j] * self.scale_[j] + self.mean_[j]
                    out += [f"hinge({n}>{k:.4g})" for k in raw]
                    out += [f"hinge({n}<{k:.4g})" for k in raw]
        return np.asarray(out, dtype=object)

    def transform(self, X):
        """Features of ``X`` (n_samples, n_features_out), float64; a pure function of the fit.

        Raises ValueError when ``X`` holds NaN or has the wrong width or names.
        """
        check_is_fitted(self)
        X = validate_data(self, X, dtype=np.float64, reset=False)
        Z = (X - self.mean_) / self.scale_
        blocks = []
        for cls in self.classes_used_:
            if cls == "linear":
                blocks.append(Z)
            elif cls == "quadratic":
                blocks.append(Z**2)
            elif cls == "product":
                i, j = np.triu_indices(Z.shape[1], k=1)
                blocks.append(Z[:, i] * Z[:, j])
            elif cls == "hinge":
                for j, k in enumerate(self.knots_):
                    d = Z[:, [j]] - k[None, :]
                    blocks.append(np.maximum(d, 0.0))
                    blocks.append(np.maximum(-d, 0.0))
        if not blocks:
            return np.empty((Z.shape[0], 0))
        return np.hstack(blocks)


def parse_feature_classes(value, *, where: str = "features"):
    """``"cv"`` or a tuple of feature classes from a comma-separated string or a list.

    ``"cv"`` (choose by cross-validation) is returned as is; otherwise every name must be one
    of :data:`FEATURE_CLASSES`, given once, and the result is in that canonical order.
    ``where`` names the option or key in the error message.

    Examples
    --------
    >>> parse_feature_classes("hinge, linear,quadratic")
    ('linear', 'quadratic', 'hinge')
    """
    if isinstance(value, str):
        if value.strip().lower() == "cv":
            return "cv"
        names = [v.strip().lower() for v in value.split(",")]
    elif isinstance(value, (list, tuple)) and all(isinstance(v, str) for v in value):
        names = [v.strip().lower() for v in value]
    else:
        raise InputError(f"{where}: got {value!r}; expected 'cv' or a list of {', '.join(FEATURE_CLASSES)}")
    unknown = [n for n in names if n not in FEATURE_CLASSES]
    if unknown or not names:
        raise InputError(f"{where}: got {value!r}; expected 'cv' or comma-separated names from "
                         f"{', '.join(FEATURE_CLASSES)}")
    if len(set(names)) < len(names):
        raise InputError(f"{where}: got {value!r}; a class is named twice")
    return tuple(c for c in FEATURE_CLASSES if c in names)
