"""Tests of the fast point-process prediction kernel against the estimator's own predict_proba."""

import numpy as np
import pytest

from envelope.kernels.predict import (compile_pointprocess, linear_predictor_table, predict_cells,
                                      suitability_table)
from envelope.models import PercentileEnvelope, PointProcessModel


def _fit(classes, p=3, seed=0, n_knots=6):
    rng = np.random.default_rng(seed)
    X = np.r_[rng.normal(0.6, 0.7, (150, p)), rng.normal(0.0, 1.0, (1500, p))]
    X[:, -1] = X[:, -1] * 40.0 + 500.0  # one variable on a precipitation-like scale
    y = np.r_[np.ones(150), np.zeros(1500)]
    model = PointProcessModel(classes=classes, n_knots=n_knots, C=20.0).fit(X, y)
    return model, X


def _table(model):
    ex = model.expander_
    return compile_pointprocess(ex.mean_, ex.scale_, ex.knots_, ex.classes_used_, model.coef_,
                                model.intercept_ + model.offset_)


@pytest.mark.parametrize("classes", [("linear",), ("linear", "quadratic"), ("hinge",),
                                     ("linear", "product"), ("linear", "quadratic", "hinge"),
                                     ("linear", "quadratic", "product", "hinge"), "cv"])
def test_table_equals_predict_proba(classes):
    # Source: the estimator's own predict_proba (scikit-learn-based reference implementation)
    model, X = _fit(classes)
    rng = np.random.default_rng(5)
    cells = np.r_[X, X + rng.normal(0, 0.5, X.shape)]  # inside and around the training range
    expected = model.predict_proba(cells)[:, 1]
    got = suitability_table(_table(model), cells.T, block_cells=257)
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-10)


def test_table_exact_at_knots():
    # Source: predict_proba again; z exactly at a knot is where segment choice could slip
    model, X = _fit(("hinge",), p=2)
    ex = model.expander_
    k = ex.knots_[0]
    cells = np.tile(np.median(X, axis=0), (k.size, 1))
    cells[:, 0] = k * ex.scale_[0] + ex.mean_[0]
    np.testing.assert_allclose(suitability_table(_table(model), cells.T),
                               model.predict_proba(cells)[:, 1], rtol=0, atol=1e-10)


def test_linear_predictor_matches_eta():
    # Source: the model's decision_function = eta - log(ln 2) (documented identity)
    model, X = _fit(("linear", "quadratic", "hinge"))
    eta = linear_predictor_table(_table(model), X.T)
    np.testing.assert_allclose(eta - np.log(np.log(2.0)), model.decision_function(X), atol=1e-10)


def test_clamping_gives_boundary_prediction():
    # Common practice, no source: clamping = prediction at the nearest training bound
    model, X = _fit(("linear", "quadratic", "hinge"))
    lower, upper = X.min(axis=0), X.max(axis=0)
    far = np.array([lower - 10.0, upper + 10.0])
    boundary = np.array([lower, upper])
    got = suitability_table(_table(model), far.T, lower=lower, upper=upper)
    np.testing.assert_allclose(got, model.predict_proba(boundary)[:, 1], atol=1e-10)
    unclamped = suitability_table(_table(model), far.T)
    assert not np.allclose(unclamped, got)


def test_nan_cells_stay_nan():
    # Common practice, no source: a cell missing any variable has no prediction
    model, X = _fit(("linear", "quadratic", "product", "hinge"))
    cells = X[:6].T.copy()
    cells[1, 2] = np.nan
    cells[0, 4] = np.nan
    out = suitability_table(_table(model), cells, lower=X.min(0), upper=X.max(0))
    assert np.isnan(out[[2, 4]]).all()
    keep = [0, 1, 3, 5]
    np.testing.assert_allclose(out[keep], model.predict_proba(X[keep])[:, 1], atol=1e-10)


def test_predict_cells_generic_batches():
    # Source: the estimator's own predict_proba on the same rows
    rng = np.random.default_rng(2)
    X = np.r_[rng.normal(0.5, 0.5, (60, 2)), rng.normal(0, 1, (300, 2))]
    y = np.r_[np.ones(60), np.zeros(300)]
    env = PercentileEnvelope().fit(X, y)
    cells = X.T.copy()
    cells[0, 7] = np.nan
    out = predict_cells(env.predict_proba, cells, batch_cells=50)
    ok = np.isfinite(cells).all(axis=0)
    np.testing.assert_array_equal(out[ok], env.predict_proba(X[ok])[:, 1])
    assert np.isnan(out[7])


def test_bad_shapes_refused():
    # Common practice, no source: coefficient count must match the feature classes
    with pytest.raises(ValueError, match="coef has 3 entries"):
        compile_pointprocess([0, 0], [1, 1], [[], []], ("linear",), [1.0, 2.0, 3.0], 0.0)
    model, X = _fit(("linear",))
    with pytest.raises(ValueError, match="expected \\(3, n_cells\\)"):
        linear_predictor_table(_table(model), X)


# --------------------------------------------------------------------------- fast evaluation paths


def _direct_eta(mean, scale, knots, classes, coef, constant, X):
    """Slow, obvious reference: build every feature column from its definition and sum."""
    Z = (np.asarray(X, dtype=np.float64) - mean) / scale  # (cells, p)
    cols = []
    for cls in classes:
        if cls == "linear":
            cols += [Z[:, j] for j in range(Z.shape[1])]
        elif cls == "quadratic":
            cols += [Z[:, j] ** 2 for j in range(Z.shape[1])]
        elif cls == "product":
            i, j = np.triu_indices(Z.shape[1], k=1)
            cols += [Z[:, a] * Z[:, b] for a, b in zip(i, j)]
        elif cls == "hinge":
            for j, kk in enumerate(knots):
                cols += [np.maximum(0.0, Z[:, j] - k) for k in kk] + [np.maximum(0.0, k - Z[:, j]) for k in kk]
    return np.column_stack(cols) @ coef + constant


@pytest.mark.parametrize("n_knots", [3, 20])  # 20 knots: beyond HINGE_SUM_MAX_KNOTS, the np.interp path
def test_table_against_direct_features(n_knots):
    # Analytic: the table is an exact rewrite of the feature sum (Phillips & Dudik 2008 features)
    from envelope.kernels.predict import HINGE_SUM_MAX_KNOTS

    rng = np.random.default_rng(11)
    p = 4
    mean, scale = rng.normal(0, 5, p), rng.uniform(0.5, 3, p)
    knots = [np.sort(rng.normal(0, 1, n_knots)) for _ in range(p)]
    classes = ("linear", "quadratic", "product", "hinge")
    n_coef = p + p + p * (p - 1) // 2 + 2 * n_knots * p
    coef = rng.normal(0, 0.3, n_coef) * (rng.uniform(size=n_coef) < 0.7)
    coef[:p] = 0.0  # a variable whose linear term is zero still counts through its other terms
    table = compile_pointprocess(mean, scale, knots, classes, coef, 0.4)
    X = mean + scale * rng.normal(0, 1.5, (3000, p))
    X[5] = mean + scale * knots[0][0] * np.ones(p)  # exactly at a knot
    expected = _direct_eta(mean, scale, knots, classes, coef, 0.4, X)
    got = linear_predictor_table(table, X.T, block_cells=701)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-10)
    if n_knots > HINGE_SUM_MAX_KNOTS:
        from envelope.kernels.predict import _plan

        assert max(t.knots.size for t in _plan(table).terms) > HINGE_SUM_MAX_KNOTS


def test_float32_cells_give_float64_sums():
    # Source: predict_proba on the same values widened to float64 (grids arrive as float32)
    model, X = _fit(("linear", "quadratic", "product", "hinge"))
    cells32 = X.T.astype(np.float32)
    got = suitability_table(_table(model), cells32)
    np.testing.assert_allclose(got, model.predict_proba(cells32.T.astype(np.float64))[:, 1], rtol=0, atol=1e-10)


def test_unused_variable_is_skipped_but_keeps_nan():
    # Common practice, no source: the valid area does not depend on which variables the model uses
    from envelope.kernels.predict import _plan

    coef = np.array([0.8, 0.0, -0.5])  # variable 1 has no term
    table = compile_pointprocess([0, 0, 0], [1, 1, 1], [[], [], []], ("linear",), coef, 0.1)
    assert [t.index for t in _plan(table).terms] == [0, 2]
    cells = np.array([[1.0, 2.0, 3.0], [5.0, np.nan, 7.0], [0.5, 0.5, np.inf * 0]])
    eta = linear_predictor_table(table, cells)
    # Analytic: eta = 0.1 + 0.8 x0 - 0.5 x2 where every variable is present
    assert eta[0] == pytest.approx(0.1 + 0.8 * 1.0 - 0.5 * 0.5)
    assert np.isnan(eta[1]) and np.isnan(eta[2])
