"""The spread step: FFT pressure against direct convolution, round-off floor, gating, Jensen bound."""

import numpy as np
import pytest
from scipy import ndimage, signal

from envelope.errors import InputError
from envelope.kernels.dispersal import discretise_kernel, latitude_band_kernels
from envelope.kernels.spread import SpreadOperator


def _ones(shape):
    return np.ones(shape)


@pytest.mark.parametrize("kind,shape,dx,dy", [("exponential", None, 1.0, 1.0), ("gaussian", None, 1.0, 1.7),
                                                ("2dt", 3.0, 1.3, 1.0)])
def test_fft_pressure_matches_direct_convolution(kind, shape, dx, dy):
    # Source: scipy.signal.convolve(method="direct") and scipy.ndimage.convolve (zero padding).
    rng = np.random.default_rng(1)
    k = discretise_kernel(kind, 2.0, shape, cell_dx_km=dx, cell_dy_km=dy, tail_tolerance=1e-4)
    occ = rng.random((37, 53)) * (rng.random((37, 53)) < 0.3)
    op = SpreadOperator(occ.shape, k, pressure_floor=0.0)
    got = op.pressure(occ)
    ref = signal.convolve(occ, k, mode="same", method="direct")
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(got, ndimage.convolve(occ, k, mode="constant", cval=0.0), rtol=0, atol=1e-12)
    # Leading replicate axes are convolved independently.
    batch = op.pressure(np.stack([occ, occ[::-1]]))
    np.testing.assert_allclose(batch[1], signal.convolve(occ[::-1], k, mode="same", method="direct"), atol=1e-12)


@pytest.mark.parametrize("shape", [(13, 29), (29, 13), (1, 40)])
def test_domain_sized_kernel_pressure_matches_direct_convolution(shape):
    # Source: scipy.signal.convolve(method="direct"). A kernel reaching ny - 1 rows and nx - 1
    # columns (every pair of cells) is convolved on a padding of only grid + half-kernel per axis.
    ny, nx = shape
    k = discretise_kernel("2dt", 3.0, 3.0, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=1e-12,
                          support_cells=(ny - 1, nx - 1), normalise=False)
    assert k.shape == (2 * ny - 1, 2 * nx - 1)
    occ = np.random.default_rng(5).random(shape)
    got = SpreadOperator(shape, k, pressure_floor=0.0).pressure(occ)
    np.testing.assert_allclose(got, signal.convolve(occ, k, mode="same", method="direct"), rtol=0, atol=1e-14)


def _exact_pressure(occ, k):
    # Direct sums of positive terms (np.convolve row by row): relative error ~1e-15 even where
    # the pressure is far below the FFT round-off, which is absolute (~1e-16 of the largest value).
    ny, nx = occ.shape
    hy, hx = k.shape[0] // 2, k.shape[1] // 2
    out = np.zeros(occ.shape)
    for i in range(ny):
        for src in range(ny):
            out[i] += np.convolve(occ[src], k[i - src + hy])[hx:hx + nx]
    return out


def test_domain_sized_fat_tailed_kernel_adds_no_spurious_far_field_pressure():
    # Source: exact direct summation (above). A 2Dt kernel spanning the whole strip seeds every
    # cell with a real tail pressure; the FFT must not add any of its own: every pressure the FFT
    # keeps above the 1e-12 floor is real (within 1e-3 of the exact value, whose own error is
    # ~1e-15 relative) and every cell it floors to 0 has an exact pressure at or below the floor.
    shape, rate = (12, 400), 1.0
    k = discretise_kernel("2dt", 4.0, 3.0, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=1e-12,
                          support_cells=(shape[0] - 1, shape[1] - 1), normalise=False)
    op = SpreadOperator(shape, k)
    p = np.zeros(shape)
    p[:, :5] = 1.0
    ones = np.ones(shape)
    floor = op.pressure_floor
    checked = 0
    for step in range(25):
        if step % 6 == 0:
            got, ref = op.pressure(p), _exact_pressure(p, k)
            kept = got > 0
            np.testing.assert_allclose(got[kept], ref[kept], rtol=1e-3)
            assert np.all(ref[~kept] <= floor * (1 + 1e-3))
            assert np.all(kept[ref > floor * (1 + 1e-3)])  # and it drops no real pressure
            checked += int((ref < 1e-6).sum())
        p = op.step(p, ones, ones, rate, check=False)
    assert checked > 1000  # the far field, where the kernel tail is tiny, was part of the check
    # Analytic: the start block's tail pressure at the far end, about 60 k(395 km) = 7e-12, is
    # above the floor, so the domain-sized kernel reaches it from the first step.
    assert p[:, -1].min() > 0


def test_edge_absorbs_no_wraparound():
    # Source: analytic -- with zero padding the mass leaving the grid is lost, not wrapped.
    k = discretise_kernel("gaussian", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    occ = np.zeros((30, 30))
    occ[15, 0] = 1.0
    p = SpreadOperator(occ.shape, k, pressure_floor=0.0).pressure(occ)
    assert np.all(p[:, -5:] < 1e-15)
    half = k[:, k.shape[1] // 2:].sum()  # the kernel columns that land inside the grid
    assert p.sum() == pytest.approx(half, abs=1e-12)


def test_latitude_band_pressure_matches_per_band_direct_convolution():
    # Source: scipy.ndimage.convolve of the whole grid with each band's kernel, band rows kept.
    lats = 72.0 - 0.25 * (np.arange(48) + 0.5)
    bands = latitude_band_kernels("exponential", 15.0, lat_centres_deg=lats, dlon_deg=0.25, dlat_deg=0.25,
                                  band_tolerance=0.03, tail_tolerance=1e-4)
    assert len(bands) >= 3
    rng = np.random.default_rng(2)
    occ = (rng.random((48, 40)) < 0.1).astype(float)
    got = SpreadOperator(occ.shape, bands, pressure_floor=0.0).pressure(occ)
    for r0, r1, k in bands:
        ref = ndimage.convolve(occ, k, mode="constant")[r0:r1]
        np.testing.assert_allclose(got[r0:r1], ref, atol=1e-12)


def test_round_off_floor_keeps_cells_beyond_reach_exactly_empty():
    # Source: REFERENCES item 8 (FFT round-off ~1e-16 grows like R^t and swamps the front).
    k = discretise_kernel("gaussian", 1.0, cell_dx_km=1.0, cell_dy_km=1.0)
    half_width = k.shape[1] // 2
    shape, steps, rate = (24, 1000), 200, 5.0
    start = np.zeros(shape)
    start[:, :10] = 1.0
    reach = 10 + steps * half_width  # no propagule can travel farther than this in `steps`
    assert reach < shape[1] - 50
    results = {}
    for floor in (0.0, None):
        op = SpreadOperator(shape, k, pressure_floor=floor)
        p = start
        for _ in range(steps):
            p = op.step(p, _ones(shape), _ones(shape), rate)
        results[floor] = p
    assert results[0.0][:, reach:].max() > 1e-3  # noise has grown into false colonisation
    assert np.all(results[None][:, reach:] == 0.0)
    assert results[None][12, 100] > 0.99  # the real front did advance


def test_habitat_gap_wider_than_kernel_is_never_crossed():
    # Source: analytic -- a truncated kernel cannot carry propagules past its radius.
    k = discretise_kernel("exponential", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    h = k.shape[1] // 2
    shape = (20, 200)
    for gap, crossed in ((h + 1, False), (h - 3, True)):
        habitat = np.ones(shape)
        habitat[:, 60:60 + gap] = 0.0
        p = np.zeros(shape)
        p[:, :5] = 1.0
        op = SpreadOperator(shape, k)
        for _ in range(60):
            p = op.step(p, habitat, _ones(shape), 3.0)
        assert p[:, 55:60].min() > 0.9  # the front reached the gap
        assert np.all(p[:, 60:60 + gap] == 0.0)  # habitat 0 is never colonised
        if crossed:
            assert p[:, 60 + gap:].max() > 0.5
        else:
            assert np.all(p[:, 60 + gap:] == 0.0)


def test_no_habitat_no_colonisation():
    # Source: analytic (habitat 0 => colonisation probability 0).
    k = discretise_kernel("gaussian", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    p = np.zeros((15, 15))
    p[7, 7] = 1.0
    op = SpreadOperator(p.shape, k)
    q = op.step(p, np.zeros_like(p), _ones(p.shape), 10.0)
    np.testing.assert_array_equal(q, p)
    q = op.step(p, np.zeros_like(p), _ones(p.shape), 10.0, rng=np.random.default_rng(0))
    np.testing.assert_array_equal(q, p)


@pytest.mark.parametrize("stochastic", [False, True])
def test_unsuitable_climate_kills_with_and_without_lag(stochastic):
    # Source: analytic (persistence rule of the model, docs/dispersal.md).
    k = discretise_kernel("gaussian", 1.0, cell_dx_km=1.0, cell_dy_km=1.0)
    shape = (10, 10)
    occ = np.ones(shape)
    hostile = np.zeros(shape)
    rng = np.random.default_rng(3) if stochastic else None
    op = SpreadOperator(shape, k)
    assert np.all(op.step(occ, _ones(shape), hostile, 2.0, rng) == 0.0)
    counter = np.zeros(shape, dtype=np.int32)
    p = occ
    history = []
    for _ in range(3):
        p = op.step(p, _ones(shape), hostile, 2.0, rng, persistence_lag=2, unsuitable_steps=counter)
        history.append(p.max())
    assert history == [1.0, 1.0, 0.0]  # survives the lag of 2 steps, lost at the third
    # A suitable step resets the counter.
    counter[:] = 0
    p = occ
    for suit in (hostile, hostile, _ones(shape), hostile, hostile):
        p = op.step(p, _ones(shape), suit, 2.0, rng, persistence_lag=2, unsuitable_steps=counter)
    assert p.min() == 1.0


def test_jensen_bound_and_monte_carlo_rate():
    # Source: Jensen's inequality for the concave, increasing map pressure -> 1 - exp(-R pressure),
    # with positive association of monotone Bernoulli updates (Harris, T.E. (1977) A correlation
    # inequality for Markov processes in partially ordered state spaces. Ann. Probab. 5: 451-454):
    # E[stochastic occupancy] <= deterministic expected occupancy, step by step.
    k = discretise_kernel("exponential", 1.0, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=1e-4)
    shape, steps, rate = (11, 11), 4, 1.5
    start = np.zeros(shape)
    start[5, 5] = 1.0
    op = SpreadOperator(shape, k)
    det = start
    for _ in range(steps):
        det = op.step(det, _ones(shape), _ones(shape), rate)
    n_total = 32768
    rep = np.broadcast_to(start, (n_total,) + shape).copy()
    rng = np.random.default_rng(20240601)
    for _ in range(steps):
        rep = op.step(rep, _ones(shape), _ones(shape), rate, rng=rng)
    mean = rep.mean(axis=0)
    se = np.sqrt(mean * (1 - mean) / n_total) + 1e-12
    assert np.max((mean - det) / se) < 4.0  # never above the deterministic value beyond MC error
    assert mean.sum() < det.sum() - 4 * np.sqrt(np.sum(se ** 2))  # and the Jensen gap is real
    # Replicate-mean error against an independent large-N mean shrinks like 1/sqrt(N).
    # Source: central limit theorem (common practice, no source for the tolerance).
    reference = rep[n_total // 2:].mean(axis=0)
    pool = rep[: n_total // 2]
    sizes = np.array([16, 64, 256, 1024])
    errors = []
    for n in sizes:
        groups = pool[: (pool.shape[0] // n) * n].reshape(-1, n, *shape).mean(axis=1)
        errors.append(np.sqrt(np.mean((groups - reference) ** 2)))
    slope = np.polyfit(np.log(sizes), np.log(errors), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.06)


def test_replicate_generators_are_reproducible():
    # Common practice, no source: one Generator per replicate (SeedSequence.spawn).
    k = discretise_kernel("gaussian", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    p = np.zeros((3, 20, 20))
    p[:, 10, 10] = 1.0
    op = SpreadOperator((20, 20), k)
    runs = []
    for _ in range(2):
        gens = [np.random.default_rng(s) for s in np.random.SeedSequence(7).spawn(3)]
        runs.append(op.step(p, _ones((20, 20)), _ones((20, 20)), 5.0, rng=gens))
    np.testing.assert_array_equal(runs[0], runs[1])
    assert set(np.unique(runs[0])) <= {0.0, 1.0}
    assert not np.array_equal(runs[0][0], runs[0][1])


def test_float32_pressure_error_bound():
    # Source: scipy.signal.convolve(method="direct") in float64; float32 FFT error ~1e-7, below its 1e-5 floor.
    rng = np.random.default_rng(4)
    k = discretise_kernel("exponential", 3.0, cell_dx_km=1.0, cell_dy_km=1.0)
    occ = (rng.random((64, 64)) < 0.5).astype(float)
    got = SpreadOperator(occ.shape, k, dtype=np.float32, pressure_floor=0.0).pressure(occ)
    assert got.dtype == np.float32
    ref = signal.convolve(occ, k, mode="same", method="direct")
    assert np.max(np.abs(got - ref)) < 1e-6


@pytest.mark.parametrize("call,match", [
    (lambda op, o: op.step(o, np.full(o.shape, 1.5), np.ones(o.shape), 1.0), r"habitat must lie in \[0, 1\]"),
    (lambda op, o: op.step(o, np.full(o.shape, -0.1), np.ones(o.shape), 1.0), r"habitat must lie in \[0, 1\]"),
    (lambda op, o: op.step(o, np.full(o.shape, np.nan), np.ones(o.shape), 1.0), r"habitat .*fill nodata"),
    (lambda op, o: op.step(o, np.ones(o.shape), np.full(o.shape, 2.0), 1.0), r"suitable must lie in \[0, 1\]"),
    (lambda op, o: op.step(o, np.ones(o.shape), np.ones(o.shape), -1.0), r"rate must be > 0, got -1"),
    (lambda op, o: op.step(o, np.ones((3, 3)), np.ones(o.shape), 1.0), r"habitat has shape \(3, 3\)"),
    (lambda op, o: op.step(o, np.ones(o.shape), np.ones(o.shape), 1.0, persistence_lag=2), r"unsuitable_steps"),
    (lambda op, o: op.pressure(np.ones((4, 4))), r"occupancy has grid shape"),
    (lambda op, o: SpreadOperator((10, 10), np.ones((4, 5))), r"kernel must be a 2-D array with odd sides"),
    (lambda op, o: SpreadOperator((10, 10), [(0, 4, np.ones((3, 3))), (5, 10, np.ones((3, 3)))]),
     r"latitude bands must cover rows"),
])
def test_bad_input(call, match):
    # Common practice, no source: InputError naming the parameter.
    k = discretise_kernel("gaussian", 1.0, cell_dx_km=1.0, cell_dy_km=1.0)
    occ = np.zeros((10, 10))
    op = SpreadOperator(occ.shape, k)
    with pytest.raises(InputError, match=match):
        call(op, occ)


def test_periodic_x_matches_scipy_wrapped_convolution():
    # Source: scipy.signal.convolve2d of the occupancy padded by wrapping in x (np.pad mode="wrap") and
    # zeros in y, mode="valid" -- a circular convolution in x, linear (absorbing) in y
    from scipy.signal import convolve2d

    from envelope.kernels.spread import SpreadOperator

    rng = np.random.default_rng(4)
    ny, nx = 9, 12
    kernel = rng.uniform(size=(5, 7))
    kernel /= kernel.sum()
    occ = (rng.uniform(size=(ny, nx)) > 0.8).astype(float)
    hy, hx = 2, 3
    padded = np.pad(np.pad(occ, ((0, 0), (hx, hx)), mode="wrap"), ((hy, hy), (0, 0)))
    expected = convolve2d(padded, kernel, mode="valid")
    op = SpreadOperator((ny, nx), kernel, periodic_x=True, pressure_floor=0.0)
    np.testing.assert_allclose(op.pressure(occ), expected, atol=1e-12)
    # a kernel wider than the grid folds round the circle: all its mass stays on the ring of columns
    wide = np.ones((1, 2 * nx + 1)) / (2 * nx + 1)
    ring = SpreadOperator((1, nx), wide, periodic_x=True, pressure_floor=0.0)
    one = np.zeros((1, nx))
    one[0, 0] = 1.0
    assert ring.pressure(one).sum() == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_step_in_row_blocks_equals_the_whole_grid_formula(dtype, monkeypatch):
    # Exact equality with the former code path: p' = c + p (phi - c) on whole grids, where
    # c = 1 - exp(-R pressure h s); the step now writes it over c a block of rows at a time
    # (3 rows here, so the seams are crossed; 20 rows do not divide evenly).
    import envelope.kernels.rowblocks as rowblocks

    monkeypatch.setattr(rowblocks, "ROW_BLOCK_CELLS", 3 * 11)
    rng = np.random.default_rng(8)
    k = discretise_kernel("exponential", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    occ = (rng.random((20, 11)) * (rng.random((20, 11)) < 0.4)).astype(dtype)
    hab, suit = rng.random((20, 11)).astype(dtype), (rng.random((20, 11)) < 0.8).astype(dtype)
    op = SpreadOperator(occ.shape, k, dtype=dtype)
    c = op.pressure(occ)
    c *= -1.5
    c *= hab
    c *= suit
    np.expm1(c, out=c)
    np.negative(c, out=c)
    want = suit - c
    want *= occ
    want += c
    got = op.step(occ, hab, suit, 1.5)
    assert got.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(got, want)
    # replicates along a leading axis
    both = op.step(np.stack([occ, occ]), hab, suit, 1.5)
    np.testing.assert_array_equal(both[1], want)
