"""FeatureExpander: hinge values by hand, names, standardisation, class names."""

import numpy as np
import pandas as pd
import pytest

from envelope.errors import InputError
from envelope.models.features import FeatureExpander, parse_feature_classes


def test_hinge_values_against_hand_computation():
    # Source: hinge definition max(0, x - k) / max(0, k - x) (Phillips & Dudík 2008); hand-computed
    x = np.array([[0.0], [1.0], [2.0], [3.0], [4.0]])
    fx = FeatureExpander(classes=("hinge",), n_knots=1, standardize=False).fit(x)
    # one knot at the median (probability 1/2, inverted CDF): the 3rd value, 2.0
    np.testing.assert_allclose(fx.knots_[0], [2.0])
    F = fx.transform(np.array([[-1.0], [2.0], [3.5]]))
    np.testing.assert_allclose(F, [[0.0, 3.0], [0.0, 0.0], [1.5, 0.0]])
    assert list(fx.get_feature_names_out(["bio1"])) == ["hinge(bio1>2)", "hinge(bio1<2)"]


def test_knots_are_evenly_spaced_quantiles():
    # Source: numpy.quantile(method="inverted_cdf") as the reference implementation
    rng = np.random.default_rng(1)
    x = rng.normal(size=(101, 1))
    fx = FeatureExpander(classes=("hinge",), n_knots=4, standardize=False).fit(x)
    expected = np.quantile(x[:, 0], np.arange(1, 5) / 5, method="inverted_cdf")
    np.testing.assert_allclose(fx.knots_[0], expected)


def test_standardisation_and_names_with_dataframe():
    # Source: z-score definition with the population SD (numpy.std, ddof=0)
    rng = np.random.default_rng(2)
    df = pd.DataFrame({"bio1": rng.normal(10, 3, 200), "bio12": rng.normal(800, 90, 200)})
    fx = FeatureExpander(classes=("linear", "quadratic", "product")).fit(df)
    F = fx.transform(df)
    z = (df.values - df.values.mean(axis=0)) / df.values.std(axis=0)
    np.testing.assert_allclose(F[:, :2], z, atol=1e-12)
    np.testing.assert_allclose(F[:, 2:4], z**2, atol=1e-12)
    np.testing.assert_allclose(F[:, 4], z[:, 0] * z[:, 1], atol=1e-12)
    assert list(fx.get_feature_names_out()) == ["bio1", "bio12", "bio1^2", "bio12^2", "bio1*bio12"]
    np.testing.assert_allclose(fx.mean_, df.values.mean(axis=0))


def test_transform_in_chunks_equals_whole():
    # Common practice, no source: transform must be a pure function of the fitted state
    rng = np.random.default_rng(3)
    X = rng.normal(size=(300, 3))
    fx = FeatureExpander(classes=("linear", "quadratic", "product", "hinge")).fit(X)
    whole = fx.transform(X)
    chunks = np.vstack([fx.transform(X[i:i + 70]) for i in range(0, 300, 70)])
    np.testing.assert_array_equal(whole, chunks)
    assert whole.shape[1] == len(fx.get_feature_names_out())


def test_default_classes_and_no_presence_count_rule():
    # Common practice, no source: the default classes do not depend on how many presences there are
    X = np.arange(400, dtype=float).reshape(-1, 2)
    for n in (10, 50, 150):
        y = np.r_[np.ones(n), np.zeros(200 - n)]
        assert FeatureExpander().fit(X, y).classes_used_ == ("linear", "quadratic", "hinge")
    with pytest.raises(InputError, match="classes='cv'"):
        FeatureExpander(classes="auto").fit(X)


def test_parse_feature_classes():
    # Common practice, no source: readable comma lists in the canonical column order; errors name the option
    assert parse_feature_classes("cv") == "cv"
    assert parse_feature_classes("hinge,linear, quadratic") == ("linear", "quadratic", "hinge")
    assert parse_feature_classes(["product", "linear"]) == ("linear", "product")
    for bad in ("linear,cubic", "", "linear,linear", 3):
        with pytest.raises(InputError, match="--features"):
            parse_feature_classes(bad, where="--features")


def test_nan_and_bad_class_refused():
    # Common practice, no source: NaN in X is a ValueError naming NaN
    with pytest.raises(ValueError, match="NaN"):
        FeatureExpander().fit(np.array([[1.0], [np.nan]]))
    with pytest.raises(InputError, match="feature classes"):
        FeatureExpander(classes=("cubic",)).fit(np.ones((3, 1)))
