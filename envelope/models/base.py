"""Shared checks and plumbing of the presence/background estimators (y: 1 = presence, 0 = background)."""

from __future__ import annotations

import numpy as np
from sklearn.base import ClassifierMixin
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import _check_sample_weight, check_is_fitted, validate_data

from envelope.errors import InputError

def check_presence_background(y) -> tuple[np.ndarray, np.ndarray]:
    """Return ``(classes, y01)``: the two labels and ``y`` as int 0 (background) / 1 (presence).

    The usual input is 1 = presence, 0 = background (then ``classes = [0, 1]``); any two
    labels are accepted and, as in scikit-learn, the larger one (``classes[1]``) is the
    presence class. One label only, or more than two, raise InputError (a ValueError).
    """
    y = np.asarray(y)
    if y.ndim == 2 and y.shape[1] == 1:
        y = y.ravel()
    check_classification_targets(y)
    classes, y01 = np.unique(y, return_inverse=True)
    if classes.size > 2:
        shown = ", ".join(repr(v) for v in classes[:5].tolist())
        raise InputError(f"y: got labels {shown}; Only binary classification is supported. "
                         "Expected 1 = presence and 0 = background")
    if classes.size < 2:
        raise InputError(f"y: only one class ({classes[0]!r}) was given; expected both presences "
                         "(1) and background (0)")
    return classes, y01.astype(np.int64).ravel()


class PresenceBackgroundClassifier(ClassifierMixin):
    """Mixin: binary 0/1 targets, ``predict`` = suitability >= 0.5, shared input checks.

    A subclass implements ``_suitability(X)`` on validated input and ``fit``; inside
    ``fit`` and ``_suitability`` the target is always 0 = background, 1 = presence.
    """

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags

    def _validate_fit_input(self, X, y, sample_weight):
        X, y = validate_data(self, X, y, dtype=np.float64)
        self.classes_, y = check_presence_background(y)
        w = _check_sample_weight(sample_weight, X, dtype=np.float64)
        for cls in (0, 1):
            if not w[y == cls].sum() > 0:
                kind = "presence" if cls else "background"
                raise InputError(f"sample_weight: the {kind} class has no positive weight; "
                                 "expected presences and background both weighted")
        return X, y, w

    def _validate_input(self, X):
        check_is_fitted(self)
        return validate_data(self, X, dtype=np.float64, reset=False)

    def predict_proba(self, X):
        """Column 0: 1 - suitability; column 1: suitability in [0, 1], shape (n_samples, 2)."""
        s = self._suitability(self._validate_input(X))
        return np.column_stack([1.0 - s, s])

    def predict(self, X):
        """Presence label (1) where suitability >= 0.5, else background (0).

        Use a threshold rule (``envelope.kernels.thresholds``) for maps, not this.
        """
        s = self._suitability(self._validate_input(X))
        return self.classes_[(s >= 0.5).astype(np.int64)]

    def decision_function(self, X):
        """``suitability - 0.5``, positive exactly where :meth:`predict` says presence.

        A suitability of exactly 0.5 (common for the percentile envelope) counts as
        presence, so there the smallest positive float is returned instead of 0.
        """
        d = self._suitability(self._validate_input(X)) - 0.5
        return np.where(d == 0.0, np.nextafter(0.0, 1.0), d)
