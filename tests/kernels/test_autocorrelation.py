"""Spatial autocorrelation kernels: the autocovariate and Moran's I, against direct formulas."""

import numpy as np
import pytest
import scipy.sparse
from sklearn.linear_model import LogisticRegression

from envelope.errors import InputError
from envelope.kernels.autocorrelation import autocovariate, correlogram, distance_classes, morans_i


def direct_autocovariate(pts, occ, radius):
    """O(n^2) loops over the definition (Augustin, Mugglestone & Buckland 1996): sum w y / sum w, w = 1/d."""
    out = np.zeros(len(pts))
    for i in range(len(pts)):
        num = den = 0.0
        for j in range(len(pts)):
            d = float(np.hypot(*(pts[i] - pts[j])))
            if 0 < d <= radius:
                num += occ[j] / d
                den += 1.0 / d
        out[i] = num / den if den else 0.0
    return out


def direct_morans_i(x, w):
    """Moran (1950) written as plain sums, one term at a time (Cliff & Ord 1981, eq. 1.5)."""
    n = len(x)
    m = sum(x) / n
    num = sum(w[i][j] * (x[i] - m) * (x[j] - m) for i in range(n) for j in range(n))
    den = sum((x[i] - m) ** 2 for i in range(n))
    s0 = sum(w[i][j] for i in range(n) for j in range(n))
    return n / s0 * num / den


def test_autocovariate_against_direct_loops():
    rng = np.random.default_rng(3)
    pts = rng.uniform(0, 50, size=(120, 2))
    occ = rng.random(120) < 0.4
    assert np.allclose(autocovariate(pts, pts, occ, 12.0), direct_autocovariate(pts, occ, 12.0))


def test_autocovariate_of_a_lone_cell_and_bad_radius():
    # Analytic: a target with no neighbour in range gets 0; a fully occupied neighbourhood 1.
    pts = np.array([[0.0, 0.0], [1.0, 0.0], [100.0, 0.0]])
    assert autocovariate(pts, pts, [1, 1, 1], 5.0).tolist() == [1.0, 1.0, 0.0]
    with pytest.raises(InputError, match="radius_km"):
        autocovariate(pts, pts, [1, 1, 1], 0.0)


def test_morans_i_checkerboard_is_minus_one_and_matches_direct_sums():
    # Analytic: a checkerboard on an even grid with rook (edge) neighbours has every neighbour
    # pair of opposite sign, so I = -1 exactly.
    n = 6
    r, c = np.divmod(np.arange(n * n), n)
    x = ((r + c) % 2).astype(float)
    w = ((np.abs(r[:, None] - r[None]) + np.abs(c[:, None] - c[None])) == 1).astype(float)
    assert morans_i(x, w) == pytest.approx(-1.0, abs=1e-12)
    rng = np.random.default_rng(0)
    v = rng.normal(size=n * n)
    assert morans_i(v, w) == pytest.approx(direct_morans_i(v.tolist(), w.tolist()), rel=1e-12)


def test_morans_i_textbook_row():
    # From memory (a common textbook illustration, no page cited): five cells in a row with
    # values 1..5 and rook neighbours. By hand: z = -2..2, sum z^2 = 10, neighbour products
    # 2*(2 + 0 + 0 + 2) = 8, S0 = 8, so I = (5/8) * 8 / 10 = 0.5.
    x = np.arange(1.0, 6.0)
    w = (np.abs(np.subtract.outer(np.arange(5), np.arange(5))) == 1).astype(float)
    assert morans_i(x, w) == pytest.approx(0.5, abs=1e-12)


def test_correlogram_classes_and_pairs():
    # Analytic: points on a line 1 km apart; class (0, 1] holds the 9 adjacent pairs, and a
    # linear trend is positively autocorrelated at short lags.
    pts = np.c_[np.arange(10.0), np.zeros(10)]
    out = correlogram(np.arange(10.0), pts, distance_classes(2.0, 2))
    assert [c["n_pairs"] for c in out] == [9, 8]
    assert out[0]["morans_i"] > 0.5


def gibbs_autologistic(n, a, b, c, radius, sweeps, seed):
    """Autologistic field on an n x n lattice of 1-km cells: logit P(y_i | rest) = a + b clim_i + c A_i.

    Simulated by Gibbs sampling in four colour classes (a cell's queen neighbours never share its
    class); A is computed by an independent dense matrix of inverse distances.
    """
    rng = np.random.default_rng(seed)
    r, col = np.divmod(np.arange(n * n), n)
    pts = np.c_[col, r].astype(float)
    d = np.hypot(*(pts[:, None, :] - pts[None, :, :]).transpose(2, 0, 1))
    w = np.where((d > 0) & (d <= radius), 1.0 / np.where(d > 0, d, 1.0), 0.0)
    w /= w.sum(axis=1, keepdims=True)
    clim = (col / (n - 1)) * 4.0 - 2.0
    y = (rng.random(n * n) < 0.5).astype(float)
    colours = (r % 2) * 2 + (col % 2)
    w = scipy.sparse.csr_matrix(w)
    classes = [(idx, w[idx], a + b * clim[idx]) for idx in (colours == k for k in range(4))]
    for _ in range(sweeps):
        for idx, w_k, base in classes:
            eta = base + c * (w_k @ y)
            y[idx] = (rng.random(eta.size) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    return pts, clim, y


def test_autocovariate_recovers_a_known_spillover_term():
    # Source: Besag (1975) J. R. Stat. Soc. D 24: 179-195 -- the maximum pseudo-likelihood
    # estimate (a logistic regression of y on the covariates and the autocovariate) is
    # consistent for the autologistic model; fitted with scikit-learn's unpenalised
    # LogisticRegression. Truth: spillover c = 3.0 (simulation, seeds fixed).
    estimates = []
    for seed in (1, 2):
        pts, clim, y = gibbs_autologistic(45, -1.5, 1.0, 3.0, 1.5, 300, seed)
        A = autocovariate(pts, pts, y, 1.5)
        model = LogisticRegression(C=np.inf, max_iter=1000).fit(np.c_[clim, A], y)
        estimates.append(model.coef_[0][1])
    assert np.mean(estimates) == pytest.approx(3.0, rel=0.2)
    assert all(e > 1.5 for e in estimates)
