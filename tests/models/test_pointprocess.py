"""PointProcessModel: Fithian & Hastie (2013) convergence to the Poisson point process, a simulated niche."""

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.exceptions import ConvergenceWarning
from sklearn.metrics import roc_auc_score

from envelope.errors import InputError
from envelope.models import PointProcessModel, response_curves

# Source: REFERENCES.md item 9 (Fithian & Hastie 2013; values COMPUTED with statsmodels)
PRESENCES = np.array([0.10, 0.35, 0.50, 0.62, 0.70, 0.78, 0.85, 0.90, 0.93, 0.97])
QUADRATURE = (np.arange(1000) + 0.5) / 1000
BETA_IPP = 2.1990261
ALPHA_IPP = 1.0091318


def _linear_ipp_fit(W):
    """Unpenalised, raw-scale linear-feature fit; total background weight W * n."""
    X = np.r_[PRESENCES, QUADRATURE][:, None]
    y = np.r_[np.ones(10), np.zeros(1000)]
    return PointProcessModel(classes=("linear",), standardize=False, C=np.inf,
                             background_weight=W * 10 / 1000).fit(X, y)


def test_berman_turner_reference_matches_item_9():
    # Source: REFERENCES.md item 9, Berman–Turner Poisson GLM via statsmodels (1.0091319, 2.1990259)
    z = np.r_[np.ones(10), np.zeros(1000)]
    w = np.r_[np.full(10, 1e-8), np.full(1000, 1e-3)]
    x = np.r_[PRESENCES, QUADRATURE]
    glm = sm.GLM(z / w, sm.add_constant(x), family=sm.families.Poisson(), var_weights=w).fit(tol=1e-12)
    alpha, beta = glm.params
    assert abs(beta - BETA_IPP) < 1e-5 and abs(alpha - ALPHA_IPP) < 1e-5
    # the estimator at W = 1e6 agrees with this GLM
    m = _linear_ipp_fit(1e6)
    assert abs(m.coef_[0] - beta) < 1e-5
    assert abs(m.intercept_ + np.log(1e6 * 10) - alpha) < 1e-5


def test_weighted_logistic_converges_to_ipp():
    # Source: REFERENCES.md item 9 table (W, beta) and Fithian & Hastie (2013)
    table = {1: (2.128166, 1.050479), 10: (2.188720, 1.015121), 100: (2.197978, 1.009740),
             1e3: (2.198921, 1.009193), 1e4: (2.199016, 1.009138), 1e6: (2.199026, 1.009132)}
    gaps = []
    for W, (beta, alpha_shifted) in table.items():
        m = _linear_ipp_fit(W)
        assert m.coef_[0] == pytest.approx(beta, abs=2e-6)
        assert m.intercept_ + np.log(W * 10) == pytest.approx(alpha_shifted, abs=2e-6)
        assert m.total_background_weight_ == pytest.approx(W * 10)
        gaps.append(abs(m.coef_[0] - BETA_IPP))
    assert all(a > b for a, b in zip(gaps, gaps[1:]))  # monotone towards the IPP slope
    assert gaps[-1] < 1e-5


def test_moment_matching_and_log_intensity():
    # Source: REFERENCES.md item 9 corollary (i): fitted Gibbs density reproduces the presence mean 0.67
    m = _linear_ipp_fit(1e6)
    lam = np.exp(m.log_intensity(QUADRATURE[:, None]))
    assert np.sum(lam * QUADRATURE) / np.sum(lam) == pytest.approx(0.67, abs=1e-6)
    # Analytic: with quadrature weight 1/1000 the IPP intensity integrates to n = 10
    assert np.sum(lam) / 1000 == pytest.approx(10.0, rel=1e-5)
    # Analytic: eta = log(lambda / n) under the documented offset, so exp(eta) averages 1
    eta = m.decision_function(QUADRATURE[:, None]) + np.log(np.log(2.0))
    assert np.mean(np.exp(eta)) == pytest.approx(1.0, rel=1e-9)


def _virtual_species(seed=0, n_cells=20000, n_presence=300, n_background=5000):
    # Analytic: known simulated niche, Gaussian response in two variables
    rng = np.random.default_rng(seed)
    cells = rng.uniform(-3, 3, size=(n_cells, 2))
    p_true = np.exp(-((cells[:, 0] - 0.8) ** 2) / 0.8 - ((cells[:, 1] + 0.5) ** 2) / 1.5)
    occupied = rng.random(n_cells) < p_true
    presences = cells[rng.choice(np.flatnonzero(occupied), n_presence, replace=False)]
    background = cells[rng.choice(n_cells, n_background, replace=False)]
    X = np.r_[presences, background]
    y = np.r_[np.ones(n_presence), np.zeros(n_background)]
    return X, y, cells, occupied


def test_virtual_species_auc():
    # Analytic: known simulated niche; AUC of suitability against true presence/absence
    X, y, cells, occupied = _virtual_species()
    m = PointProcessModel(random_state=0).fit(X, y)
    assert roc_auc_score(occupied, m.predict_proba(cells)[:, 1]) >= 0.85
    s = m.predict_proba(cells)[:, 1]
    assert s.min() >= 0 and s.max() <= 1
    # response curve peaks near the true optimum 0.8 of variable a
    curves = response_curves(m, X[y == 0], ["a", "b"], n_points=61)
    assert abs(curves["a"]["value"][np.argmax(curves["a"]["suitability"])] - 0.8) < 0.5


def test_cv_choice_of_C_with_groups():
    # Common practice, no source: C="cv" picks the grid value with the best held-out AUC
    X, y, _, _ = _virtual_species(n_presence=150, n_background=1500)
    groups = (X[:, 0] > 0).astype(int) * 2 + (X[:, 1] > 0).astype(int)
    m = PointProcessModel(C="cv", Cs=[0.5, 5.0, 50.0], random_state=0).fit(X, y, groups=groups)
    res = m.cv_results_
    assert m.C_ == res["C"][int(np.argmax(res["mean_auc"]))]
    assert len(res["fold_auc"]) == 4  # one row per spatial group with both kinds of row
    # Analytic: at C = 0.5 the L1 penalty removes every slope, so the ranking is random (AUC 0.5)
    assert res["mean_auc"][0] == pytest.approx(0.5)
    assert max(res["mean_auc"]) > 0.8


def test_elasticnet_and_errors():
    # Common practice, no source: parameter and input errors name the key
    X, y, _, _ = _virtual_species(n_presence=60, n_background=600)
    m = PointProcessModel(penalty="elasticnet", l1_ratio=0.5, random_state=0).fit(X, y)
    assert np.isfinite(m.coef_).all()
    with pytest.raises(InputError, match="penalty"):
        PointProcessModel(penalty="l3").fit(X, y)
    with pytest.raises(ValueError, match="NaN"):
        m.predict_proba(np.array([[np.nan, 0.0]]))
    with pytest.raises(ValueError, match="2 features"):
        m.predict_proba(np.zeros((1, 3)))
    with pytest.raises(InputError, match="only one class"):
        PointProcessModel().fit(X[y == 1], y[y == 1])


def test_l1_fit_converges_at_benchmark_size():
    # Common practice, no source: the default L1 fit on 1 000 presences x 10 000 background x 8 variables
    # (the case timed by bench/bench_pointprocess.py) stops on its tolerance, not on the iteration cap
    rng = np.random.default_rng(0)
    P = rng.normal(size=(1000, 8)) * 0.6 + 0.5
    B = rng.normal(size=(10000, 8))
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        m = PointProcessModel(random_state=0).fit(np.r_[P, B], np.r_[np.ones(1000), np.zeros(10000)])
    assert m.n_iter_ < m.max_iter
    assert np.isfinite(m.coef_).all() and np.isfinite(m.intercept_)


def _effort_data(seed=0, n_background=2000):
    """Records of intensity exp(1.2 x) thinned by effort exp(0.8 x + z): log effort correlated with x."""
    rng = np.random.default_rng(seed)
    x_bg = rng.normal(size=n_background)
    z_bg = rng.normal(size=n_background)
    log_e_bg = 0.8 * x_bg + z_bg
    p = np.exp(1.2 * x_bg + log_e_bg)
    pick = rng.choice(n_background, 300, p=p / p.sum())
    X = np.r_[x_bg[pick], x_bg][:, None]
    y = np.r_[np.ones(300), np.zeros(n_background)]
    effort = np.exp(np.r_[log_e_bg[pick], log_e_bg])
    return X, y, effort


def test_effort_covariate_matches_poisson_glm():
    # Source: statsmodels Poisson GLM with Berman-Turner quadrature weights (as for REFERENCES.md item 9),
    # with log effort as a second column (Warton, Renner & Ramp 2013 model the records' intensity as
    # exp(alpha + beta x + gamma log effort)); at W = 1e6 the weighted logistic fit matches it.
    X, y, effort = _effort_data()
    n_b = int((y == 0).sum())
    w = np.where(y == 1, 1e-8, 1.0 / n_b)
    A = np.column_stack([np.ones(y.size), X[:, 0], np.log(effort)])
    glm = sm.GLM(y / w, A, family=sm.families.Poisson(), var_weights=w).fit(tol=1e-12)
    _, beta, gamma = glm.params
    m = PointProcessModel(classes=("linear",), standardize=False, C=np.inf,
                          background_weight=1e6 * 300 / n_b).fit(X, y, effort=effort)
    assert m.coef_[0] == pytest.approx(beta, abs=1e-4)
    assert m.effort_coef_ == pytest.approx(gamma, abs=1e-4)
    # Analytic: the simulation's truth is beta = 1.2 and gamma = 1 (records proportional to effort)
    assert beta == pytest.approx(1.2, abs=0.25) and gamma == pytest.approx(1.0, abs=0.25)
    # effort is one linear term: never expanded, never among the climate features
    assert m.coef_.shape == (1,) and list(m.feature_names_out_) == ["x0"]


def test_effort_slope_is_not_penalised():
    # Analytic: the intercept and the effort slope are unpenalised, so at the fitted climate slopes their
    # score equations (the gradient of the weighted log-likelihood) are zero, even under a strong L1
    # penalty that shrinks the climate slopes (L1 via liblinear, and elastic net via saga).
    X, y, effort = _effort_data(seed=1)
    for kw in ({"penalty": "l1", "C": 2.0}, {"penalty": "elasticnet", "C": 2.0}):
        m = PointProcessModel(classes=("linear", "quadratic", "hinge"), n_knots=4, random_state=0, **kw)
        m.fit(X, y, effort=effort)
        lp = m.linear_predictor(X, effort=effort)
        weights = np.where(y == 1, 1.0, m.background_weight_)
        resid = weights * (1.0 / (1.0 + np.exp(-lp)) - y)
        scale = weights.sum()
        assert abs(resid.sum()) / scale < 1e-8
        assert abs(resid @ np.log(effort)) / scale < 1e-8
        if kw["penalty"] == "l1":
            assert (m.coef_ == 0).any()  # the penalty is active on the climate features


def test_effort_reference_sets_log_intensity_not_suitability():
    # Analytic: prediction at a common effort e_ref adds gamma * log(e_ref) to the linear predictor; the
    # cloglog suitability is rescaled to the background mean by the offset, so it does not depend on e_ref.
    X, y, effort = _effort_data(seed=2)
    at_max = PointProcessModel(classes=("linear",), C=np.inf).fit(X, y, effort=effort)
    at_two = PointProcessModel(classes=("linear",), C=np.inf, effort_reference=2.0).fit(X, y, effort=effort)
    assert at_max.effort_reference_ == pytest.approx(effort.max())
    assert at_two.effort_reference_ == 2.0
    grid = np.linspace(-2, 2, 9)[:, None]
    np.testing.assert_allclose(at_max.predict_proba(grid), at_two.predict_proba(grid), rtol=1e-10)
    gamma = at_max.effort_coef_
    np.testing.assert_allclose(at_max.log_intensity(grid) - at_two.log_intensity(grid),
                               gamma * (np.log(effort.max()) - np.log(2.0)), rtol=1e-8)
    # the records' own model: effort as observed instead of the reference
    lp_observed = at_max.linear_predictor(X[:3], effort=effort[:3])
    np.testing.assert_allclose(lp_observed - at_max.linear_predictor(X[:3]),
                               gamma * (np.log(effort[:3]) - np.log(effort.max())), rtol=1e-8)


def test_effort_errors_name_the_parameter():
    # Common practice, no source
    X, y, effort = _effort_data()
    bad = effort.copy()
    bad[[0, 5]] = [0.0, np.nan]
    with pytest.raises(InputError, match="effort: 2 values are not positive finite numbers"):
        PointProcessModel(C=np.inf).fit(X, y, effort=bad)
    with pytest.raises(InputError, match="effort: got 3 values; expected 2300"):
        PointProcessModel(C=np.inf).fit(X, y, effort=effort[:3])
    with pytest.raises(InputError, match="effort_reference: got 'min'"):
        PointProcessModel(effort_reference="min").fit(X, y, effort=effort)
    plain = PointProcessModel(classes=("linear",), C=np.inf).fit(X, y)
    assert plain.effort_coef_ is None and plain.effort_term_ == 0.0
    with pytest.raises(InputError, match="effort: given, but the model was fitted without effort"):
        plain.linear_predictor(X[:2], effort=effort[:2])


# --------------------------------------------------------------------------- feature classes by CV

def _ipp_species(log_intensity, seed=0, n_cells=20000, n_presence=200, n_background=1500):
    """Presences drawn with probability proportional to exp(log_intensity) (an IPP), uniform background."""
    rng = np.random.default_rng(seed)
    cells = rng.uniform(-2, 2, size=(n_cells, 2))
    eta = log_intensity(cells)
    p = np.exp(eta - eta.max())
    presences = cells[rng.choice(n_cells, n_presence, replace=False, p=p / p.sum())]
    background = cells[rng.choice(n_cells, n_background, replace=False)]
    X = np.r_[presences, background]
    y = np.r_[np.ones(n_presence), np.zeros(n_background)]
    return X, y, rng.integers(0, 5, y.size)


def _choose(log_intensity):
    X, y, groups = _ipp_species(log_intensity)
    return PointProcessModel(classes="cv", C="cv", Cs=[3.0, 30.0, 300.0], random_state=0).fit(X, y, groups=groups)


def test_cv_keeps_linear_quadratic_for_a_log_linear_truth():
    # Analytic: log-intensity 1.5 a - 0.8 b is exactly representable by the linear features, so the
    # richer sets cannot beat linear + quadratic by more than one standard error (one-SE rule:
    # Hastie, Tibshirani & Friedman 2009 §7.10).
    m = _choose(lambda c: 1.5 * c[:, 0] - 0.8 * c[:, 1])
    fs = m.feature_selection_
    assert fs["chosen"] == ["linear", "quadratic"] and fs["rule"] == "one-standard-error"
    assert m.expander_.classes_used_ == ("linear", "quadratic")
    assert [s["classes"] for s in fs["scores"]][0] == ["linear", "quadratic"] and len(fs["scores"]) == 3


def test_cv_adds_hinges_for_a_bimodal_truth():
    # Analytic: log-intensity -3 | |a| - 1 | peaks at a = -1 and a = +1; no quadratic in a ranks
    # cells that way (a quadratic is monotone on either side of one vertex), piecewise-linear hinges can.
    fs = _choose(lambda c: -3.0 * np.abs(np.abs(c[:, 0]) - 1.0)).feature_selection_
    assert fs["chosen"] == ["linear", "quadratic", "hinge"]
    lq, lqh = fs["scores"][0], fs["scores"][1]
    assert lqh["mean_auc"] - lqh["se"] > lq["mean_auc"]


def test_cv_adds_products_for_an_interaction_truth():
    # Analytic: log-intensity 1.5 a b (a saddle) is not a sum of functions of a and of b, so only the
    # set with product features can represent it.
    fs = _choose(lambda c: 1.5 * c[:, 0] * c[:, 1]).feature_selection_
    assert fs["chosen"] == ["linear", "quadratic", "product", "hinge"]
    assert fs["best"] == fs["chosen"] and fs["threshold"] == pytest.approx(
        fs["scores"][2]["mean_auc"] - fs["scores"][2]["se"])


def test_forced_classes_skip_the_choice_and_match_given_set():
    # Common practice, no source: given classes are used as given; C is still tuned on the folds
    X, y, groups = _ipp_species(lambda c: -3.0 * np.abs(np.abs(c[:, 0]) - 1.0))
    m = PointProcessModel(classes=("quadratic", "linear"), C="cv", Cs=[3.0, 30.0], random_state=0).fit(
        X, y, groups=groups)
    assert m.feature_selection_ == {"chosen": ["linear", "quadratic"], "rule": "given", "criterion": None,
                                    "scores": []}
    assert m.expander_.classes_used_ == ("linear", "quadratic") and m.C_ in (3.0, 30.0)
    assert [s["classes"] for s in m.cv_results_["sets"]] == [["linear", "quadratic"]]
    fixed = PointProcessModel(classes="hinge", C=10.0).fit(X, y)
    assert fixed.feature_selection_["chosen"] == ["hinge"] and fixed.cv_results_ is None
    with pytest.raises(InputError, match="classes"):
        PointProcessModel(classes="cubic").fit(X, y)


def test_path_reuse_gives_the_same_choice():
    # Common practice, no source: remembering a fold's path must not change any result
    from envelope.models import pointprocess

    X, y, groups = _ipp_species(lambda c: 1.5 * c[:, 0] * c[:, 1], n_presence=120, n_background=800)
    kw = dict(classes="cv", C="cv", Cs=[3.0, 30.0], random_state=0)
    pointprocess.clear_path_cache()
    first = PointProcessModel(**kw).fit(X, y, groups=groups)
    again = PointProcessModel(**kw).fit(X, y, groups=groups)  # every fold path now comes from memory
    pointprocess.clear_path_cache()
    assert again.cv_results_ == first.cv_results_
    np.testing.assert_array_equal(again.coef_, first.coef_)


def test_early_stop_of_the_C_path_keeps_the_choice_and_repeats_exactly():
    # Common practice, no source: stopping the C path after the optimum keeps the choice of the
    # whole grid when the held-out AUC curve has one peak, and a seeded fit repeats exactly
    from envelope.models import tuning

    X, y, groups = _ipp_species(lambda c: -2.0 * c[:, 0] ** 2 + 1.0 * c[:, 1], n_presence=150, n_background=1200)
    kw = dict(classes="cv", C="cv", Cs=[0.3, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0], random_state=0)
    tuning.clear_path_cache()
    one = PointProcessModel(**kw).fit(X, y, groups=groups)
    tuning.clear_path_cache()
    again = PointProcessModel(**kw).fit(X, y, groups=groups)
    assert again.cv_results_ == one.cv_results_
    np.testing.assert_array_equal(again.coef_, one.coef_)
    tuning.clear_path_cache()
    whole = PointProcessModel(path_patience=None, **kw).fit(X, y, groups=groups)
    assert whole.C_ == one.C_ and whole.feature_selection_["chosen"] == one.feature_selection_["chosen"]
    full = np.array([s["mean_auc"] for s in whole.cv_results_["sets"]], dtype=float)
    assert np.isfinite(full).all()
    stopped = np.array([[np.nan if v is None else v for v in s["mean_auc"]] for s in one.cv_results_["sets"]])
    scored = np.isfinite(stopped)
    assert not scored.all(), "the path should stop before the weakest penalties"
    np.testing.assert_array_equal(stopped[scored], full[scored])  # the same solves where both ran
