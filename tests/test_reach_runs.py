"""Reach over many runs: per-replicate values, probability of reach, medians and intervals."""

import numpy as np
import pytest
from scipy.stats.mstats import mquantiles

from envelope.errors import InputError
from envelope.reach import DispersalSettings
from envelope.reach_runs import combine_reach_runs, distance_levels, percentile_interval

from tests.test_reach import corridor, run


def test_percentile_interval_equals_scipy_type_7():
    # Source: scipy.stats.mstats.mquantiles with alphap = betap = 1 is Hyndman & Fan (1996)
    # definition 7, numpy's default percentile.
    values = np.random.default_rng(4).gamma(2.0, 3.0, size=17)
    got = percentile_interval(list(values) + [None, float("nan")])
    want = mquantiles(values, prob=[0.05, 0.5, 0.95], alphap=1, betap=1)
    assert [got["p05"], got["p50"], got["p95"]] == pytest.approx(list(want), rel=1e-12)
    assert percentile_interval([None]) == {"p05": None, "p50": None, "p95": None}


def test_distance_levels_are_evenly_spaced():
    # Analytic: three evenly spaced levels from 2.5 to 7.5 are 2.5, 5, 7.5.
    assert distance_levels(2.5, 7.5) == [2.5, 5.0, 7.5]
    assert distance_levels(4.0, 4.0) == [4.0]
    with pytest.raises(InputError, match="0 < low <= high"):
        distance_levels(5.0, 1.0)


def test_replicate_runs_and_probability_are_the_runs_themselves():
    # Analytic: the probability of reach is the share of runs occupying a cell, each
    # replicate one run; the medians and intervals are those of the per-run values.
    now, fut, hab, start = corridor(gap_rows=slice(20, 22))
    a = run(now, fut, hab, start, replicates=5, seed=1)
    b = run(now, fut, hab, start, replicates=3, seed=2,
            settings=DispersalSettings(kernel="exponential", mean_distance_km=4.0))
    assert len(a.runs) == 5 and len(b.runs) == 3
    combined = combine_reach_runs([a, b], [{"distance_km": 2.0}, {"distance_km": 4.0}])
    assert len(combined.runs) == 8 and combined.summary["n_runs"] == 8
    share = (5 * np.nan_to_num(a.reached_share.values) + 3 * np.nan_to_num(b.reached_share.values)) / 8
    np.testing.assert_allclose(np.nan_to_num(combined.probability.values), share, atol=1e-6)
    # a stochastic run's reached share is the mean of its replicates' 0/1 states
    assert set(np.unique(np.round(a.reached_share.values[np.isfinite(a.reached_share.values)] * 5, 6))) <= set(
        map(float, range(6)))
    reached = [r["area_km2"]["gained_reached"] for r in a.runs + b.runs]
    assert combined.summary["area_km2"]["gained_reached"] == pytest.approx(np.median(reached))
    iv = combined.summary["intervals"]["area_km2"]["gained_reached"]
    assert [iv["p05"], iv["p95"]] == pytest.approx(list(np.percentile(reached, [5, 95])))
    fronts = [r["front_advance_km"] for r in a.runs + b.runs]
    assert combined.summary["front_advance_km"] == pytest.approx(np.median(fronts))
    assert combined.summary["runs_by"] == {"distance_km": [2.0, 4.0]}


def test_deterministic_run_is_its_own_single_run():
    # Analytic: one deterministic run has one run whose values are the summary's.
    now, fut, hab, start = corridor()
    r = run(now, fut, hab, start)
    assert len(r.runs) == 1
    assert r.runs[0]["area_km2"] == r.summary["area_km2"]
    assert r.runs[0]["front_advance_km"] == r.summary["front_advance_km"]
    c = combine_reach_runs([r], [{}])
    iv = c.summary["intervals"]["front_advance_km"]
    assert iv["p05"] == iv["p50"] == iv["p95"] == pytest.approx(r.summary["front_advance_km"])
