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


def test_combined_maps_equal_the_former_whole_grid_path(monkeypatch):
    # Exact equality with the former code path, which stacked every run's grids whole: the
    # mode of the classes, the median arrival year, the weighted share and the front where
    # half of the paths are occupied are now computed a block of rows at a time (2 rows
    # here) and the halves kept packed; not one value may change.
    import envelope.kernels.rowblocks as rowblocks
    from envelope.reach import REACH_CLASSES, REACH_NODATA, front_geojson, simulate_reach

    from tests.test_reach import _landscape

    monkeypatch.setattr(rowblocks, "ROW_BLOCK_CELLS", 2 * 36)
    now, futures, hab, start = _landscape()
    kw = dict(threshold=0.5, now_year=2020, rate=2.5, snapshot_every_years=6, fragmentation_band_deg=None)
    results = [simulate_reach(now, futures, hab, start, settings=DispersalSettings(mean_distance_km=d), seed=s,
                              replicates=r, **kw) for d, r, s in ((2.0, 0, 0), (3.0, 3, 1), (4.5, 0, 2))]
    combined = combine_reach_runs(results, [{"d": 2.0}, {"d": 3.0}, {"d": 4.5}])
    weights = np.asarray([len(r.runs) for r in results], dtype=np.float64)
    share = sum(w * np.nan_to_num(np.asarray(r.reached_share.values, dtype=np.float64))
                for w, r in zip(weights, results)) / weights.sum()
    valid = np.isfinite(np.asarray(results[0].reached_share.values))
    bits = lambda a: np.asarray(a).view(np.uint32)  # noqa: E731
    np.testing.assert_array_equal(bits(combined.probability.values),
                                  bits(np.where(valid, share, np.nan).astype(np.float32)))
    stack = np.stack([np.asarray(r.classes.values) for r in results])
    codes = sorted(REACH_CLASSES)
    mode = np.asarray(codes, dtype=np.uint8)[np.argmax(np.stack([(stack == c).sum(axis=0) for c in codes]), axis=0)]
    mode[(stack == REACH_NODATA).all(axis=0)] = REACH_NODATA
    np.testing.assert_array_equal(combined.classes.values, mode)
    years = np.stack([np.where(np.isfinite(r.arrival_year.values), r.arrival_year.values, np.inf) for r in results])
    med = np.median(years, axis=0)
    np.testing.assert_array_equal(bits(combined.arrival_year.values),
                                  bits(np.where(valid & np.isfinite(med), med, np.nan).astype(np.float32)))
    like = results[0].reached_share
    halves = {yr: like.copy(data=np.mean([np.nan_to_num(r.occupancy[yr].values) >= 0.5 for r in results],
                                         axis=0).astype(np.float32)) for yr in results[0].occupancy}
    assert combined.front == front_geojson(like, halves, level=0.5)
    assert len(combined.front["features"]) == 6 and any(f["geometry"]["coordinates"] for f in combined.front["features"])


def test_combiner_drops_each_result_and_equals_the_list(monkeypatch):
    # Exact equality: results handed to ReachRunCombiner one at a time (each dropped by the
    # caller) give the very combination combine_reach_runs makes of the list, and the
    # combiner keeps no result alive beyond the first while it is the only one.
    import gc
    import weakref

    from envelope.reach import simulate_reach
    from envelope.reach_runs import ReachRunCombiner

    from tests.test_reach import _landscape

    now, futures, hab, start = _landscape()
    kw = dict(threshold=0.5, now_year=2020, rate=2.5, snapshot_every_years=6, fragmentation_band_deg=None)
    settings = [(2.0, 0, 0), (3.0, 3, 1), (4.5, 0, 2)]

    def make(d, r, s):
        return simulate_reach(now, futures, hab, start, settings=DispersalSettings(mean_distance_km=d), seed=s,
                              replicates=r, **kw)

    labels = [{"d": d} for d, _, _ in settings]
    expected = combine_reach_runs([make(*x) for x in settings], labels)
    combiner, alive = ReachRunCombiner(), []
    for x, label in zip(settings, labels):
        result = make(*x)
        alive.append(weakref.ref(result))
        combiner.add(result, label)
        del result
        gc.collect()
        assert [ref() is not None for ref in alive] == [len(alive) == 1] + [False] * (len(alive) - 1)
    got = combiner.result()
    for name in ("classes", "probability", "arrival_year"):
        np.testing.assert_array_equal(getattr(got, name).values, getattr(expected, name).values)
    assert got.summary == expected.summary and got.front == expected.front
    assert got.runs.equals(expected.runs)
    with pytest.raises(RuntimeError, match="already called"):
        combiner.result()
    with pytest.raises(InputError, match="at least one result"):
        ReachRunCombiner().result()


def test_combiner_counts_widen_past_their_type(monkeypatch):
    # Analytic: 300 copies of one deterministic run hold a cell in all or none of the paths,
    # so the combination is that run's own state: with 8-bit counts (monkeypatched) the
    # counts must widen at 255 paths instead of wrapping round.
    import envelope.reach_runs as reach_runs

    monkeypatch.setattr(reach_runs, "COUNT_DTYPE", np.uint8)
    now, fut, hab, start = corridor()
    r = run(now, fut, hab, start)
    many = combine_reach_runs([r] * 300, [{"k": k} for k in range(300)])
    two = combine_reach_runs([r, r], [{"k": 0}, {"k": 1}])
    assert many.front == two.front and any(f["geometry"]["coordinates"] for f in two.front["features"])
    np.testing.assert_array_equal(many.probability.values, two.probability.values)
    np.testing.assert_array_equal(many.classes.values, r.classes.values)


def test_combiner_refuses_runs_on_another_grid():
    # Common practice, no source: runs on different grids cannot be combined cell by cell; the
    # error names the run and both shapes instead of a NumPy broadcasting error.
    now, fut, hab, start = corridor()
    r = run(now, fut, hab, start)
    small = run(now.isel(x=slice(0, -1)), fut.isel(x=slice(0, -1)), hab.isel(x=slice(0, -1)), start[:, :-1])
    with pytest.raises(InputError, match=r"run \{'k': 1\}: grid of .* the first run's is"):
        combine_reach_runs([r, small], [{"k": 0}, {"k": 1}])
