"""Spatial blocks, fold assignment, block size from variograms and honest cross-validated metrics."""

import numpy as np
import pandas as pd
import pytest
from pyproj import Geod
from scipy import ndimage
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import balanced_accuracy_score, cohen_kappa_score, roc_auc_score, roc_curve
from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor

from envelope.errors import InputError
from envelope.evaluation import (
    assign_block_folds,
    cross_validate,
    default_block_km,
    project_km,
    random_folds,
    spatial_blocks,
)

# fictional study area in open ocean (no real land): a local equal-area projection in metres
LAEA_M = "+proj=laea +lat_0=-40 +lon_0=-140 +datum=WGS84 +units=m +no_defs"
LAEA_FT = "+proj=laea +lat_0=-40 +lon_0=-140 +datum=WGS84 +units=ft +no_defs"


def _field(n, sigma, rng):
    """Stationary Gaussian random field on an n x n km grid (periodic), unit variance.

    Gaussian-filtered white noise has correlation exp(-h^2 / (4 sigma^2)), so correlation falls
    to 0.05 at h = 2 sigma sqrt(ln 20) (its practical range). Source: analytic (convolution of
    two Gaussians of SD sigma gives SD sigma*sqrt(2)).
    """
    f = ndimage.gaussian_filter(rng.normal(size=(n, n)), sigma, mode="wrap")
    return (f - f.mean()) / f.std()


def _sample(n, size, rng):
    idx = rng.choice(n * n, size=size, replace=False)
    row, col = np.divmod(idx, n)
    return idx, (col + 0.5) * 1000.0, (row + 0.5) * 1000.0  # metres


# --------------------------------------------------------------------------- blocks


def test_projected_blocks_follow_crs_units():
    # Common practice, no source: square blocks of block_km in the CRS's own units converted to km.
    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 100_000, 500), rng.uniform(0, 60_000, 500)
    blocks = spatial_blocks(x, y, crs=LAEA_M, block_km=20)
    for b in np.unique(blocks):
        sel = blocks == b
        assert np.ptp(x[sel]) < 20_000 and np.ptp(y[sel]) < 20_000
    assert np.unique(blocks).size == 15  # 5 x 3 blocks
    # Source: pyproj unit definitions (1 international foot = 0.3048 m): same points in feet, same blocks.
    same = spatial_blocks(x / 0.3048, y / 0.3048, crs=LAEA_FT, block_km=20)
    np.testing.assert_array_equal(same, blocks)


def test_geographic_blocks_are_km_squares_on_the_ground():
    # Source: pyproj.Geod (WGS84 geodesics) as the independent distance on the ground.
    rng = np.random.default_rng(1)
    lon, lat = rng.uniform(-142, -138, 800), rng.uniform(-42, -38, 800)
    blocks = spatial_blocks(lon, lat, crs="EPSG:4326", block_km=50)
    geod = Geod(ellps="WGS84")
    worst = 0.0
    for b in np.unique(blocks):
        i = np.flatnonzero(blocks == b)
        for j in i[1:]:
            worst = max(worst, geod.inv(lon[i[0]], lat[i[0]], lon[j], lat[j])[2] / 1000.0)
    assert worst <= 50 * np.sqrt(2) * 1.01
    # the area (about 340 km x 445 km) is cut into roughly 7 x 9 blocks
    assert 50 <= np.unique(blocks).size <= 80


def test_blocks_across_the_antimeridian():
    # Common practice, no source: two points 0.2 degrees apart across +-180 lie ~17 km apart on the ground.
    xk, yk = project_km([179.9, -179.9], [-40.0, -40.0], crs="EPSG:4326")
    assert np.hypot(np.diff(xk), np.diff(yk))[0] == pytest.approx(
        Geod(ellps="WGS84").inv(179.9, -40, -179.9, -40)[2] / 1000, rel=1e-3)


# --------------------------------------------------------------------------- folds


def test_block_folds_properties():
    # Source: REFERENCES item 11 (i) — each record in exactly one fold; all records of a block share a fold.
    rng = np.random.default_rng(2)
    blocks = rng.integers(0, 60, size=3000)
    pres = rng.random(3000) < 0.1
    folds = assign_block_folds(blocks, pres, 5, seed=7)
    assert folds.shape == (3000,) and set(np.unique(folds)) == set(range(5))
    for b in np.unique(blocks):
        assert np.unique(folds[blocks == b]).size == 1
    # Source: Graham (1969) greedy bound — fold presence counts differ by at most the largest block count.
    per_fold = np.bincount(folds, weights=pres, minlength=5)
    largest_block = np.bincount(blocks, weights=pres).max()
    assert per_fold.min() > 0 and np.ptp(per_fold) <= largest_block
    # Common practice, no source: deterministic for a seed.
    np.testing.assert_array_equal(folds, assign_block_folds(blocks, pres, 5, seed=7))


def test_block_folds_errors():
    # Common practice, no source: too few presence blocks for K folds, and no presences at all.
    blocks = np.repeat(np.arange(6), 10)
    pres = np.isin(blocks, [0, 1, 2]) & (np.arange(60) % 10 == 0)
    with pytest.raises(InputError, match="only 3 block.* 5 folds.*smaller --blocks-km or fewer --folds"):
        assign_block_folds(blocks, pres, 5)
    with pytest.raises(InputError, match="no presences"):
        assign_block_folds(blocks, np.zeros(60, bool), 2)


def test_random_folds_balance():
    # Common practice, no source: fold sizes (and per-label sizes when stratified) differ by at most 1.
    folds = random_folds(103, 5, seed=0)
    assert np.ptp(np.bincount(folds)) <= 1
    labels = np.r_[np.ones(23), np.zeros(80)]
    folds = random_folds(103, 5, seed=1, stratify=labels)
    for lab in (0, 1):
        assert np.ptp(np.bincount(folds[labels == lab], minlength=5)) <= 1
    with pytest.raises(InputError, match="3 records for 5 folds"):
        random_folds(3, 5)


def _knn_cv_mse(xy, z, folds):
    errs = []
    for k in np.unique(folds):
        te = folds == k
        model = KNeighborsRegressor(n_neighbors=5).fit(xy[~te], z[~te])
        errs.append(np.mean((model.predict(xy[te]) - z[te]) ** 2))
    return float(np.mean(errs))


def test_blocked_cv_is_less_optimistic_on_autocorrelated_data():
    # Source: REFERENCES item 11 (iii) / Roberts et al. (2017) — a location-memorising model (k-NN on
    # coordinates) looks better under random CV than under blocked CV (block >= range) on a
    # Gaussian random field; on white noise both agree within Monte Carlo error.
    n, sigma = 200, 4
    r = 2 * sigma * np.sqrt(np.log(20))  # practical range, km (see _field)
    diff_field, diff_white = [], []
    for seed in range(8):
        rng = np.random.default_rng(seed)
        f = _field(n, sigma, rng)
        idx, x, y = _sample(n, 1000, rng)
        xy = np.column_stack([x, y]) / 1000.0
        blocks = spatial_blocks(x, y, crs=LAEA_M, block_km=1.5 * r)
        blocked = assign_block_folds(blocks, np.ones(x.size, bool), 5, seed=seed)
        rand = random_folds(x.size, 5, seed=seed)
        z = f.ravel()[idx]
        diff_field.append(_knn_cv_mse(xy, z, blocked) - _knn_cv_mse(xy, z, rand))
        w = rng.normal(size=x.size)
        diff_white.append(_knn_cv_mse(xy, w, blocked) - _knn_cv_mse(xy, w, rand))
    se_white = np.std(diff_white, ddof=1) / np.sqrt(len(diff_white))
    assert np.mean(diff_field) > 0.2 and min(diff_field) > 0
    assert abs(np.mean(diff_white)) < 3 * se_white + 0.01


# --------------------------------------------------------------------------- block size


@pytest.mark.parametrize("sigma", [3, 6])
def test_default_block_km_recovers_the_range(sigma):
    # Source: analytic practical range of filtered noise, 2 sigma sqrt(ln 20) (see _field); the exponential
    # fit should recover it within a factor of 2.
    n = 300
    rng = np.random.default_rng(10 + sigma)
    fields = [_field(n, sigma, rng) for _ in range(3)]
    idx, x, y = _sample(n, 1500, rng)
    values = np.column_stack([f.ravel()[idx] for f in fields])
    km, details = default_block_km(x, y, values, crs=LAEA_M, names=["t", "p", "q"])
    true_range = 2 * sigma * np.sqrt(np.log(20))
    assert true_range / 2 < km < true_range * 2
    assert details["clipped"] is None and [v["name"] for v in details["per_variable"]] == ["t", "p", "q"]
    assert details["bounds_km"][1] == pytest.approx(min(np.ptp(x), np.ptp(y)) / 1000 / 5)


def test_default_block_km_clips_white_noise():
    # Common practice, no source: no autocorrelation -> a tiny range, raised to the documented lower bound
    # (twice the median nearest-neighbour spacing).
    rng = np.random.default_rng(5)
    _, x, y = _sample(300, 1500, rng)
    km, details = default_block_km(x, y, rng.normal(size=(1500, 2)), crs=LAEA_M)
    assert details["clipped"] == "lower" and km == pytest.approx(details["bounds_km"][0])
    assert all(v["range_km"] == 0.0 for v in details["per_variable"])
    assert km < 20


# --------------------------------------------------------------------------- cross-validation


def _toy_presence_background(seed=0, n=900):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    p = 1 / (1 + np.exp(-(1.5 * X[:, 0] - X[:, 1] - 1.5)))
    y = (rng.random(n) < p).astype(int)
    return X, y


def test_memorising_model_is_scored_on_held_out_data():
    # Common practice, no source: a 1-NN classifier memorises its training data (training AUC = 1);
    # fold AUCs must come from held-out records, recomputed here with scikit-learn.
    X, y = _toy_presence_background(1)
    folds = random_folds(len(y), 4, seed=3, stratify=y)
    per_fold, summary = cross_validate(lambda: KNeighborsClassifier(n_neighbors=1), X, y, folds)
    for k, row in per_fold.set_index("fold").iterrows():
        te = folds == k
        model = KNeighborsClassifier(n_neighbors=1).fit(X[~te], y[~te])
        assert roc_auc_score(y[~te], model.predict_proba(X[~te])[:, 1]) == 1.0
        s = model.predict_proba(X[te])[:, 1]
        # Source: scikit-learn roc_auc_score and balanced_accuracy_score(adjusted=True) on held-out data.
        assert row["auc"] == pytest.approx(roc_auc_score(y[te], s), abs=1e-12)
        assert row["threshold"] == 1.0  # training scores are exactly 0/1
        assert row["tss"] == pytest.approx(balanced_accuracy_score(y[te], s >= 1.0, adjusted=True), abs=1e-12)
        assert row["n_test_presence"] + row["n_test_background"] == te.sum()
    assert summary["auc_mean"] < 0.9


def test_cross_validate_metrics_recomputed_independently():
    X, y = _toy_presence_background(2)
    folds = random_folds(len(y), 3, seed=0, stratify=y)
    seen = []
    per_fold, summary = cross_validate(lambda: LogisticRegression(C=np.inf), pd.DataFrame(X), y, folds,
                                       progress=seen.append)
    assert seen == [0, 1, 2]
    for k, row in per_fold.set_index("fold").iterrows():
        te = folds == k
        model = LogisticRegression(C=np.inf).fit(X[~te], y[~te])
        s_tr, s_te = model.predict_proba(X[~te])[:, 1], model.predict_proba(X[te])[:, 1]
        # Source: scikit-learn roc_curve — the training threshold reaches max(TPR - FPR) on TRAINING data.
        fpr, tpr, _ = roc_curve(y[~te], s_tr, drop_intermediate=False)
        t = row["threshold"]
        train_j = np.mean(s_tr[y[~te] == 1] >= t) + np.mean(s_tr[y[~te] == 0] < t) - 1
        assert train_j == pytest.approx(np.max(tpr - fpr), abs=1e-9)
        pred = (s_te >= t).astype(int)
        # Source: scikit-learn roc_auc_score, balanced_accuracy_score(adjusted=True), cohen_kappa_score.
        assert row["auc"] == pytest.approx(roc_auc_score(y[te], s_te), abs=1e-9)
        assert row["tss"] == pytest.approx(balanced_accuracy_score(y[te], pred, adjusted=True), abs=1e-9)
        assert row["kappa"] == pytest.approx(cohen_kappa_score(y[te], pred), abs=1e-9)
        # Source: REFERENCES item 12 order-statistic P10 on the training presences.
        p10 = np.sort(s_tr[y[~te] == 1])[int(np.floor(0.1 * (y[~te] == 1).sum()))]
        assert row["omission_p10"] == pytest.approx(np.mean(s_te[y[te] == 1] < p10), abs=1e-9)
    # Common practice, no source: sample SD (ddof = 1) across folds.
    assert summary["auc_sd"] == pytest.approx(np.std(per_fold["auc"], ddof=1), abs=1e-12)
    assert summary["n_folds"] == 3 and -1 <= summary["boyce_mean"] <= 1
    assert summary["boyce_mean"] > 0.5  # a fair model ranks presences high


class _WeightSpy:
    """Records the weights it was fitted with; predicts a constant-free score from column 0."""

    calls = []

    def fit(self, X, y, sample_weight=None):
        _WeightSpy.calls.append(sample_weight)
        return self

    def predict_proba(self, X):
        s = 1 / (1 + np.exp(-np.asarray(X)[:, 0]))
        return np.column_stack([1 - s, s])


def test_sample_weight_subset_and_threshold_rule():
    # Common practice, no source: each fold's fit gets the training records' weights only.
    X, y = _toy_presence_background(3, n=300)
    folds = np.arange(300) % 3
    w = np.arange(300, dtype=float)
    _WeightSpy.calls = []
    per_fold, summary = cross_validate(_WeightSpy, X, y, folds, sample_weight=w, threshold_rule=0.4)
    for k, got in enumerate(_WeightSpy.calls):
        np.testing.assert_array_equal(got, w[folds != k])
    assert (per_fold["threshold"] == 0.4).all() and summary["threshold_rule"] == "fixed"


def test_cross_validate_bad_input():
    # Common practice, no source: empty presence set, a fold without held-out presences, bad rules.
    X, y = _toy_presence_background(4, n=200)
    folds = np.arange(200) % 2
    with pytest.raises(InputError, match="no presences"):
        cross_validate(_WeightSpy, X, np.zeros(200, int), folds)
    bad_folds = np.where(y == 1, 0, np.arange(200) % 2)
    with pytest.raises(InputError, match="fold 0 leaves n_train_presence = 0"):
        cross_validate(_WeightSpy, X, y, bad_folds)
    with pytest.raises(InputError, match="unknown"):
        cross_validate(_WeightSpy, X, y, folds, threshold_rule="best")
    with pytest.raises(InputError, match="outside"):
        cross_validate(_WeightSpy, X, y, folds, threshold_rule=2)


@pytest.mark.parametrize("method", ["pointprocess", "brt"])
def test_parallel_fold_fits_equal_the_serial_ones(method):
    # The fold fits and the final fit made in two worker processes give exactly the serial
    # scores and the same final model (every fit is seeded); fold ids reach the model's fit.
    from envelope.evaluation import cross_validate
    from envelope.models import BoostedTrees, PointProcessModel

    def make():
        if method == "pointprocess":
            return PointProcessModel(C="cv", classes=("linear", "quadratic"), random_state=0)
        return BoostedTrees(max_iter=30, random_state=0)

    rng = np.random.default_rng(2)
    X = np.r_[rng.normal(0.7, 0.6, (150, 3)), rng.normal(0, 1, (900, 3))]
    y = np.r_[np.ones(150, dtype=int), np.zeros(900, dtype=int)]
    folds = np.r_[np.arange(150) * 4 // 150, np.arange(900) * 4 // 900]
    w = rng.uniform(0.5, 2.0, y.size)
    params = {"groups": folds} if method == "pointprocess" else {}
    serial = cross_validate(make, X, y, folds, sample_weight=w, fit_params=params, final_fit=True)
    calls = []
    parallel = cross_validate(make, X, y, folds, sample_weight=w, fit_params=params, final_fit=True, n_jobs=2,
                              fit_progress=lambda done, total: calls.append((done, total)))
    pd.testing.assert_frame_equal(serial[0], parallel[0])
    assert serial[1] == parallel[1]
    np.testing.assert_array_equal(serial[2].predict_proba(X), parallel[2].predict_proba(X))
    assert calls[-1] == (5, 5)  # 4 folds + the final fit
