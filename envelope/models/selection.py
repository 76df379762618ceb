"""Model selection by cross-validation: the one-standard-error rule over candidates ordered simplest first."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError

__all__ = ["one_standard_error_choice"]


def one_standard_error_choice(fold_scores) -> dict:
    """The simplest candidate whose mean CV score is within one standard error of the best.

    ``fold_scores[i]`` holds candidate ``i``'s score on each fold (higher is better, e.g.
    held-out AUC), candidates ordered from simplest to richest, all scored on the same
    folds. With ``m_i`` the mean over the K folds and ``se_i = sd_i / sqrt(K)`` (sample SD,
    ddof = 1), the best candidate ``b`` has the highest mean (ties: the simpler one) and
    the choice is the first ``i`` with ``m_i >= m_b - se_b``.

    Parameters
    ----------
    fold_scores : sequence of array-like, each of length K >= 1

    Returns
    -------
    dict with ``chosen`` (index), ``best`` (index), ``threshold`` (``m_b - se_b``),
    ``mean`` and ``se`` (lists, one per candidate). With one fold the standard error is
    undefined and taken as 0, so the rule reduces to the best mean.

    References
    ----------
    Breiman, L., Friedman, J.H., Olshen, R.A. & Stone, C.J. (1984) Classification and
    Regression Trees. Wadsworth (the 1-SE rule, ch. 3).
    Hastie, T., Tibshirani, R. & Friedman, J. (2009) The Elements of Statistical Learning,
    2nd ed. Springer, §7.10.

    Examples
    --------
    >>> r = one_standard_error_choice([[0.80, 0.80], [0.86, 0.87], [0.88, 0.86]])
    >>> r["best"], r["chosen"]
    (2, 1)
    """
    scores = [np.asarray(s, dtype=np.float64).ravel() for s in fold_scores]
    if not scores:
        raise InputError("fold_scores: no candidates; expected one list of fold scores per candidate")
    k = scores[0].size
    if k == 0 or any(s.size != k for s in scores) or not all(np.isfinite(s).all() for s in scores):
        raise InputError(f"fold_scores: candidates with {[s.size for s in scores]} fold scores; expected "
                         "the same number (at least 1) of finite scores for every candidate")
    mean = np.array([s.mean() for s in scores])
    se = np.array([s.std(ddof=1) / np.sqrt(k) if k > 1 else 0.0 for s in scores])
    best = int(np.flatnonzero(mean == mean.max())[0])
    threshold = float(mean[best] - se[best])
    chosen = int(np.flatnonzero(mean >= threshold)[0])
    return {"chosen": chosen, "best": best, "threshold": threshold,
            "mean": mean.tolist(), "se": se.tolist()}
