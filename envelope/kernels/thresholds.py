"""Threshold rules that turn suitability into presence/absence: max SSS, minimum and 10th-percentile training presence."""

from __future__ import annotations

import math
import numbers

import numpy as np

from envelope.errors import InputError
from envelope.kernels.metrics import checked_scores

__all__ = [
    "THRESHOLD_RULES",
    "max_sss",
    "min_training_presence",
    "percentile_training_presence",
    "choose_threshold",
]

#: Named rules accepted by :func:`choose_threshold`; a number in [0, 1] is a fixed threshold.
THRESHOLD_RULES = ("max-sss", "p10", "min-presence")

# numpy.percentile's method names (numpy >= 1.22), checked here so the error lists them
_NUMPY_METHODS = ("inverted_cdf", "averaged_inverted_cdf", "closest_observation",
                  "interpolated_inverted_cdf", "hazen", "weibull", "linear", "median_unbiased",
                  "normal_unbiased", "lower", "higher", "midpoint", "nearest")


def max_sss(presence_scores, background_scores) -> float:
    """Threshold maximising sensitivity + specificity (max SSS, equivalently max TSS).

    Candidates are the distinct observed scores (presences and background); a record is
    predicted present when score ``>=`` t, so sens(t) = share of presences with score >= t
    and spec(t) = share of background with score < t. Ties in the sum are broken by the
    lowest t (the most inclusive map).

    References
    ----------
    Liu, C., Berry, P.M., Dawson, T.P. & Pearson, R.G. (2005) Selecting thresholds of
    occurrence in the prediction of species distributions. Ecography 28: 385–393.
    Liu, C., White, M. & Newell, G. (2013) Selecting thresholds for the prediction of species
    occurrence with presence-only data. J. Biogeogr. 40: 778–789.

    Examples
    --------
    >>> max_sss([0.9, 0.8, 0.3], [0.1, 0.2, 0.85])
    0.3
    """
    p = np.sort(checked_scores(presence_scores, "presence_scores"))
    b = np.sort(checked_scores(background_scores, "background_scores"))
    t = np.unique(np.concatenate([p, b]))  # ascending, so argmax returns the lowest t on ties
    # sens + spec scaled by n_p * n_b: exact integers, so equal sums tie exactly (no float noise)
    n_above = p.size - np.searchsorted(p, t, side="left")
    n_below = np.searchsorted(b, t, side="left")
    counts = n_above * b.size + n_below * p.size
    return float(t[int(np.argmax(counts))])


def min_training_presence(presence_scores) -> float:
    """Lowest suitability at any training presence (minimum training presence, LPT).

    Training omission at this threshold (``>=``) is zero.

    References
    ----------
    Pearson, R.G., Raxworthy, C.J., Nakamura, M. & Peterson, A.T. (2007) Predicting species
    distributions from small numbers of occurrence records. J. Biogeogr. 34: 102–117.
    """
    return float(np.min(checked_scores(presence_scores, "presence_scores")))


def percentile_training_presence(scores, q: float = 10, method: str = "order") -> float:
    """Threshold that omits about ``q`` % of the training presences (P10 for ``q=10``).

    Parameters
    ----------
    scores : array_like
        Suitability at the training presences.
    q : float, default=10
        Percentage in [0, 100].
    method : str, default="order"
        ``"order"``: the order statistic ``sorted(scores)[floor(q/100 * n)]`` (0-based,
        clamped to the largest), which omits exactly ``floor(q/100 * n)`` presences under
        ``>=`` when scores are distinct. Any other value is passed to ``numpy.percentile``
        as its ``method`` (e.g. ``"linear"``, ``"lower"``, ``"higher"``).

    References
    ----------
    Pearson, R.G. et al. (2007) J. Biogeogr. 34: 102–117 (10th-percentile training presence).
    Hyndman, R.J. & Fan, Y. (1996) Sample quantiles in statistical packages. Am. Stat. 50: 361–365.
    """
    s = checked_scores(scores, "presence_scores")
    q = float(q)
    if not 0.0 <= q <= 100.0:
        raise InputError(f"q: {q!r}; expected a percentage in [0, 100]")
    if method == "order":
        ordered = np.sort(s)
        return float(ordered[min(int(math.floor(q / 100.0 * s.size)), s.size - 1)])
    if method not in _NUMPY_METHODS:
        raise InputError(f"method: {method!r}; expected 'order' or a numpy.percentile method "
                         f"({', '.join(_NUMPY_METHODS)})")
    return float(np.percentile(s, q, method=method))


def choose_threshold(rule, presence_scores, background_scores) -> tuple[float, str]:
    """Apply a threshold rule by name and return ``(value, rule_name)``.

    Parameters
    ----------
    rule : str or float
        ``"max-sss"`` (default in the library's fit), ``"p10"`` (10th-percentile training
        presence, order-statistic convention), ``"min-presence"`` (minimum training
        presence), or a number in [0, 1] (also as a string, e.g. ``"0.3"``): a fixed
        threshold, returned with the name ``"fixed"``.
    presence_scores, background_scores : array_like
        Suitability at the training presences and background.

    Raises
    ------
    InputError
        Unknown rule (the message lists the allowed ones), or a fixed value outside [0, 1].
    """
    if isinstance(rule, str):
        name = rule.strip().lower()
        if name == "max-sss":
            return max_sss(presence_scores, background_scores), "max-sss"
        if name == "p10":
            return percentile_training_presence(presence_scores, 10, method="order"), "p10"
        if name == "min-presence":
            return min_training_presence(presence_scores), "min-presence"
        try:
            value = float(name)
        except ValueError:
            raise InputError(f"threshold rule: {rule!r} is unknown; expected one of "
                             f"{', '.join(THRESHOLD_RULES)} or a number in [0, 1]") from None
    elif isinstance(rule, numbers.Real) and not isinstance(rule, bool):
        value = float(rule)
    else:
        raise InputError(f"threshold rule: {rule!r} is unknown; expected one of "
                         f"{', '.join(THRESHOLD_RULES)} or a number in [0, 1]")
    if not (math.isfinite(value) and 0.0 <= value <= 1.0):
        raise InputError(f"threshold rule: fixed threshold {rule!r} is outside [0, 1]; expected a "
                         "suitability between 0 and 1")
    return value, "fixed"
