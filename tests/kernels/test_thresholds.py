"""Threshold rules on the worked example of REFERENCES item 12 and against scikit-learn's ROC curve."""

import numpy as np
import pytest
from sklearn.metrics import roc_curve

from envelope.errors import InputError
from envelope.kernels.metrics import confusion, tss
from envelope.kernels.thresholds import (
    THRESHOLD_RULES,
    choose_threshold,
    max_sss,
    min_training_presence,
    percentile_training_presence,
)

# Source: REFERENCES item 12 (COMPUTED worked example)
P = [0.9, 0.8, 0.7, 0.6, 0.55, 0.5, 0.4, 0.35, 0.3, 0.2]
B = [0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5, 0.6, 0.02, 0.08, 0.12, 0.18, 0.22, 0.28, 0.33,
     0.38, 0.42]


def test_worked_example():
    # Source: REFERENCES item 12 — maxSSS 0.5 (sens 0.6, spec 0.9), MTP 0.2, P10 0.3 (order) / 0.29 (linear),
    # lower 0.2, higher 0.3.
    assert max_sss(P, B) == 0.5
    a, b, c, d = confusion(P, B, 0.5)
    assert (a / (a + c), d / (b + d)) == pytest.approx((0.6, 0.9), abs=1e-12)
    assert min_training_presence(P) == 0.2
    assert percentile_training_presence(P, 10) == 0.3
    assert percentile_training_presence(P, 10, method="linear") == pytest.approx(0.29, abs=1e-12)
    assert percentile_training_presence(P, 10, method="lower") == 0.2
    assert percentile_training_presence(P, 10, method="higher") == 0.3
    # Source: REFERENCES item 12 — background predicted present: 0.65 at MTP, 0.45 at P10 (order).
    assert confusion(P, B, 0.2)[1] / len(B) == pytest.approx(0.65)
    assert confusion(P, B, 0.3)[1] / len(B) == pytest.approx(0.45)


def test_max_sss_ties_take_lowest_threshold():
    # Common practice, no source (documented choice): t = 0.2 (sens 1, spec 0.5) and t = 0.8
    # (sens 0.5, spec 1) both give sens + spec = 1.5; t = 0.5 gives 1.0.
    assert max_sss([0.2, 0.8], [0.1, 0.5]) == 0.2
    assert max_sss([0.2, 0.8], [0.1, 0.5, 0.6]) == 0.8  # now 0.8 alone reaches the maximum


@pytest.mark.parametrize("seed", [0, 1])
def test_max_sss_reaches_the_roc_maximum(seed):
    # Source: scikit-learn roc_curve (">=" convention): max over thresholds of TPR - FPR (Youden's J).
    rng = np.random.default_rng(seed)
    p = rng.beta(3, 2, size=80).round(2)
    b = rng.beta(2, 3, size=300).round(2)
    fpr, tpr, _ = roc_curve(np.r_[np.ones(p.size), np.zeros(b.size)], np.r_[p, b], drop_intermediate=False)
    t = max_sss(p, b)
    assert tss(*confusion(p, b, t)) == pytest.approx(np.max(tpr - fpr), abs=1e-12)


def test_choose_threshold_rules():
    # Source: REFERENCES item 12 values through the rule names.
    assert choose_threshold("max-sss", P, B) == (0.5, "max-sss")
    assert choose_threshold("p10", P, B) == (0.3, "p10")
    assert choose_threshold("min-presence", P, B) == (0.2, "min-presence")
    assert choose_threshold(0.35, P, B) == (0.35, "fixed")
    assert choose_threshold("0.35", P, B) == (0.35, "fixed")
    assert set(THRESHOLD_RULES) == {"max-sss", "p10", "min-presence"}


def test_bad_rules():
    # Common practice, no source: unknown names list the allowed ones; fixed values outside [0, 1] are named.
    with pytest.raises(InputError, match="'kappa-max' is unknown; expected one of max-sss, p10, min-presence"):
        choose_threshold("kappa-max", P, B)
    with pytest.raises(InputError, match="1.5 is outside"):
        choose_threshold(1.5, P, B)
    with pytest.raises(InputError, match="-0.1"):
        choose_threshold("-0.1", P, B)
    with pytest.raises(InputError, match="unknown"):
        choose_threshold(True, P, B)
    with pytest.raises(InputError, match="method: 'spline'"):
        percentile_training_presence(P, 10, method="spline")
    with pytest.raises(InputError, match="q: 110"):
        percentile_training_presence(P, 110)
    with pytest.raises(InputError, match="presence_scores: no values"):
        choose_threshold("max-sss", [], B)
