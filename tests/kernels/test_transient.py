"""The transient spread run: interpolated climate path, step years, persistence, gating, 1-D convolution."""

import numpy as np
import pytest
from scipy import signal

from envelope.errors import InputError
from envelope.kernels.spread import SpreadOperator
from envelope.kernels.transient import ClimatePath, TransientResult, run_transient, step_years_list

KERNEL_1D = np.array([[0.05, 0.1, 0.5, 0.25, 0.1]])  # asymmetric, sums to 1: orientation matters
THREE = np.array([[0.2, 0.6, 0.2]])


def _run(op, start, habitat, climate, **kw):
    kw = {"threshold": 0.5, "start_year": 2020, "end_year": 2030, **kw}
    return run_transient(op, start, habitat, climate, **kw)


def _constant(shape, value=1.0, years=(2020, 2100)):
    return ClimatePath(list(years), [np.full(shape, value)] * len(years))


def _yearly(values_by_year, shape=(1, 1)):
    """A climate path with one map per year (each map uniform), so ``at(year)`` is exact at step ends."""
    years = sorted(values_by_year)
    return ClimatePath(years, [np.full(shape, float(values_by_year[y])) for y in years])


# ----------------------------------------------------------------------------- ClimatePath
def test_climate_path_is_linear_in_time_between_maps_and_held_outside():
    rng = np.random.default_rng(0)
    maps = {2080: rng.random((3, 4)), 2020: rng.random((3, 4)), 2050: rng.random((3, 4))}
    path = ClimatePath(list(maps), list(maps.values()))  # given out of order: sorted by year
    assert path.years == [2020.0, 2050.0, 2080.0]
    # Analytic: linear interpolation, (1 - w) a + w b with w = (t - t0) / (t1 - t0)
    np.testing.assert_allclose(path.at(2035), 0.5 * maps[2020] + 0.5 * maps[2050], rtol=0, atol=1e-15)
    np.testing.assert_allclose(path.at(2059), 0.7 * maps[2050] + 0.3 * maps[2080], rtol=0, atol=1e-15)
    # Source: NumPy numpy.interp, cell by cell, including the constant hold beyond both ends
    xp, stack = [2020, 2050, 2080], np.stack([maps[y] for y in (2020, 2050, 2080)])
    for year in (2000, 2020, 2031.5, 2050, 2064.25, 2080, 2120):
        ref = np.apply_along_axis(lambda fp: np.interp(year, xp, fp), 0, stack)
        np.testing.assert_allclose(path.at(year), ref, rtol=0, atol=1e-15)
    # Common practice, no source: the maps are exact at their own years
    np.testing.assert_array_equal(path.at(2050), maps[2050])


def test_climate_path_keeps_nan_as_no_data():
    # Analytic: NaN in either bracketing map gives NaN in between (no climate data, never suitable)
    a, b = np.array([[0.0, np.nan]]), np.array([[1.0, 1.0]])
    mid = ClimatePath([2020, 2030], [a, b]).at(2025)
    assert mid[0, 0] == 0.5 and np.isnan(mid[0, 1])


def test_climate_path_accepts_numpy_years():
    # Common practice, no source: an array of years behaves as the list of the same years
    maps = [np.zeros((2, 2)), np.ones((2, 2))]
    path = ClimatePath(np.array([2020, 2040]), maps)
    np.testing.assert_array_equal(path.at(2030), ClimatePath([2020, 2040], maps).at(2030))


@pytest.mark.parametrize("years,maps,phrase", [
    ([2020, 2050], [np.zeros((2, 2))], "2 years and 1 maps"),
    ([], [], "0 years and 0 maps"),
    ([2020, 2020.0], [np.zeros((2, 2))] * 2, "years must be distinct"),
    ([2020, float("nan")], [np.zeros((2, 2))] * 2, "years must be finite"),
    ([2020, 2050], [np.zeros((2, 2)), np.zeros((2, 3))], "differ in shape"),
])
def test_climate_path_bad_inputs(years, maps, phrase):
    # Common practice, no source: bad input is an InputError naming what is wrong
    with pytest.raises(InputError, match=phrase):
        ClimatePath(years, maps)


# ----------------------------------------------------------------------------- step years
@pytest.mark.parametrize("start,end,step,expected", [
    (2020, 2050, 5, [2025, 2030, 2035, 2040, 2045, 2050]),
    (2020, 2050, 7, [2027, 2034, 2041, 2048, 2050]),     # ceil(30 / 7) = 5 steps, the last one 2 years
    (2020, 2021, 0.1, [2020 + 0.1 * i for i in range(1, 11)]),
    (2020, 2023, 10, [2023]),                             # one step, cut at the end year
])
def test_step_years_list(start, end, step, expected):
    # Analytic: ceil((end - start) / step) steps ending start + i * step, the last exactly at end
    got = step_years_list(start, end, step)
    assert len(got) == len(expected)
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9)
    assert got[-1] == end  # exact, not start + n * step with round-off


@pytest.mark.parametrize("args,phrase", [
    ((2020, 2050, 0), "step_years must be > 0"),
    ((2020, 2050, -1), "step_years must be > 0"),
    ((2020, 2050, float("nan")), "step_years must be > 0"),
    ((2020, 2020, 1), "end_year 2020 is not after start_year 2020"),
    ((2050, 2020, 1), "end_year 2020 is not after start_year 2050"),
])
def test_step_years_list_bad_inputs(args, phrase):
    # Common practice, no source: kernel messages name the parameter
    with pytest.raises(InputError, match=phrase):
        step_years_list(*args)


def test_run_records_step_years_snapshots_and_progress():
    op = SpreadOperator((1, 5), THREE)
    start = np.zeros((1, 5))
    start[0, 2] = 1.0
    calls = []
    res = _run(op, start, np.ones((1, 5)), _constant((1, 5)), end_year=2032, step_years=5,
               snapshot_years=[2021, 2030], progress=lambda i, n: calls.append((i, n)))
    assert isinstance(res, TransientResult)
    # Analytic: ceil(12 / 5) = 3 steps ending 2025, 2030, 2032
    assert res.years == [2025.0, 2030.0, 2032.0]
    assert calls == [(1, 3), (2, 3), (3, 3)]
    # Analytic: 2021 is recorded at the first step end after it (2025); 2030 on its step; the end year always
    assert sorted(res.snapshots) == [2021.0, 2030.0, 2032.0]
    ref = _run(op, start, np.ones((1, 5)), _constant((1, 5)), end_year=2025, step_years=5).final
    np.testing.assert_array_equal(res.snapshots[2021.0], ref)
    np.testing.assert_array_equal(res.snapshots[2032.0], res.final)


# ----------------------------------------------------------------------------- climate gating in time
def test_climate_is_taken_at_the_end_of_each_step():
    # Analytic: suitability of cell 1 rises linearly 0 -> 1 over 2020..2030, so it is >= 0.45 from
    # 2024.5 on; with 1-year steps the first step whose END year is suitable ends in 2025, and a
    # colonisation probability of 1 - exp(-1000 * 0.2) = 1 makes it occupied on that step.
    climate = ClimatePath([2020, 2030], [np.array([[1.0, 0.0]]), np.array([[1.0, 1.0]])])
    start = np.array([[1.0, 0.0]])
    res = _run(SpreadOperator((1, 2), THREE), start, np.ones((1, 2)), climate, threshold=0.45, rate=1000.0,
               snapshot_years=[2024, 2025])
    assert res.snapshots[2024.0][0, 1] == 0.0
    assert res.snapshots[2025.0][0, 1] == 1.0
    assert res.arrival_year[0, 1] == 2025.0 and res.arrival_year[0, 0] == 2020.0


def test_threshold_is_inclusive():
    # Analytic: suitable means suitability >= threshold (docstring), so a map equal to it is suitable
    start = np.array([[1.0, 0.0]])
    res = _run(SpreadOperator((1, 2), THREE), start, np.ones((1, 2)), _constant((1, 2), 0.5), threshold=0.5,
               end_year=2021, rate=2.0)
    assert res.final[0, 1] == pytest.approx(1 - np.exp(-2.0 * 0.2), rel=1e-12)


# ----------------------------------------------------------------------------- persistence
@pytest.mark.parametrize("lag", [0, 1, 3])
@pytest.mark.parametrize("stochastic", [False, True])
def test_occupied_cell_is_lost_after_more_than_lag_unsuitable_steps(lag, stochastic):
    # Analytic (docs/dispersal.md, spread step): phi = s once the cell has been unsuitable for MORE
    # than L consecutive steps, else 1. Climate suitable to 2025, unsuitable from 2026: the cell
    # survives the steps ending 2026 .. 2025 + L and is lost on the step ending 2026 + L.
    climate = _yearly({y: 1.0 if y <= 2025 else 0.0 for y in range(2020, 2036)})
    rngs = [np.random.default_rng(s) for s in range(3)] if stochastic else None
    res = _run(SpreadOperator((1, 1), np.array([[1.0]])), np.ones((1, 1)), np.ones((1, 1)), climate,
               end_year=2035, persistence_steps=lag, rngs=rngs, snapshot_years=range(2021, 2036))
    alive = [y for y, occ in sorted(res.snapshots.items()) if occ[0, 0] == 1.0]
    dead = [y for y, occ in sorted(res.snapshots.items()) if occ[0, 0] == 0.0]
    assert alive == [float(y) for y in range(2021, 2026 + lag)]
    assert dead == [float(y) for y in range(2026 + lag, 2036)]


def test_persistence_counts_steps_not_years_and_resets_when_suitable_again():
    # Analytic: with 2-year steps a lag of 2 steps outlasts 4 years of unsuitable climate
    years = {y: 1.0 if y <= 2024 else 0.0 for y in range(2020, 2041)}
    op, one = SpreadOperator((1, 1), np.array([[1.0]])), np.ones((1, 1))
    res = _run(op, one, one, _yearly(years), end_year=2040, step_years=2, persistence_steps=2,
               snapshot_years=[2028, 2030])
    assert res.snapshots[2028.0][0, 0] == 1.0   # unsuitable at step ends 2026, 2028: within the lag
    assert res.snapshots[2030.0][0, 0] == 0.0   # third unsuitable step: lost
    # Analytic: two unsuitable steps, one suitable, two unsuitable again: never more than 2 in a row
    pattern = [1, 0, 0, 1, 0, 0, 1, 0, 0, 1]
    flicker = _yearly({2020 + i: v for i, v in enumerate([1] + pattern)})
    res = _run(op, one, one, flicker, end_year=2030, persistence_steps=2)
    assert res.final[0, 0] == 1.0
    res = _run(op, one, one, flicker, end_year=2030, persistence_steps=1)
    assert res.final[0, 0] == 0.0


def test_no_lag_loses_a_cell_on_its_first_unsuitable_step():
    # Analytic: L = 0 gives phi = s, so p_{t+1} = p_t * 0 + (1 - p_t) * 0 = 0 on an unsuitable step
    climate = _yearly({2020: 1.0, 2021: 0.0, 2022: 1.0})
    one = np.ones((1, 1))
    res = _run(SpreadOperator((1, 1), np.array([[1.0]])), one, one, climate, end_year=2022)
    assert res.final[0, 0] == 0.0 and res.arrival_year[0, 0] == 2020.0


# ----------------------------------------------------------------------------- colonisation and habitat
@pytest.mark.parametrize("rate", [0.3, 1.0, 4.0])
@pytest.mark.parametrize("h", [1.0, 0.5])
def test_colonisation_probability_after_one_step(rate, h):
    # Analytic (Hanski 1994 form, docs/dispersal.md): an empty cell receiving pressure pi from one
    # occupied neighbour is colonised with c = 1 - exp(-R * pi * h * s); the source keeps p = 1.
    start = np.zeros((1, 5))
    start[0, 2] = 1.0
    habitat = np.full((1, 5), h)
    res = _run(SpreadOperator((1, 5), THREE), start, habitat, _constant((1, 5)), end_year=2021, rate=rate)
    c = 1.0 - np.exp(-rate * 0.2 * h)
    np.testing.assert_allclose(res.final, [[0.0, c, 1.0, c, 0.0]], rtol=1e-12, atol=0)


def test_stochastic_replicate_mean_matches_the_colonisation_probability():
    # Analytic: each replicate colonises the neighbour with probability c (independent Bernoulli), so the
    # share over N replicates has SD sqrt(c (1 - c) / N); 5 SD bounds a false failure below 1e-6.
    n = 4000
    rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(7).spawn(n)]
    start = np.array([[1.0, 0.0, 0.0]])
    res = _run(SpreadOperator((1, 3), THREE), start, np.ones((1, 3)), _constant((1, 3)), end_year=2021,
               rate=2.0, rngs=rngs)
    c = 1.0 - np.exp(-2.0 * 0.2)
    assert abs(res.final[0, 1] - c) < 5 * np.sqrt(c * (1 - c) / n)
    assert res.final[0, 0] == 1.0 and res.final[0, 2] == 0.0  # source kept; the far cell gets no pressure


def test_no_spread_into_zero_habitat_but_propagules_pass_over_it():
    # Analytic: c = 0 wherever h = 0 (habitat gates colonisation only); pressure still reaches the cell
    # beyond it, two cells from the source, through the kernel's outer weight.
    start = np.zeros((1, 5))
    start[0, 0] = 1.0
    habitat = np.array([[1.0, 0.0, 1.0, 0.0, 0.0]])
    kernel = np.array([[0.1, 0.15, 0.5, 0.15, 0.1]])
    res = _run(SpreadOperator((1, 5), kernel), start, habitat, _constant((1, 5)), end_year=2040, rate=3.0)
    assert res.final[0, 1] == 0.0 and res.final[0, 3] == 0.0 and res.final[0, 4] == 0.0
    assert res.final[0, 2] > 0.99
    assert np.isnan(res.arrival_year[0, 1]) and res.arrival_year[0, 2] > 2020


def test_unsuitable_and_nan_climate_block_colonisation():
    # Analytic: s = 0 gives c = 0; NaN suitability (no climate data) counts as unsuitable
    start = np.array([[1.0, 0.0, 0.0]])
    climate = ClimatePath([2020, 2100], [np.array([[1.0, 0.2, np.nan]])] * 2)
    kernel = np.array([[0.1, 0.2, 0.4, 0.2, 0.1]])
    res = _run(SpreadOperator((1, 3), kernel), start, np.ones((1, 3)), climate, rate=5.0)
    np.testing.assert_array_equal(res.final, [[1.0, 0.0, 0.0]])


def test_identity_kernel_gives_no_spread():
    # Analytic: a kernel with all weight on the source cell puts no pressure on empty cells
    rng = np.random.default_rng(3)
    start = (rng.random((6, 7)) < 0.3).astype(float)
    climate = _constant(start.shape)
    op = SpreadOperator(start.shape, np.array([[1.0]]))
    res = _run(op, start, np.ones(start.shape), climate, rate=10.0)
    np.testing.assert_array_equal(res.final, start)
    rngs = [np.random.default_rng(s) for s in range(4)]
    res = _run(op, start, np.ones(start.shape), climate, rate=10.0, rngs=rngs)
    np.testing.assert_array_equal(res.final, start)
    assert np.array_equal(np.isnan(res.arrival_year), start == 0)


def test_one_dimensional_run_equals_hand_iterated_convolution():
    # Source: NumPy numpy.convolve (mode "same", direct sums) and SciPy scipy.signal.fftconvolve,
    # iterated through p' = p * s + (1 - p) * (1 - exp(-R * (p (*) k) * h * s)) with s = 1.
    n, steps, rate = 41, 4, 1.7
    rng = np.random.default_rng(5)
    habitat = rng.uniform(0.2, 1.0, size=n)
    start = np.zeros(n)
    start[12], start[25] = 1.0, 0.6
    op = SpreadOperator((1, n), KERNEL_1D, pressure_floor=0.0)
    res = _run(op, start[None], habitat[None], _constant((1, n)), end_year=2020 + steps, rate=rate)
    for convolve in (lambda p: np.convolve(p, KERNEL_1D[0], mode="same"),
                     lambda p: signal.fftconvolve(p, KERNEL_1D[0], mode="same")):
        p = start.copy()
        for _ in range(steps):
            c = 1.0 - np.exp(-rate * np.maximum(convolve(p), 0.0) * habitat)
            p = p + (1.0 - p) * c
        np.testing.assert_allclose(res.final[0], p, rtol=0, atol=1e-12)
    # Analytic: a kernel of half-width 2 moves occupancy at most 2 cells per step
    assert np.all(res.final[0, :12 - 2 * steps] < 1e-12) and res.final[0, 12 - 2 * steps] > 0


def test_one_operator_per_replicate():
    # Analytic: replicate r uses operator r; with identical rngs the mean is the mean of separate runs
    start = np.array([[0.0, 1.0, 0.0]])
    ops = [SpreadOperator((1, 3), np.array([[1.0]])), SpreadOperator((1, 3), THREE)]
    climate, hab = _constant((1, 3)), np.ones((1, 3))
    both = _run(ops, start, hab, climate, end_year=2021, rate=50.0,
                rngs=[np.random.default_rng(0), np.random.default_rng(1)])
    # Analytic: the identity replicate cannot spread, so it stays equal to the start whatever its
    # draws; the other replicate, drawing from the same seeded stream, equals a run of its operator alone
    one = _run(ops[1], start, hab, climate, end_year=2021, rate=50.0, rngs=[np.random.default_rng(1)])
    np.testing.assert_array_equal(both.final, (start + one.final) / 2)


# ----------------------------------------------------------------------------- bad inputs
@pytest.mark.parametrize("change,phrase", [
    ({"threshold": 1.5}, "threshold must lie in"),
    ({"threshold": -0.1}, "threshold must lie in"),
    ({"threshold": float("nan")}, "threshold must lie in"),
    ({"step_years": 0}, "step_years must be > 0"),
    ({"end_year": 2020}, "end_year 2020 is not after start_year 2020"),
    ({"persistence_steps": -1}, "persistence_steps must be >= 0"),
    ({"rate": 0.0}, "rate must be > 0"),
    ({"start": np.zeros((2, 4))}, r"start occupancy has shape \(2, 4\), habitat \(2, 3\)"),
    ({"operators": "two"}, r"operators: 2 spread operators for 0 replicates"),
    ({"operators": "two", "rngs": [np.random.default_rng(0)] * 3}, "2 spread operators for 3 replicates"),
])
def test_bad_inputs_name_the_parameter(change, phrase):
    # Common practice, no source: one InputError line naming the parameter and what was expected
    kw = {"threshold": 0.5, "start_year": 2020, "end_year": 2030, "step_years": 1.0, "rate": 1.0}
    op = SpreadOperator((2, 3), THREE)
    start = change.pop("start", np.zeros((2, 3)))
    ops = [op, op] if change.pop("operators", None) == "two" else op
    kw.update(change)
    with pytest.raises(InputError, match=phrase):
        run_transient(ops, start, np.ones((2, 3)), _constant((2, 3)), **kw)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_suitable_at_equals_thresholding_the_interpolated_map(dtype, monkeypatch):
    # Exact equality with the former code path (``at(year) >= threshold``, then 0/1 in the
    # path's dtype), computed in blocks of 2 rows here so the blocks' seams are crossed.
    import envelope.kernels.rowblocks as rowblocks

    monkeypatch.setattr(rowblocks, "ROW_BLOCK_CELLS", 10)
    rng = np.random.default_rng(5)
    maps = [rng.random((9, 5)), rng.random((9, 5)), rng.random((9, 5))]
    maps[1][2, 3] = np.nan
    path = ClimatePath([2020, 2050, 2080], maps, dtype=dtype)
    for year in (2000, 2020, 2031.5, 2050, 2064.25, 2080, 2120):
        for threshold in (0.0, 0.3, 0.7, 1.0):
            want = (path.at(year) >= threshold).astype(dtype)
            got = path.suitable_at(year, threshold)
            assert got.dtype == np.dtype(dtype)
            np.testing.assert_array_equal(got, want)
