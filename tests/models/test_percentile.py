"""PercentileEnvelope on hand cases (Nix 1986; Busby 1991)."""

import numpy as np
import pytest

from envelope.models import PercentileEnvelope


def _fit(ties="mid"):
    # presences 1..5 on variable a, 10..50 on b; one background row that must be ignored
    X = np.array([[1, 10], [2, 20], [3, 30], [4, 40], [5, 50], [100, 100]], dtype=float)
    y = np.array([1, 1, 1, 1, 1, 0])
    return PercentileEnvelope(ties=ties).fit(X, y)


def test_hand_case_median_range_and_minimum():
    # Source: hand computation of s = 2 min(F, 1 - F) with the mid-distribution ECDF
    m = _fit()
    s = m.predict_proba(np.array([[3, 30], [3, 20], [2, 30], [0.5, 30], [3, 55], [1, 50]], dtype=float))[:, 1]
    # median on both -> 1; F_b(20) = 1.5/5 -> 0.6; outside the range -> 0; extremes -> 2 * 0.5/5 = 0.2
    np.testing.assert_allclose(s, [1.0, 0.6, 0.6, 0.0, 0.0, 0.2])
    np.testing.assert_array_equal(m.predict(np.array([[3, 30], [3, 20]], dtype=float)), [1, 1])
    np.testing.assert_array_equal(m.predict(np.array([[1, 10]], dtype=float)), [0])


def test_right_continuous_convention():
    # Source: hand computation with F(x) = #(values <= x)/n: F(3) = 0.6 -> 0.8, F(5) = 1 -> 0
    m = _fit(ties="right")
    s = m.predict_proba(np.array([[3, 30], [5, 50], [2.5, 25]], dtype=float))[:, 1]
    np.testing.assert_allclose(s, [0.8, 0.0, 0.8])


def test_background_is_ignored():
    # Common practice, no source: the envelope uses presences only
    m1 = _fit()
    X = np.array([[1, 10], [2, 20], [3, 30], [4, 40], [5, 50], [-7, 3], [8, 9]], dtype=float)
    m2 = PercentileEnvelope().fit(X, np.array([1, 1, 1, 1, 1, 0, 0]))
    grid = np.random.default_rng(0).uniform(0, 60, size=(50, 2))
    np.testing.assert_array_equal(m1.predict_proba(grid), m2.predict_proba(grid))


def test_bad_ties():
    # Common practice, no source
    with pytest.raises(ValueError, match="ties"):
        PercentileEnvelope(ties="left").fit(np.ones((2, 1)), [0, 1])
