"""The one-standard-error rule against hand-computed cases."""

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.models.selection import one_standard_error_choice

LQ = [0.78, 0.80, 0.79, 0.81, 0.82]       # mean 0.80
LQH = [0.83, 0.85, 0.80, 0.86, 0.81]      # mean 0.83
LQHP = [0.88, 0.80, 0.86, 0.82, 0.84]     # mean 0.84; deviations +4 -4 +2 -2 0 (hundredths)


def test_hand_computed_case():
    # Analytic (by hand): LQHP has sum of squared deviations 0.0040, sample variance 0.0010,
    # SD 0.0316228, SE = SD / sqrt(5) = sqrt(0.0002) = 0.0141421; threshold 0.84 - 0.0141421 =
    # 0.8258579. LQ (0.80) is below it, LQH (0.83) above: LQH is the simplest within one SE.
    # Source: Hastie, Tibshirani & Friedman (2009) §7.10 / Breiman et al. (1984) for the rule.
    r = one_standard_error_choice([LQ, LQH, LQHP])
    assert r["best"] == 2 and r["chosen"] == 1
    assert r["se"][2] == pytest.approx(np.sqrt(0.0002), abs=1e-12)
    assert r["threshold"] == pytest.approx(0.84 - np.sqrt(0.0002), abs=1e-12)
    assert r["mean"] == pytest.approx([0.80, 0.83, 0.84], abs=1e-12)


def test_just_outside_one_se_keeps_the_best():
    # Analytic (by hand): with LQH at mean 0.825 < 0.8258579 no simpler set qualifies
    lqh = [0.825, 0.845, 0.795, 0.855, 0.805]
    assert one_standard_error_choice([LQ, lqh, LQHP])["chosen"] == 2


def test_simplest_wins_ties_and_single_fold():
    # Analytic: equal means -> the first (simplest) is "best" and chosen; one fold -> SE taken as 0
    assert one_standard_error_choice([[0.8, 0.9], [0.9, 0.8]])["chosen"] == 0
    r = one_standard_error_choice([[0.80], [0.81]])
    assert r["se"] == [0.0, 0.0] and r["chosen"] == 1


def test_bad_input():
    # Common practice, no source: unequal fold counts or NaN are refused, naming the argument
    with pytest.raises(InputError, match="fold_scores"):
        one_standard_error_choice([[0.8, 0.9], [0.9]])
    with pytest.raises(InputError, match="fold_scores"):
        one_standard_error_choice([[0.8, np.nan]])
    with pytest.raises(InputError, match="fold_scores"):
        one_standard_error_choice([])
