"""Presence/background evaluation metrics: AUC, confusion-matrix skill scores, continuous Boyce index."""

from __future__ import annotations

import numpy as np
from scipy import stats

from envelope.errors import InputError

__all__ = [
    "auc",
    "roc_points",
    "hanley_mcneil_q",
    "auc_se_hanley_mcneil",
    "confusion",
    "sensitivity",
    "specificity",
    "tss",
    "kappa",
    "boyce_index",
    "omission_rate",
]


def checked_scores(values, name: str, *, allow_empty: bool = False) -> np.ndarray:
    """1-D float64 copy of ``values``; refuses NaN/inf and (unless allowed) an empty set."""
    arr = np.asarray(values, dtype=np.float64).ravel()
    if arr.size == 0 and not allow_empty:
        raise InputError(f"{name}: no values; expected at least one score")
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InputError(f"{name}: {int(bad.sum())} non-finite score(s) (NaN or inf); expected finite "
                         "suitability values (drop records outside the climate grid first)")
    return arr


# --------------------------------------------------------------------------- AUC


def auc(presence_scores, background_scores) -> float:
    """Area under the ROC curve: the Mann–Whitney probability that a presence outscores background.

    Computed from mid-ranks in O(n log n); a tie between a presence and a background score
    counts ½, so the value equals the trapezoidal area under the empirical ROC curve.

    Parameters
    ----------
    presence_scores : array_like, shape (n_presence,)
    background_scores : array_like, shape (n_background,)

    Returns
    -------
    float in [0, 1].

    References
    ----------
    Hanley, J.A. & McNeil, B.J. (1982) The meaning and use of the area under a receiver
    operating characteristic (ROC) curve. Radiology 143: 29–36.

    Examples
    --------
    >>> auc([0.9, 0.5], [0.5, 0.1])
    0.875
    """
    p = checked_scores(presence_scores, "presence_scores")
    b = checked_scores(background_scores, "background_scores")
    ranks = stats.rankdata(np.concatenate([p, b]), method="average")
    # Mann–Whitney U of the presences (Hanley & McNeil 1982, eq. 1 via ranks)
    u = ranks[: p.size].sum() - p.size * (p.size + 1) / 2.0
    return float(u / (p.size * b.size))


def roc_points(presence_scores, background_scores):
    """Empirical ROC curve: one point per distinct score, predicting presence where score ``>=`` t.

    Returns
    -------
    fpr, tpr, thresholds : ndarray
        Starting at (0, 0) with threshold ``+inf`` and ending at (1, 1) with the lowest
        observed score; thresholds descend. ``fpr`` = share of background with score >= t,
        ``tpr`` = share of presences with score >= t.

    References
    ----------
    Hanley, J.A. & McNeil, B.J. (1982) Radiology 143: 29–36 (Table I and Fig. 3).
    """
    p = np.sort(checked_scores(presence_scores, "presence_scores"))
    b = np.sort(checked_scores(background_scores, "background_scores"))
    t = np.unique(np.concatenate([p, b]))[::-1]
    tpr = (p.size - np.searchsorted(p, t, side="left")) / p.size
    fpr = (b.size - np.searchsorted(b, t, side="left")) / b.size
    return (np.concatenate([[0.0], fpr]), np.concatenate([[0.0], tpr]),
            np.concatenate([[np.inf], t]))


def hanley_mcneil_q(presence_scores, background_scores) -> tuple[float, float]:
    """Exact ``(Q1, Q2)`` of Hanley & McNeil (1982) from the data, ties broken at random.

    Q1 = P(two random presences both outscore one random background record),
    Q2 = P(one random presence outscores two random background records), the two draws
    being independent (with replacement). A tie counts as a random ordering of the tied
    records: ½ for one tied pair, ⅓ when all three values are equal.

    References
    ----------
    Hanley, J.A. & McNeil, B.J. (1982) Radiology 143: 29–36 (definitions of Q1, Q2).
    """
    p = np.sort(checked_scores(presence_scores, "presence_scores"))
    b = np.sort(checked_scores(background_scores, "background_scores"))

    def _both_above(high, low):
        # per low record: g higher and e tied values among `high` (sorted); over independent
        # ordered draws (h1, h2): both higher g*g, one higher one tied 2*g*e*1/2, both tied e*e/3
        g = high.size - np.searchsorted(high, low, side="right")
        e = np.searchsorted(high, low, side="right") - np.searchsorted(high, low, side="left")
        pairs = g * g + g * e + e * e / 3.0
        return float(pairs.sum() / (low.size * high.size * high.size))

    q1 = _both_above(p, b)
    # Q2: mirror image on negated scores, the presence must be above two background records
    q2 = _both_above(np.sort(-b), -p)
    return q1, q2


def auc_se_hanley_mcneil(auc_value: float, n_pos: int, n_neg: int, exact_q=None) -> float:
    """Standard error of the AUC by Hanley & McNeil (1982).

    SE² = [A(1−A) + (n_pos−1)(Q1−A²) + (n_neg−1)(Q2−A²)] / (n_pos · n_neg).

    Parameters
    ----------
    auc_value : float
    n_pos, n_neg : int
        Numbers of presences and of background records.
    exact_q : (float, float), optional
        ``(Q1, Q2)`` from :func:`hanley_mcneil_q`. Default: the paper's approximations
        Q1 = A/(2−A), Q2 = 2A²/(1+A) (exponential score distributions).

    References
    ----------
    Hanley, J.A. & McNeil, B.J. (1982) Radiology 143: 29–36, eqs. 1–3.
    """
    a = float(auc_value)
    if not 0.0 <= a <= 1.0:
        raise InputError(f"auc_value: {a!r}; expected a number in [0, 1]")
    if n_pos < 1 or n_neg < 1:
        raise InputError(f"n_pos, n_neg: {n_pos}, {n_neg}; expected at least one of each")
    q1, q2 = (a / (2.0 - a), 2.0 * a * a / (1.0 + a)) if exact_q is None else map(float, exact_q)
    var = (a * (1 - a) + (n_pos - 1) * (q1 - a * a) + (n_neg - 1) * (q2 - a * a)) / (n_pos * n_neg)
    return float(np.sqrt(max(var, 0.0)))


# --------------------------------------------------------------------------- confusion matrix


def confusion(presence_scores, background_scores, threshold: float, *, inclusive: bool = True):
    """Confusion matrix ``(a, b, c, d)`` at ``threshold``, in Allouche et al.'s layout.

    a = presences predicted present (true positive), b = background predicted present
    (commission), c = presences predicted absent (omission), d = background predicted absent.
    Predicted present means score ``>= threshold`` when ``inclusive`` (default), else ``>``.

    References
    ----------
    Allouche, O., Tsoar, A. & Kadmon, R. (2006) Assessing the accuracy of species distribution
    models: prevalence, kappa and the true skill statistic (TSS). J. Appl. Ecol. 43: 1223–1232.
    """
    p = checked_scores(presence_scores, "presence_scores")
    bg = checked_scores(background_scores, "background_scores")
    t = float(threshold)
    a = int(np.count_nonzero(p >= t if inclusive else p > t))
    b = int(np.count_nonzero(bg >= t if inclusive else bg > t))
    return a, b, p.size - a, bg.size - b


def _ratio(num, den) -> float:
    return float(num / den) if den > 0 else float("nan")


def sensitivity(a, b, c, d) -> float:
    """Share of presences predicted present, a/(a+c); NaN without presences (Allouche et al. 2006)."""
    return _ratio(a, a + c)


def specificity(a, b, c, d) -> float:
    """Share of background predicted absent, d/(b+d); NaN without background (Allouche et al. 2006)."""
    return _ratio(d, b + d)


def tss(a, b, c, d) -> float:
    """True skill statistic, sensitivity + specificity − 1 = (ad − bc)/[(a+c)(b+d)].

    Independent of prevalence; not symmetric under swapping rows and columns.

    References
    ----------
    Allouche, O., Tsoar, A. & Kadmon, R. (2006) J. Appl. Ecol. 43: 1223–1232, eq. for TSS.
    """
    return sensitivity(a, b, c, d) + specificity(a, b, c, d) - 1.0


def kappa(a, b, c, d) -> float:
    """Cohen's kappa, (p_o − p_e)/(1 − p_e); NaN when p_e = 1 (one class only).

    References
    ----------
    Cohen, J. (1960) A coefficient of agreement for nominal scales. Educ. Psychol. Meas. 20: 37–46.
    Allouche, O., Tsoar, A. & Kadmon, R. (2006) J. Appl. Ecol. 43: 1223–1232 (formula in their notation).
    """
    n = float(a + b + c + d)
    if n <= 0:
        return float("nan")
    p_o = (a + d) / n
    p_e = ((a + b) * (a + c) + (c + d) * (d + b)) / (n * n)
    return _ratio(p_o - p_e, 1.0 - p_e)


# --------------------------------------------------------------------------- Boyce


def boyce_index(presence_scores, background_scores, *, window=None, n_windows: int = 101,
                drop_repeats: bool = True, return_curve: bool = False):
    """Continuous Boyce index: Spearman correlation of F = P/E with the suitability window.

    Windows [s, s + W] (both ends included) slide from the lowest to the highest background
    score, ``n_windows`` starts evenly spaced so the first window begins at the minimum and
    the last ends at the maximum. In each window P = share of presences inside, E = share of
    background inside and F = P/E; windows with E = 0 are left out.

    Tie policy (``drop_repeats=True``, default): when the background holds few distinct
    values, neighbouring windows can cover exactly the same records and repeat F, which
    would make Spearman ties an artefact of the step. A window that holds exactly the same
    background and presence records as the previous window is therefore dropped; windows
    with different records but equal F (e.g. runs of F = 0 at low suitability) are kept,
    as in Hirzel et al.'s definition. Set ``drop_repeats=False`` to keep every window.

    Parameters
    ----------
    presence_scores : array_like
        Suitability at the evaluation presences (the denominator of P counts all of them,
        also those outside the background range).
    background_scores : array_like
        Suitability at background cells (the "expected" distribution).
    window : float, optional
        Window width W in score units. Default: a tenth of the background score range (a
        choice of this library, not a published default).
    n_windows : int, default=101
    drop_repeats : bool, default=True
    return_curve : bool, default=False
        Also return ``(midpoints, F)`` of the windows used.

    Returns
    -------
    float in [−1, 1], or NaN when fewer than two windows remain, F is constant (e.g. a
    model no better than random, F ≡ 1) or all background scores are equal: the
    correlation is then undefined, not 0.

    References
    ----------
    Hirzel, A.H., Le Lay, G., Helfer, V., Randin, C. & Guisan, A. (2006) Evaluating the ability
    of habitat suitability models to predict species presences. Ecol. Model. 199: 142–152.
    Boyce, M.S., Vernier, P.R., Nielsen, S.E. & Schmiegelow, F.K.A. (2002) Evaluating resource
    selection functions. Ecol. Model. 157: 281–300.
    """
    p = np.sort(checked_scores(presence_scores, "presence_scores"))
    b = np.sort(checked_scores(background_scores, "background_scores"))
    n_windows = int(n_windows)
    if n_windows < 2:
        raise InputError(f"n_windows: {n_windows}; expected at least 2")
    lo, hi = float(b[0]), float(b[-1])
    span = hi - lo
    nan_result = (float("nan"), (np.empty(0), np.empty(0))) if return_curve else float("nan")
    if span == 0:
        return nan_result  # all background scores equal: no window to slide
    w = span / 10.0 if window is None else float(window)
    if not (np.isfinite(w) and 0 < w <= span):
        raise InputError(f"window: {w!r}; expected a width > 0 and at most the background score "
                         f"range {span:g}")
    starts = lo + (span - w) * np.arange(n_windows) / (n_windows - 1)
    ends = starts + w
    ends[-1] = hi  # exact, so rounding never drops the top record
    b0, b1 = np.searchsorted(b, starts, side="left"), np.searchsorted(b, ends, side="right")
    p0, p1 = np.searchsorted(p, starts, side="left"), np.searchsorted(p, ends, side="right")
    e = (b1 - b0) / b.size
    pr = (p1 - p0) / p.size
    keep = e > 0
    if drop_repeats:
        # a window holding exactly the records of the previous window adds no information
        same = np.r_[False, (b0[1:] == b0[:-1]) & (b1[1:] == b1[:-1]) & (p0[1:] == p0[:-1]) & (p1[1:] == p1[:-1])]
        keep &= ~same
    f = pr[keep] / e[keep]
    mid = (starts + ends)[keep] / 2.0
    if f.size < 2 or np.all(f == f[0]):
        return nan_result
    rho = float(stats.spearmanr(f, mid).statistic)
    return (rho, (mid, f)) if return_curve else rho


def omission_rate(test_presence_scores, threshold: float, *, inclusive: bool = True) -> float:
    """Share of (held-out) presences predicted absent at ``threshold``.

    A presence is omitted when its score is ``< threshold`` (``inclusive``, the default:
    presence means ``>=``), or ``<= threshold`` when ``inclusive=False``.

    References
    ----------
    Pearson, R.G. et al. (2007) J. Biogeogr. 34: 102–117 (omission at training-presence thresholds).
    """
    p = checked_scores(test_presence_scores, "test_presence_scores")
    t = float(threshold)
    return float(np.count_nonzero(p < t if inclusive else p <= t) / p.size)
