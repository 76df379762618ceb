"""Percentile climate envelope: suitability from each variable's percentile position among presences."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from envelope.errors import InputError
from envelope.models.base import PresenceBackgroundClassifier


class PercentileEnvelope(PresenceBackgroundClassifier, BaseEstimator):
    """Climate envelope from the presences' percentiles (Nix 1986; Busby 1991).

    For variable ``i`` let ``F_i`` be the empirical CDF of the presences' values
    (weighted by ``sample_weight``). With ``ties="mid"`` (default) it is the
    mid-distribution function ``F_i(x) = [#(values < x) + #(values == x) / 2] / n``,
    which equals 0.5 at the sample median, so the median scores 1; with
    ``ties="right"`` it is the usual ``#(values <= x) / n``. The per-variable score is::

        s_i(x) = 2 * min(F_i(x), 1 - F_i(x))    for min_i <= x <= max_i
        s_i(x) = 0                             outside [min_i, max_i]

    (1 at the median, falling towards 0 at the presences' extremes and 0 outside their
    range), and suitability is the minimum over variables,
    ``s(x) = min_i s_i(x)`` (the most limiting variable decides). Background rows are
    ignored: ``fit`` accepts ``y`` and uses only the rows with ``y == 1``.

    ``predict`` returns 1 where suitability >= 0.5, i.e. inside the central 50 % of the
    presences on every variable; ``decision_function`` is ``suitability - 0.5``.

    Parameters
    ----------
    ties : {"mid", "right"}, default="mid"
        ECDF convention at a presence value (see above).

    Attributes
    ----------
    presence_values_ : list of ndarray
        Distinct sorted presence values per variable.
    share_below_, share_at_ : list of ndarray
        Weight share strictly below, and at, each distinct value.
    lower_, upper_ : ndarray of shape (n_features_in_,)
        Presence range per variable.

    References
    ----------
    Nix, H.A. (1986) A biogeographic analysis of Australian elapid snakes. In: Longmore,
    R. (ed.) Atlas of elapid snakes of Australia. Australian Flora and Fauna Series 7:
    4–15.
    Busby, J.R. (1991) BIOCLIM – a bioclimate analysis and prediction system. Plant
    Protection Quarterly 6: 8–9.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.array([[1.0], [2.0], [3.0], [4.0], [5.0], [0.0]])
    >>> y = np.array([1, 1, 1, 1, 1, 0])
    >>> m = PercentileEnvelope().fit(X, y)
    >>> m.predict_proba([[3.0], [9.0]])[:, 1].tolist()
    [1.0, 0.0]
    """

    def __init__(self, *, ties="mid"):
        self.ties = ties

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        # it ignores the background by design, so it cannot separate sklearn's test blobs
        tags.classifier_tags.poor_score = True
        return tags

    def fit(self, X, y, sample_weight=None):
        """Store the presences' ECDF per variable (background rows are ignored).

        Parameters
        ----------
        X : array-like of shape (n_samples, n_variables)
        y : array-like of shape (n_samples,), 1 = presence, 0 = background
        sample_weight : array-like of shape (n_samples,), optional

        Returns
        -------
        self
        """
        if self.ties not in ("mid", "right"):
            raise InputError(f"ties: got {self.ties!r}; expected 'mid' or 'right'")
        X, y, w = self._validate_fit_input(X, y, sample_weight)
        keep = (y == 1) & (w > 0)
        if not keep.any():
            raise InputError("sample_weight: every presence has weight 0; expected some positive weight")
        P, wp = X[keep], w[keep]
        self.presence_values_, self.share_below_, self.share_at_ = [], [], []
        for j in range(P.shape[1]):
            uniq, inverse = np.unique(P[:, j], return_inverse=True)
            at = np.bincount(inverse, weights=wp, minlength=uniq.size) / wp.sum()
            self.presence_values_.append(uniq)
            self.share_at_.append(at)
            self.share_below_.append(np.r_[0.0, np.cumsum(at)[:-1]])
        self.lower_ = np.array([v[0] for v in self.presence_values_])
        self.upper_ = np.array([v[-1] for v in self.presence_values_])
        return self

    def _suitability(self, X):
        s = np.ones(X.shape[0])
        for j in range(X.shape[1]):
            s = np.minimum(s, self.variable_score(j, X[:, j]))
        return s

    def variable_score(self, j, x):
        """Score ``s_j`` of variable ``j`` (0-based, training order) at the values ``x``.

        Suitability is the minimum of these over the variables. The projection tabulates
        this function (:func:`envelope.kernels.percentile.compile_percentile`), so it is the
        one definition of the score.

        Parameters
        ----------
        j : int
        x : ndarray of float64, shape (n_samples,)

        Returns
        -------
        ndarray of float64, shape (n_samples,)
        """
        check_is_fitted(self)
        values, below, at = self.presence_values_[j], self.share_below_[j], self.share_at_[j]
        idx = np.clip(np.searchsorted(values, x, side="right") - 1, 0, None)
        tie_share = 0.5 if self.ties == "mid" else 1.0
        on_value = values[idx] == x
        F = below[idx] + np.where(on_value, tie_share, 1.0) * at[idx]
        score = 2.0 * np.minimum(F, 1.0 - F)
        outside = (x < self.lower_[j]) | (x > self.upper_[j])
        return np.where(outside, 0.0, score)
