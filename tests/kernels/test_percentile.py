"""The tabulated percentile envelope against the estimator's own predict_proba on clamped cells, bit for bit."""

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.percentile import compile_percentile, percentile_suitability
from envelope.models import PercentileEnvelope


def _fit(ties, weights, rng, crowded=False):
    # presences on a 0.1 lattice (many ties), one variable with few distinct values; or
    # many continuous presences, one far away (buckets crowd)
    n = 4000 if crowded else 150
    P = np.c_[rng.normal(0.5, 1.0, n).round(1), rng.normal(10, 3, n).round(1), rng.integers(0, 4, n)]
    if crowded:
        P = np.c_[rng.normal(0.5, 1.0, n), rng.lognormal(0, 2, n), np.r_[rng.normal(size=n - 1), 1e30]]
    B = np.c_[rng.normal(0, 2, 600), rng.normal(9, 5, 600), rng.integers(-2, 7, 600)]
    X, y = np.r_[P, B], np.r_[np.ones(n), np.zeros(600)]
    w = rng.uniform(0.2, 3.0, X.shape[0]) if weights else None
    return PercentileEnvelope(ties=ties).fit(X, y, sample_weight=w), X


def _cells(model, X, rng, dtype):
    """(variables, cells): on presence values and their float neighbours, on the clamping
    bounds, inside, outside and far outside the ranges, NaN and ±inf."""
    n_vars = X.shape[1]
    on = np.stack([rng.choice(v, 2000) for v in model.presence_values_]).astype(dtype)
    inf = dtype(np.inf)
    bounds = np.repeat(np.c_[X.min(0), X.max(0), model.lower_, model.upper_].astype(dtype), 20, axis=1)
    spread = rng.normal(scale=3, size=(n_vars, 3000)) * X.std(0)[:, None] + X.mean(0)[:, None]
    cells = np.concatenate([on, np.nextafter(on, inf), np.nextafter(on, -inf), bounds,
                            np.nextafter(bounds, inf), np.nextafter(bounds, -inf), spread.astype(dtype)], axis=1)
    cols = rng.integers(0, cells.shape[1], 20)
    cells[rng.integers(0, n_vars, 20), cols] = np.array([np.nan, np.inf, -np.inf, np.nan] * 5, dtype=dtype)
    return cells


@pytest.mark.parametrize("ties", ["mid", "right"])
@pytest.mark.parametrize("weights", [False, True])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("clamp", [True, False])
@pytest.mark.parametrize("crowded", [False, True])
def test_table_equals_predict_proba_of_clamped_cells(ties, weights, dtype, clamp, crowded):
    # Source: PercentileEnvelope.predict_proba (the estimator itself) on the cells clipped
    # to the training range in float64, as the projection's generic path does
    rng = np.random.default_rng(5)
    model, X = _fit(ties, weights, rng, crowded)
    lower, upper = (X.min(0), X.max(0)) if clamp else (None, None)
    table = compile_percentile(model.variable_score, model.presence_values_, lower=lower, upper=upper, dtype=dtype)
    assert any(index.any_crowded for index in table.indexes) == crowded
    cells = _cells(model, X, rng, dtype)
    got = percentile_suitability(table, cells, block_cells=999)
    rows = cells.T.astype(np.float64)
    ok = np.isfinite(rows).all(axis=1)
    if clamp:
        rows = np.clip(rows, lower, upper)
    np.testing.assert_array_equal(got[ok], model.predict_proba(rows[ok])[:, 1])
    assert np.isnan(got[~ok]).all() and (~ok).sum() >= 15


def test_float64_table_takes_other_dtypes():
    # Source: predict_proba on the same values; float32 cells looked up in a float64 table
    rng = np.random.default_rng(6)
    model, X = _fit("mid", False, rng)
    table = compile_percentile(model.variable_score, model.presence_values_, dtype=np.float64)
    cells = _cells(model, X, rng, np.float32)
    ok = np.isfinite(cells).all(axis=0)
    got = percentile_suitability(table, cells)
    np.testing.assert_array_equal(got[ok], model.predict_proba(cells[:, ok].T.astype(np.float64))[:, 1])
    with pytest.raises(InputError, match="X: float64 values; the table was compiled for float32"):
        percentile_suitability(compile_percentile(model.variable_score, model.presence_values_), cells.astype(float))
    with pytest.raises(InputError, match=r"X: shape \(2, 5\)"):
        percentile_suitability(table, np.zeros((2, 5)))
