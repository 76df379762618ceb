"""Targeting habitat restoration: lazy-greedy patch choice against exhaustive search and baselines."""

import itertools

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.reach import DispersalSettings, simulate_reach
from envelope.targeting import ReachGain, candidate_patches, greedy_selection, target_restoration
from tests.test_reach import layer

NY, NX = 40, 20
GAP = slice(10, 26)          # 16 rows x ~5.6 km = ~89 km, wider than the truncated kernel's reach
SETTINGS = DispersalSettings(kernel="exponential", mean_distance_km=3.0)
KW = dict(threshold=0.5, settings=SETTINGS, now_year=2020, step_years=1.0, rate=3.0)


def landscape():
    """Occupied south, suitable everywhere by 2100; a habitat gap between south and north."""
    now = np.zeros((NY, NX))
    now[27:] = 1.0
    fut = np.ones((NY, NX))
    hab = np.ones((NY, NX))
    hab[GAP] = 0.0
    hab[30:34, 0:4] = 0.0        # a hole far behind the front, in today's range
    hab[2:6, 16:20] = 0.0        # a hole in the north, beyond the gap
    start = np.zeros((NY, NX))
    start[-3:] = 1.0
    cand = np.zeros((NY, NX))
    cand[GAP, 8:12] = 1          # patch bridging the gap (64 cells)
    cand[18:26, 14:18] = 1       # stub growing from the front into the gap (32 cells)
    cand[30:34, 0:4] = 1         # hole behind the front (16 cells)
    cand[2:6, 16:20] = 1         # hole beyond the gap (16 cells)
    return layer(now), [(2100, layer(fut))], layer(hab), start, layer(cand)


def model_and_patches():
    now, futures, hab, start, cand = landscape()
    from envelope.grids import cell_area_km2
    from envelope.reach import cell_lonlat

    areas = np.asarray(cell_area_km2(now).values)
    lat, lon = cell_lonlat(now)
    patches = candidate_patches(cand.values, areas, lon, lat)
    return ReachGain(now, futures, hab, start, patches, **KW), patches, (now, futures, hab, start, cand)


def test_gain_model_equals_simulate_reach():
    # Consistency: the reused-operator evaluation is simulate_reach's gained_reached (deterministic)
    model, patches, (now, futures, hab, start, _) = model_and_patches()
    chosen = [patches.labels[12, 9]]
    restored = hab.copy(data=model.restored_habitat(chosen).astype("float32"))
    ref = simulate_reach(now, futures, restored, start, **KW).summary["area_km2"]["gained_reached"]
    assert model.gained_reached(chosen) == pytest.approx(ref, rel=1e-12)
    ref0 = simulate_reach(now, futures, hab, start, **KW).summary["area_km2"]["gained_reached"]
    assert model.gained_reached(()) == pytest.approx(ref0, rel=1e-12)


def test_greedy_matches_exhaustive_search_and_beats_random():
    model, patches, _ = model_and_patches()
    budget = float(patches.area_km2[patches.labels[12, 9] - 1] + patches.area_km2[patches.labels[20, 15] - 1]) * 1.01
    best = 0.0
    # Analytic: exhaustive search over all 2^4 patch subsets within the budget
    for k in range(patches.n + 1):
        for subset in itertools.combinations(range(1, patches.n + 1), k):
            if patches.area_km2[[p - 1 for p in subset]].sum() <= budget:
                best = max(best, model.value(subset))
    greedy = greedy_selection(model, budget_km2=budget)
    assert best > 0
    assert greedy["total"] == pytest.approx(best, rel=1e-9)   # equal on this landscape
    assert greedy["total"] == pytest.approx(model.value(greedy["chosen"]), rel=1e-12)
    from envelope.targeting import random_baseline

    assert greedy["total"] >= random_baseline(model, budget_km2=budget, draws=5, seed=1) - 1e-9


def test_corridor_patch_ranks_first_and_patch_behind_front_adds_nothing():
    # Analytic: a kernel truncated below the gap width cannot cross it; only the bridge connects the north
    now, futures, hab, start, cand = landscape()
    model, patches, _ = model_and_patches()
    bridge, behind = patches.labels[12, 9], patches.labels[31, 1]
    res = target_restoration(now, futures, hab, start, cand, budget_km2=1e6, **KW, random_draws=3)
    table = res.table
    assert table.iloc[0]["patch_id"] == bridge and res.rank.values[12, 9] == 1
    # without the bridge the north stays unreached, so the bridge adds more than its own area
    assert table.iloc[0]["added_per_km2"] > 2.0
    # the hole in today's range is not newly suitable: restoring it adds no reachable gain,
    # so it is not ranked at all (nodata)
    assert behind not in set(table["patch_id"]) and res.rank.values[31, 1] == 0
    assert res.summary["n_candidate_patches"] == 4


def test_budget_for_one_patch_greedy_beats_nearest_and_random():
    # Analytic: the nearest-first rule spends the budget on the hole behind the front and the stub
    now, futures, hab, start, cand = landscape()
    model, patches, _ = model_and_patches()
    budget = float(patches.area_km2[patches.labels[12, 9] - 1]) * 1.001
    res = target_restoration(now, futures, hab, start, cand, budget_km2=budget, **KW, random_draws=4, seed=3)
    s = res.summary
    assert s["n_chosen"] == 1 and res.rank.values[12, 9] == 1
    assert s["reachable_gain_km2"] > s["nearest_baseline_gain_km2"]
    assert s["reachable_gain_km2"] > s["random_baseline_gain_km2"]


def test_budget_limits_choice_and_bad_budget():
    now, futures, hab, start, cand = landscape()
    res = target_restoration(now, futures, hab, start, cand, budget_km2=500.0, **KW, random_draws=2)
    assert res.table["area_km2"].sum() <= 500.0  # Common practice, no source: budget is a hard cap
    with pytest.raises(InputError, match="--budget-km2"):
        target_restoration(now, futures, hab, start, cand, budget_km2=0.0, **KW)
    with pytest.raises(InputError, match="no candidate cell"):
        target_restoration(now, futures, hab, start, cand.copy(data=np.zeros((NY, NX), "float32")),
                           budget_km2=10.0, **KW)


def test_budget_below_every_patch_is_refused_naming_the_smallest_patch():
    # Analytic: the smallest candidates are the two 16-cell holes; a budget below their area
    # fits nothing, which must be said rather than reported as an empty choice
    now, futures, hab, start, cand = landscape()
    _, patches, _ = model_and_patches()
    smallest = float(np.min(patches.area_km2))
    with pytest.raises(InputError, match=r"--budget-km2 .*no candidate patch fits.*smallest") as err:
        target_restoration(now, futures, hab, start, cand, budget_km2=smallest * 0.5, **KW)
    assert f"{smallest:.4g} km²" in str(err.value)
    cost = np.ones((NY, NX))
    with pytest.raises(InputError, match="--budget-cost .*cheapest"):
        target_restoration(now, futures, hab, start, cand, budget_km2=1e6, cost=layer(cost), budget_cost=0.5, **KW)


def test_cost_raster_reorders_and_cost_budget_binds():
    # Analytic: per-unit-cost ranking; a 100x cost on the bridge puts the cheap stub first,
    # and a cost budget below the bridge's cost (64 cells x 100) excludes it
    now, futures, hab, start, cand = landscape()
    cost = np.ones((NY, NX))
    cost[GAP, 8:12] = 100.0
    res = target_restoration(now, futures, hab, start, cand, budget_km2=1e6, cost=layer(cost), **KW, random_draws=2)
    assert res.rank.values[20, 15] == 1 and res.rank.values[12, 9] == 2
    capped = target_restoration(now, futures, hab, start, cand, budget_km2=1e6, cost=layer(cost), budget_cost=100.0,
                                **KW, random_draws=2)
    assert capped.rank.values[12, 9] == 0
    assert capped.table["cost"].sum() <= 100.0


# --------------------------------------------------------------------------- patch centroids


def test_patch_centroid_across_antimeridian_is_the_geodesic_midpoint():
    # Source: pyproj.Geod on a sphere: the midpoint of the great-circle arc between two points.
    # Two equal-area cells either side of 180° form one patch; the area-weighted mean of
    # their surface normals points at that midpoint (a plain mean of longitudes gives 0°).
    import pyproj

    lon = np.array([[179.5, -179.5]])
    lat = np.array([[60.0, 60.0]])
    patches = candidate_patches(np.ones((1, 2)), np.full((1, 2), 7.0), lon, lat)
    assert patches.n == 1
    geod = pyproj.Geod(a=6_371_000.0, f=0.0)
    az, _, dist = geod.inv(179.5, 60.0, -179.5, 60.0)
    mid_lon, mid_lat, _ = geod.fwd(179.5, 60.0, az, dist / 2)
    assert abs(patches.centroid_lon[0]) == pytest.approx(abs(mid_lon), abs=1e-9) == pytest.approx(180.0, abs=1e-9)
    assert patches.centroid_lat[0] == pytest.approx(mid_lat, abs=1e-9)


def test_patch_centroid_on_projected_grid_straddling_180():
    # Analytic: cells placed symmetrically about the central meridian (180°) of an azimuthal
    # equal-area grid have their area-weighted mean position on that meridian.
    from envelope.grids import cell_area_km2
    from envelope.reach import cell_lonlat

    crs = "+proj=laea +lat_0=50 +lon_0=180 +datum=WGS84 +units=m"
    x = (np.arange(6) - 2.5) * 5000.0
    y = (np.arange(6)[::-1] - 2.5) * 5000.0
    import xarray as xr

    grid = xr.DataArray(np.zeros((6, 6), "float32"), dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)
    cand = np.zeros((6, 6))
    cand[1:5, 1:5] = 1
    lat, lon = cell_lonlat(grid)
    patches = candidate_patches(cand, np.asarray(cell_area_km2(grid).values), lon, lat)
    assert abs(patches.centroid_lon[0]) == pytest.approx(180.0, abs=1e-9)
    assert lat[1:5, 1:5].min() < patches.centroid_lat[0] < lat[1:5, 1:5].max()
    assert abs(lon[1:5, 1:5].mean()) < 1.0   # the plain mean the centroid used to be


# --------------------------------------------------------------------------- cache


def test_cache_saves_reach_runs_and_changes_nothing():
    # Analytic: both CELF passes start by evaluating every single patch, so with the cache
    # the second pass runs at least n_patches fewer reach runs; results are identical.
    now, futures, hab, start, cand = landscape()
    _, patches, _ = model_and_patches()
    budget = float(patches.area_km2.sum()) * 0.6
    runs = {}
    for cache in (False, True):
        model = ReachGain(now, futures, hab, start, patches, cache=cache, **KW)
        runs[cache] = (greedy_selection(model, budget_km2=budget), model.n_evaluations, model.n_reach_runs)
    (plain, n_plain, r_plain), (cached, n_cached, r_cached) = runs[False], runs[True]
    assert cached["chosen"] == plain["chosen"] and cached["total"] == plain["total"]
    assert n_cached <= n_plain - patches.n and r_cached == n_cached  # one path: one reach run per set


# --------------------------------------------------------------------------- several climate paths


def two_paths():
    """Path "all": suitable everywhere by 2100. Path "east": only columns 12+ become suitable,
    so the bridge (columns 8-11) never becomes suitable and adds nothing there."""
    now, futures, hab, start, cand = landscape()
    east = np.asarray(now.values, dtype=float).copy()
    east[:, 12:] = 1.0
    return now, {"all": futures, "east": [(2100, layer(east))]}, hab, start, cand


def test_several_paths_mean_and_worst_choose_differently():
    # Analytic: under "all" the bridge opens the whole north and the stub adds its own 32
    # cells; under "east" the bridge adds 0 and the stub its 32 cells. With a budget of one
    # bridge, the mean picks the bridge and the worst case (min over paths) the stub.
    now, paths, hab, start, cand = two_paths()
    _, patches, _ = model_and_patches()
    budget = float(patches.area_km2[patches.labels[12, 9] - 1]) * 1.001
    mean = target_restoration(now, paths, hab, start, cand, budget_km2=budget, **KW, random_draws=2)
    worst = target_restoration(now, paths, hab, start, cand, budget_km2=budget, objective="worst", **KW,
                               random_draws=2)
    assert mean.rank.values[12, 9] == 1 and mean.rank.values[20, 15] == 0
    assert worst.rank.values[20, 15] == 1 and worst.rank.values[12, 9] == 0
    gains = {p["name"]: p["reachable_gain_km2"] for p in mean.summary["climate_paths"]}
    assert gains["east"] == 0.0 and gains["all"] > 0
    assert mean.summary["reachable_gain_km2"] == pytest.approx((gains["all"] + gains["east"]) / 2, rel=1e-12)
    worst_gains = [p["reachable_gain_km2"] for p in worst.summary["climate_paths"]]
    assert worst.summary["reachable_gain_km2"] == pytest.approx(min(worst_gains), rel=1e-12)
    # per-path columns of the table, in path order
    assert list(mean.table.columns[-2:]) == ["added_reachable_km2.all", "added_reachable_km2.east"]


def test_per_path_gain_equals_simulate_reach_difference():
    # Consistency with the reach model's own measure: each path's gain is simulate_reach's
    # gained_reached with the patches restored minus without.
    now, paths, hab, start, cand = two_paths()
    _, patches, _ = model_and_patches()
    model = ReachGain(now, paths, hab, start, patches, **KW)
    chosen = [patches.labels[12, 9], patches.labels[20, 15]]
    restored = hab.copy(data=model.restored_habitat(chosen).astype("float32"))
    for name, gain in zip(model.names, model.path_gains(chosen)):
        with_ = simulate_reach(now, paths[name], restored, start, **KW).summary["area_km2"]["gained_reached"]
        without = simulate_reach(now, paths[name], hab, start, **KW).summary["area_km2"]["gained_reached"]
        assert gain == pytest.approx(with_ - without, rel=1e-12, abs=1e-9)
    assert model.value(chosen) == pytest.approx(np.mean(model.path_gains(chosen)), rel=1e-12)


# --------------------------------------------------------------------------- quality


def test_quality_raster_is_used_per_cell():
    # Definition: a restored cell's habitat becomes max(current, quality of that cell);
    # a constant raster gives the same objective as the number.
    now, futures, hab, start, cand = landscape()
    _, patches, _ = model_and_patches()
    bridge = patches.labels[12, 9]
    q = np.full((NY, NX), 0.25)
    q[GAP, 8:10] = 1.0
    model = ReachGain(now, futures, hab, start, patches, quality=layer(q), **KW)
    restored = model.restored_habitat([bridge])
    in_bridge = patches.labels == bridge
    np.testing.assert_array_equal(restored[in_bridge], np.maximum(hab.values[in_bridge], q[in_bridge]))
    np.testing.assert_array_equal(restored[~in_bridge], hab.values[~in_bridge])
    same = ReachGain(now, futures, hab, start, patches, quality=layer(np.full((NY, NX), 0.75)), **KW)
    number = ReachGain(now, futures, hab, start, patches, quality=0.75, **KW)
    assert same.value([bridge]) == pytest.approx(number.value([bridge]), rel=1e-12)


@pytest.mark.parametrize("quality, phrase", [
    (0.0, r"--quality must lie in \(0, 1\]"),
    (1.5, r"--quality must lie in \(0, 1\]"),
    ("nan_in_candidate", "no quality or one outside"),
    ("above_one", r"found 0.5..1.2"),
])
def test_bad_quality(quality, phrase):
    now, futures, hab, start, cand = landscape()
    _, patches, _ = model_and_patches()
    if quality == "nan_in_candidate":
        q = np.full((NY, NX), 0.5)
        q[12, 9] = np.nan
        quality = layer(q)
    elif quality == "above_one":
        q = np.full((NY, NX), 0.5)
        q[20, 15] = 1.2
        quality = layer(q)
    with pytest.raises(InputError, match=phrase):
        ReachGain(now, futures, hab, start, patches, quality=quality, **KW)


def test_bad_objective_and_climate_paths():
    now, futures, hab, start, cand = landscape()
    _, patches, _ = model_and_patches()
    with pytest.raises(InputError, match="--objective must be one of mean, worst"):
        ReachGain(now, futures, hab, start, patches, objective="best", **KW)
    with pytest.raises(InputError, match="at least one future suitability map"):
        ReachGain(now, {}, hab, start, patches, **KW)
    with pytest.raises(InputError, match="'early': horizon year 2010 is not after the start year 2020"):
        ReachGain(now, {"early": [(2010, futures[0][1])]}, hab, start, patches, **KW)


def test_max_patch_area_splits_large_candidates():
    # Analytic: pieces never exceed the cap; together they are exactly the candidate cells
    now, futures, hab, start, cand = landscape()
    from envelope.grids import cell_area_km2
    from envelope.reach import cell_lonlat

    areas = np.asarray(cell_area_km2(now).values)
    lat, lon = cell_lonlat(now)
    whole = candidate_patches(cand.values, areas, lon, lat)
    cap = 20 * areas.max()
    split = candidate_patches(cand.values, areas, lon, lat, max_patch_km2=cap)
    assert split.n > whole.n and split.area_km2.max() <= cap * (1 + 1e-12)
    assert split.area_km2.sum() == pytest.approx(whole.area_km2.sum(), rel=1e-12)
    np.testing.assert_array_equal(split.labels > 0, whole.labels > 0)
    with pytest.raises(InputError, match="smaller than one candidate cell"):
        candidate_patches(cand.values, areas, lon, lat, max_patch_km2=areas.max() / 2)


def test_candidates_from_land_cover_classes():
    # Common practice, no source: restorable land-cover classes mark the candidate cells
    from envelope.reachable_gain import candidates_from_classes

    codes = np.array([[1, 4, 4], [5, 0, 4]], dtype=np.uint8)
    np.testing.assert_array_equal(candidates_from_classes(codes, [4, 5]), [[False, True, True], [True, False, True]])
    with pytest.raises(InputError, match=r"no cell of class 7 \(the raster holds codes 0, 1, 4, 5\)"):
        candidates_from_classes(codes, [7])
    with pytest.raises(InputError, match="non-integer values"):
        candidates_from_classes(np.array([[0.5, 1.0]]), [1])
