"""AUC, ROC, confusion-matrix scores and the continuous Boyce index against published and library values."""

import numpy as np
import pytest
from sklearn.metrics import balanced_accuracy_score, cohen_kappa_score, roc_auc_score, roc_curve

from envelope.errors import InputError
from envelope.kernels.metrics import (
    auc,
    auc_se_hanley_mcneil,
    boyce_index,
    confusion,
    hanley_mcneil_q,
    kappa,
    omission_rate,
    roc_points,
    sensitivity,
    specificity,
    tss,
)

# Hanley & McNeil (1982) Table I: 5-point ratings of 58 normal and 51 abnormal CT images
RATINGS = np.arange(1, 6)
NORMAL = np.repeat(RATINGS, [33, 6, 6, 11, 2])
ABNORMAL = np.repeat(RATINGS, [3, 2, 2, 11, 33])


def test_auc_hanley_mcneil_table_one():
    # Source: REFERENCES item 1 — AUC = 2642/2958 = 1321/1479 exactly (Hanley & McNeil 1982, Table I).
    assert auc(ABNORMAL, NORMAL) == pytest.approx(1321 / 1479, abs=1e-12)
    # Source: REFERENCES item 1 — reversing the score direction gives 0.1068289385.
    assert auc(-ABNORMAL, -NORMAL) == pytest.approx(1 - 1321 / 1479, abs=1e-12)
    assert auc(NORMAL, ABNORMAL) == pytest.approx(0.1068289385, abs=1e-10)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_auc_matches_sklearn_with_ties(seed):
    # Source: scikit-learn roc_auc_score (trapezoidal ROC area, equal to Mann–Whitney with ties ½).
    rng = np.random.default_rng(seed)
    p = rng.integers(0, 8, size=137) / 7.0
    b = rng.integers(0, 6, size=411) / 7.0
    y = np.r_[np.ones(p.size), np.zeros(b.size)]
    assert auc(p, b) == pytest.approx(roc_auc_score(y, np.r_[p, b]), abs=1e-12)


def test_roc_points_hanley_mcneil():
    # Source: REFERENCES item 1 — empirical (FPR, TPR) at cutoffs >=5, >=4, >=3, >=2, >=1.
    fpr, tpr, thr = roc_points(ABNORMAL, NORMAL)
    np.testing.assert_allclose(fpr[1:], [2 / 58, 13 / 58, 19 / 58, 25 / 58, 1.0], atol=1e-12)
    np.testing.assert_allclose(tpr[1:], [33 / 51, 44 / 51, 46 / 51, 48 / 51, 1.0], atol=1e-12)
    np.testing.assert_allclose(fpr[1:], [0.0345, 0.2241, 0.3276, 0.4310, 1], atol=5e-5)
    np.testing.assert_allclose(tpr[1:], [0.6471, 0.8627, 0.9020, 0.9412, 1], atol=5e-5)
    assert (fpr[0], tpr[0], thr[0]) == (0.0, 0.0, np.inf)
    np.testing.assert_array_equal(thr[1:], [5, 4, 3, 2, 1])
    # Source: scikit-learn roc_curve (same >= convention), all intermediate points kept.
    sk_fpr, sk_tpr, _ = roc_curve(np.r_[np.ones(51), np.zeros(58)], np.r_[ABNORMAL, NORMAL],
                                  drop_intermediate=False)
    np.testing.assert_allclose(fpr, sk_fpr, atol=1e-12)
    np.testing.assert_allclose(tpr, sk_tpr, atol=1e-12)
    # Source: REFERENCES item 1 — trapezoidal area of these points equals the AUC.
    assert np.trapezoid(tpr, fpr) == pytest.approx(1321 / 1479, abs=1e-12)


def test_hanley_mcneil_standard_errors():
    a = auc(ABNORMAL, NORMAL)
    q1, q2 = hanley_mcneil_q(ABNORMAL, NORMAL)
    # Source: REFERENCES item 1 (COMPUTED) — exact Q1 = 0.8182043, Q2 = 0.8312505 from the table.
    assert q1 == pytest.approx(0.8182043, abs=5e-7)
    assert q2 == pytest.approx(0.8312505, abs=5e-7)
    # Source: REFERENCES item 1 (COMPUTED) — SE 0.0319904 (exact Q) and 0.0324866 (approximate Q).
    assert auc_se_hanley_mcneil(a, 51, 58, exact_q=(q1, q2)) == pytest.approx(0.0319904, abs=5e-5)
    assert auc_se_hanley_mcneil(a, 51, 58) == pytest.approx(0.0324866, abs=5e-5)
    # Source: Hanley & McNeil (1982) as quoted in REFERENCES item 1 — published SE = 0.032.
    assert round(auc_se_hanley_mcneil(a, 51, 58), 3) == 0.032


def test_confusion_layout_and_threshold_convention():
    # Source: REFERENCES item 1 — at cutoff ">= 4" sensitivity = 44/51, specificity = 45/58.
    a, b, c, d = confusion(ABNORMAL, NORMAL, 4)
    assert (a, b, c, d) == (44, 13, 7, 45)
    assert sensitivity(a, b, c, d) == pytest.approx(44 / 51, abs=1e-12)
    assert specificity(a, b, c, d) == pytest.approx(45 / 58, abs=1e-12)
    # Common practice, no source: with ">" a score equal to the threshold is predicted absent.
    assert confusion(ABNORMAL, NORMAL, 4, inclusive=False) == (33, 2, 18, 56)


ALLOUCHE_ROWS = [
    # Source: REFERENCES item 2 (COMPUTED; Allouche et al. 2006 formulas): (a,b,c,d), sens, spec, TSS, kappa
    ((20, 5, 10, 15), 2 / 3, 0.75, 5 / 12, 0.4),
    ((20, 10, 5, 15), 0.8, 0.6, 0.4, 0.4),
    ((40, 10, 5, 45), 8 / 9, 9 / 11, 0.707070707070707, 0.7),
    ((90, 60, 10, 840), 0.9, 14 / 15, 5 / 6, 0.6818181818181818),
    ((675, 50, 75, 700), 0.9, 14 / 15, 5 / 6, 5 / 6),
]


@pytest.mark.parametrize("cells,sens,spec,tss_value,kappa_value", ALLOUCHE_ROWS)
def test_tss_and_kappa_allouche_table(cells, sens, spec, tss_value, kappa_value):
    assert sensitivity(*cells) == pytest.approx(sens, abs=1e-12)
    assert specificity(*cells) == pytest.approx(spec, abs=1e-12)
    assert tss(*cells) == pytest.approx(tss_value, abs=1e-12)
    assert kappa(*cells) == pytest.approx(kappa_value, abs=1e-12)
    # Source: scikit-learn cohen_kappa_score and balanced_accuracy_score(adjusted=True) (= TSS, binary).
    a, b, c, d = cells
    observed = np.r_[np.ones(a), np.zeros(b), np.ones(c), np.zeros(d)]
    predicted = np.r_[np.ones(a), np.ones(b), np.zeros(c), np.zeros(d)]
    assert kappa(*cells) == pytest.approx(cohen_kappa_score(observed, predicted), abs=1e-12)
    assert tss(*cells) == pytest.approx(balanced_accuracy_score(observed, predicted, adjusted=True), abs=1e-12)


def test_orientation_and_prevalence():
    # Source: REFERENCES item 2 — kappa is symmetric under transposition, TSS is not.
    assert kappa(20, 5, 10, 15) == pytest.approx(kappa(20, 10, 5, 15), abs=1e-12)
    assert tss(20, 5, 10, 15) - tss(20, 10, 5, 15) == pytest.approx(5 / 12 - 0.4, abs=1e-12)
    # Source: REFERENCES item 2 / Allouche et al. (2006) — same sens & spec, prevalence 0.1 vs 0.5:
    # TSS unchanged, kappa drops from 0.8333 to 0.6818.
    assert tss(90, 60, 10, 840) == pytest.approx(tss(675, 50, 75, 700), abs=1e-12)
    assert kappa(90, 60, 10, 840) < kappa(675, 50, 75, 700) - 0.15


def test_kappa_textbook_example():
    # Source: REFERENCES item 2 (CONFIRMED tutorial example): [[20, 5], [10, 15]], p_o = .7, p_e = .5, kappa = .4.
    assert kappa(20, 5, 10, 15) == pytest.approx((0.70 - 0.50) / (1 - 0.50), abs=1e-12)


def test_degenerate_tables_are_nan_not_zero():
    # Common practice, no source: a ratio with an empty denominator is undefined.
    assert np.isnan(sensitivity(0, 3, 0, 4))
    assert np.isnan(kappa(5, 0, 0, 0))


# --------------------------------------------------------------------------- Boyce

FINE = (np.arange(10_000) + 0.5) / 10_000  # REFERENCES item 3 background
COARSE = (np.arange(100) + 0.5) / 100  # REFERENCES item 3 tie-trap background


def test_boyce_rising_density_is_plus_one():
    # Source: REFERENCES item 3 (COMPUTED) — k_i = floor(i/100) presences per cell, W = 0.1, 101 windows:
    # Boyce = +1, first/last F = 0.0910 / 1.9090.
    pres = np.repeat(FINE, np.arange(10_000) // 100)
    rho, (mid, f) = boyce_index(pres, FINE, window=0.1, n_windows=101, return_curve=True)
    assert rho == pytest.approx(1.0, abs=1e-12)
    assert f.size == 101
    assert f[0] == pytest.approx(0.0910, abs=5e-4) and f[-1] == pytest.approx(1.9090, abs=5e-4)
    # Source: REFERENCES item 3 — analytic limit F(m) = 2m for presence density 2s.
    np.testing.assert_allclose(f, 2 * mid, atol=0.02)


def test_boyce_falling_density_is_minus_one():
    # Source: REFERENCES item 3 (COMPUTED) — reversed k_i = floor((9999 - i)/100): Boyce = -1.
    pres = np.repeat(FINE, (9999 - np.arange(10_000)) // 100)
    assert boyce_index(pres, FINE, window=0.1, n_windows=101) == pytest.approx(-1.0, abs=1e-12)


def test_boyce_random_model_is_nan():
    # Source: REFERENCES item 3 — presences distributed like the background give F = 1: undefined, NaN (not 0).
    assert np.isnan(boyce_index(FINE, FINE, window=0.1, n_windows=101))
    assert np.isnan(boyce_index(FINE, FINE, window=0.1, n_windows=101, drop_repeats=False))


def test_boyce_tie_trap_and_repeat_policy():
    pres = np.repeat(COARSE, np.arange(100))
    # Source: REFERENCES item 3 — 100 distinct background values and a step (0.0089) below their spacing
    # repeat F in neighbouring windows; keeping every window gives 0.99997 instead of 1.
    assert boyce_index(pres, COARSE, window=0.1, n_windows=101, drop_repeats=False) == pytest.approx(0.99997, abs=1e-5)
    # Documented policy (drop_repeats=True, default): a window holding exactly the records of the
    # previous one is dropped, so the strictly rising F curve scores exactly 1.  Common practice, no source.
    assert boyce_index(pres, COARSE, window=0.1, n_windows=101) == pytest.approx(1.0, abs=1e-12)
    _, (mid, f) = boyce_index(pres, COARSE, window=0.1, n_windows=101, return_curve=True)
    assert np.all(np.diff(f) != 0) and f.size < 101


def test_boyce_hump_is_near_zero():
    # Source: REFERENCES item 3 — hump-shaped presences give about 0.034 (sanity check, not a reference value).
    pres = np.repeat(COARSE, 50 - np.abs(np.arange(100) - 50))
    assert abs(boyce_index(pres, COARSE, window=0.1, n_windows=101, drop_repeats=False)) < 0.1


def test_boyce_bad_window():
    # Common practice, no source: a window wider than the score range has nothing to slide over.
    with pytest.raises(InputError, match="window"):
        boyce_index(FINE, FINE, window=2.0)


def test_omission_rate_convention():
    # Common practice, no source: omitted = predicted absent, i.e. score < t under ">=".
    scores = [0.1, 0.2, 0.3, 0.4]
    assert omission_rate(scores, 0.3) == 0.5
    assert omission_rate(scores, 0.3, inclusive=False) == 0.75


def test_bad_input():
    # Common practice, no source: empty or NaN scores are refused with the argument named.
    with pytest.raises(InputError, match="presence_scores: no values"):
        auc([], [0.1, 0.2])
    with pytest.raises(InputError, match="background_scores: 1 non-finite"):
        auc([0.5], [0.1, np.nan])
    with pytest.raises(InputError, match="presence_scores"):
        boyce_index([], FINE)


def test_boyce_keeps_distinct_windows_with_equal_f():
    # Source: Hirzel et al. (2006) definition -- every window position counts; a run of F = 0 at
    # low suitability (no presences there) is real information, not a tie artefact.
    rng = np.random.default_rng(5)
    bg = rng.uniform(0, 1, 5000)
    pres = rng.uniform(0.5, 1, 300) ** 0.5
    kept = boyce_index(pres, bg, window=0.1, n_windows=101)
    every = boyce_index(pres, bg, window=0.1, n_windows=101, drop_repeats=False)
    assert kept == pytest.approx(every, abs=1e-12)  # fine background: no window repeats its records
