"""Dispersal kernels: closed forms, cell integration and latitude bands against outside references."""

import math

import numpy as np
import pytest
from pyproj import Geod
from scipy import integrate, special

from envelope.errors import InputError
from envelope.kernels.dispersal import (
    cell_size_km,
    discretise_kernel,
    integrate_cells,
    kernel_density,
    kernel_mean,
    kernel_scale,
    kernel_survival,
    latitude_band_kernels,
    rectangle_tail_mass,
    sample_distances,
    truncation_radius_km,
)

KINDS = [("exponential", None), ("gaussian", None), ("2dt", 2.0), ("2dt", 3.0), ("2dt", 5.0)]


@pytest.mark.parametrize("kind,shape", KINDS)
def test_density_integrates_to_one_and_has_the_requested_mean(kind, shape):
    # Source: REFERENCES item 7 (normalisation int 2 pi r k(r) dr = 1; scipy.integrate.quad).
    mean = 2.7
    total, _ = integrate.quad(lambda r: 2 * math.pi * r * kernel_density(kind, r, mean, shape), 0, np.inf,
                              epsabs=1e-13, epsrel=1e-12, limit=500)
    assert total == pytest.approx(1.0, abs=1e-9)
    m, _ = integrate.quad(lambda r: 2 * math.pi * r * r * kernel_density(kind, r, mean, shape), 0, np.inf,
                          epsabs=1e-12, epsrel=1e-12, limit=500)
    assert m == pytest.approx(mean, rel=1e-8)


@pytest.mark.parametrize("kind,shape,scale,mean", [
    # Source: REFERENCES item 7, check values for a = 3.
    ("exponential", None, 3.0, 6.0),
    ("gaussian", None, 3.0, 2.6586808),
    ("gaussian", None, 2.0 * math.sqrt(2.0), 2.5066283),  # sigma = 2, a = sqrt(2) sigma
    ("2dt", 2.0, 3.0, 4.7123890),
    ("2dt", 3.0, 3.0, 2.3561945),
    ("2dt", 5.0, 3.0, 1.4726216),
    ("2dt", 2.5, 2.0, 2.0),  # Clark 1999 form u = 4, p = 1.5 maps to a = 2, b = p + 1
])
def test_mean_distance_table(kind, shape, scale, mean):
    assert kernel_mean(kind, scale, shape) == pytest.approx(mean, abs=5e-8)
    assert kernel_scale(kind, mean, shape) == pytest.approx(scale, rel=5e-8)


@pytest.mark.parametrize("kind,shape,scale,survival", [
    # Source: REFERENCES item 7, P(r > 5) for a = 3.
    ("exponential", None, 3.0, 0.5036683),
    ("gaussian", None, 3.0, 0.0621765),
    ("2dt", 3.0, 3.0, 0.0700692),
])
def test_survival_table(kind, shape, scale, survival):
    mean = kernel_mean(kind, scale, shape)
    assert float(kernel_survival(kind, 5.0, mean, shape)) == pytest.approx(survival, abs=5e-8)


@pytest.mark.parametrize("kind,median_over_a", [("exponential", 1.678347), ("gaussian", math.sqrt(math.log(2)))])
def test_median_distance(kind, median_over_a):
    # Source: REFERENCES item 7 (exponential median 1.678347a, Gaussian a sqrt(ln 2)).
    mean = kernel_mean(kind, 3.0)
    assert float(kernel_survival(kind, 3.0 * median_over_a, mean)) == pytest.approx(0.5, abs=1e-6)


@pytest.mark.parametrize("kind,shape", KINDS)
def test_truncation_radius_solves_the_survival_function(kind, shape):
    # Source: analytic (survival function of REFERENCES item 7).
    for tol in (1e-3, 1e-6, 1e-9):
        radius = truncation_radius_km(kind, 1.5, shape, tol)
        assert float(kernel_survival(kind, radius, 1.5, shape)) == pytest.approx(tol, rel=1e-9)


@pytest.mark.parametrize("kind,shape", [("exponential", None), ("gaussian", None), ("2dt", 3.0), ("2dt", 5.0)])
def test_monte_carlo_mean_of_sampled_distances(kind, shape):
    # Source: REFERENCES item 7 (sampling hint; ~1e-3 relative for 1e6 draws).
    rng = np.random.default_rng(12345)
    r = sample_distances(kind, 1_000_000, rng, 4.0, shape)
    assert r.mean() == pytest.approx(4.0, rel=1e-3 if shape != 3.0 else 2e-3)  # 2Dt b = 3 has a heavy variance
    # The empirical tail matches the analytic survival function at the median-ish radius.
    radius = 4.0
    assert np.mean(r > radius) == pytest.approx(float(kernel_survival(kind, radius, 4.0, shape)), abs=2e-3)


@pytest.mark.filterwarnings("ignore::scipy.integrate.IntegrationWarning")  # dblquad at its round-off limit
@pytest.mark.parametrize("kind,shape", [("exponential", None), ("gaussian", None), ("2dt", 3.0), ("2dt", 2.0)])
@pytest.mark.parametrize("rect", [(-0.5, 0.5, -0.7, 0.7), (0.5, 1.5, -0.7, 0.7), (1.5, 2.5, 2.1, 3.5),
                                  (-0.5, 0.5, 0.7, 2.1), (6.5, 7.5, -4.9, -3.5)])
def test_cell_integral_matches_dblquad(kind, shape, rect):
    # Source: scipy.integrate.dblquad of the density over the cell (anisotropic 1.0 x 1.4 km cells;
    # the first rectangle is the source cell, where the exponential peaks).
    x0, x1, y0, y1 = rect
    mean = 1.3
    got = float(integrate_cells(kind, mean, shape, x0=x0, x1=x1, y0=y0, y1=y1))
    ref, _ = integrate.dblquad(lambda y, x: kernel_density(kind, math.hypot(x, y), mean, shape),
                               x0, x1, y0, y1, epsabs=1e-14, epsrel=1e-11)
    assert got == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("kind,shape", [("exponential", None), ("gaussian", None), ("2dt", 3.0)])
def test_discretised_kernel_mass_and_mean(kind, shape):
    # Source: REFERENCES item 7 (mean; survival at the truncation radius).
    mean, tol = 10.0, 1e-6
    raw = discretise_kernel(kind, mean, shape, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=tol, normalise=False)
    # Captured mass: at least 1 - P(r > R) (the cells cover the disc), at most 1.
    assert 1.0 - tol <= raw.sum() <= 1.0
    w = discretise_kernel(kind, mean, shape, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=tol)
    ny, nx = w.shape
    assert ny % 2 == 1 and nx % 2 == 1
    assert w[ny // 2, nx // 2] == w.max()
    assert np.allclose(w, w[::-1, :]) and np.allclose(w, w[:, ::-1]) and np.allclose(w, w.T)
    y, x = np.mgrid[:ny, :nx]
    centre_mean = float(np.sum(w * np.hypot(x - nx // 2, y - ny // 2)))
    # Distances to cell centres differ from the true within-cell distances by O((cell/mean)^2)
    # and the truncated tail removes < tol * R of mean: 1% is ample at 10 cells per mean distance.
    assert centre_mean == pytest.approx(mean, rel=0.01)


def test_discretised_kernel_anisotropic_cells():
    # Source: analytic additivity -- a 1 x 2 km cell holds the mass of the 1 x 1 km halves it covers.
    fine = discretise_kernel("gaussian", 4.0, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=1e-9, normalise=False)
    coarse = discretise_kernel("gaussian", 4.0, cell_dx_km=1.0, cell_dy_km=2.0, tail_tolerance=1e-9, normalise=False)
    assert coarse.shape[0] < coarse.shape[1]
    cy, cx = coarse.shape[0] // 2, coarse.shape[1] // 2
    fy, fx = fine.shape[0] // 2, fine.shape[1] // 2
    # Coarse cell (row 1, column 2) spans x 1.5..2.5, y 1..3 km.
    got = coarse[cy + 1, cx + 2]
    ref = float(integrate_cells("gaussian", 4.0, x0=1.5, x1=2.5, y0=1.0, y1=3.0))
    assert got == pytest.approx(ref, rel=1e-12)
    halves = sum(float(integrate_cells("gaussian", 4.0, x0=1.5, x1=2.5, y0=y0, y1=y0 + 1.0)) for y0 in (1.0, 2.0))
    assert got == pytest.approx(halves, rel=1e-12)
    assert fine[fy, fx + 2] == pytest.approx(float(integrate_cells("gaussian", 4.0, x0=1.5, x1=2.5, y0=-0.5, y1=0.5)),
                                             rel=1e-12)


def test_max_radius_cells_caps_the_kernel():
    # Common practice, no source: a memory guard.
    w = discretise_kernel("2dt", 3.0, 2.0, cell_dx_km=1.0, cell_dy_km=1.0, max_radius_cells=20)
    assert w.shape == (41, 41)
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert w[0, 0] == 0.0  # corner lies beyond the capped (disc) radius


@pytest.mark.parametrize("w,h", [(3.0, 3.0), (5.0, 2.0), (12.0, 40.0)])
def test_rectangle_tail_mass_of_the_gaussian_is_one_minus_the_product_of_erfs(w, h):
    # Analytic: the Gaussian kernel has independent axes with SD a/sqrt 2, so
    # P(|x| <= W and |y| <= H) = erf(W/a) erf(H/a); written as erfc terms to keep tiny tails exact.
    mean = 4.0
    a = kernel_scale("gaussian", mean)
    ew, eh = special.erfc(w / a), special.erfc(h / a)
    ref = ew + eh - ew * eh
    assert rectangle_tail_mass("gaussian", mean, half_width_km=w, half_height_km=h) == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("kind,shape", [("exponential", None), ("2dt", 3.0), ("2dt", 1.7)])
def test_rectangle_tail_mass_against_double_integral(kind, shape):
    # Source: scipy.integrate.dblquad of the density over the rectangle (1 minus it; in polar
    # coordinates, a quarter of it by symmetry, so the exponential's cusp at r = 0 is harmless),
    # and the bounds S(diagonal) <= tail <= S(short half-side) from the discs inside and around it.
    mean, w, h = 3.0, 4.0, 6.5

    def edge(t):  # distance from the centre to the rectangle's edge in direction t
        return min(w / math.cos(t), h / math.sin(t)) if 0 < t < math.pi / 2 else (w if t <= 0 else h)

    quarter, _ = integrate.dblquad(lambda r, t: r * float(kernel_density(kind, r, mean, shape)),
                                   0.0, math.pi / 2, 0.0, edge, epsabs=1e-12, epsrel=1e-9)
    inside = 4.0 * quarter
    got = rectangle_tail_mass(kind, mean, shape, half_width_km=w, half_height_km=h)
    assert got == pytest.approx(1.0 - inside, rel=1e-6)
    assert kernel_survival(kind, math.hypot(w, h), mean, shape) < got < kernel_survival(kind, w, mean, shape)


@pytest.mark.parametrize("kind,shape,tol", [("exponential", None, 1e-6), ("gaussian", None, 1e-9), ("2dt", 3.0, 1e-4)])
def test_discretised_tail_mass_is_the_mass_left_out(kind, shape, tol):
    # Source: the cell integrals (checked against dblquad above): weights before normalisation and
    # the reported tail mass add up to 1, and the tail is at most the tolerance (cells straddling
    # the disc's edge are kept whole, so the kept cells cover the disc; REFERENCES item 7).
    w, tail = discretise_kernel(kind, 5.0, shape, cell_dx_km=1.0, cell_dy_km=1.3, tail_tolerance=tol,
                                normalise=False, return_tail_mass=True)
    assert w.sum() + tail == pytest.approx(1.0, abs=1e-12)
    assert 0.0 < tail <= tol
    plain = discretise_kernel(kind, 5.0, shape, cell_dx_km=1.0, cell_dy_km=1.3, tail_tolerance=tol, normalise=False)
    np.testing.assert_array_equal(plain, w)


def test_support_cells_clip_the_disc_to_the_domain():
    # Analytic: a support of (ny - 1, nx - 1) cells is a rectangle of half-sides (nx - 1/2) dx and
    # (ny - 1/2) dy when the disc is larger; its tail mass is rectangle_tail_mass of those sides.
    ny, nx, dx, dy = 12, 30, 1.0, 1.5
    w, tail = discretise_kernel("2dt", 4.0, 3.0, cell_dx_km=dx, cell_dy_km=dy, tail_tolerance=1e-12,
                                normalise=False, support_cells=(ny - 1, nx - 1), return_tail_mass=True)
    assert w.shape == (2 * ny - 1, 2 * nx - 1)
    assert np.all(w > 0)  # no disc cut inside the rectangle
    ref = rectangle_tail_mass("2dt", 4.0, 3.0, half_width_km=(nx - 0.5) * dx, half_height_km=(ny - 0.5) * dy)
    assert tail == pytest.approx(ref, rel=1e-10)
    assert w.sum() + tail == pytest.approx(1.0, abs=1e-12)
    # A disc smaller than the rectangle is left alone.
    small = discretise_kernel("exponential", 2.0, cell_dx_km=dx, cell_dy_km=dy, support_cells=(ny - 1, nx - 1))
    np.testing.assert_array_equal(small, discretise_kernel("exponential", 2.0, cell_dx_km=dx, cell_dy_km=dy))
    with pytest.raises(InputError, match="support_cells"):
        discretise_kernel("exponential", 2.0, cell_dx_km=dx, cell_dy_km=dy, support_cells=(-1, 3))


def test_latitude_bands_report_each_band_tail_mass():
    # Source: discretise_kernel with each band's cell sizes (cell_size_km at the band's middle).
    lats = 70.0 - 0.5 * (np.arange(40) + 0.5)
    bands, tails = latitude_band_kernels("2dt", 20.0, 3.0, lat_centres_deg=lats, dlon_deg=0.5, dlat_deg=0.5,
                                         tail_tolerance=1e-12, normalise=False, support_cells=(39, 29),
                                         return_tail_mass=True)
    assert len(tails) == len(bands) > 1
    for (r0, r1, kernel), tail in zip(bands, tails):
        mid = 0.5 * (lats[r0] + lats[r1 - 1])
        bdx, bdy = cell_size_km(mid, 0.5, 0.5)
        ref = rectangle_tail_mass("2dt", 20.0, 3.0, half_width_km=29.5 * float(bdx), half_height_km=39.5 * float(bdy))
        assert kernel.shape == (79, 59)
        assert tail == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("lat", [0.0, 30.0, 59.5, 80.0, -45.0])
def test_cell_size_matches_pyproj_geodesics(lat):
    # Source: pyproj.Geod(ellps="WGS84"): a meridian arc is a geodesic; a short E-W hop along
    # a parallel differs from the geodesic by O(dlon^2).
    geod = Geod(ellps="WGS84")
    h = 1e-3
    dx, dy = cell_size_km(lat, h, h)
    _, _, d_ew = geod.inv(0.0, lat, h, lat)
    _, _, d_ns = geod.inv(0.0, lat - h / 2, 0.0, lat + h / 2)
    assert float(dx) == pytest.approx(d_ew / 1000.0, rel=1e-8)
    assert float(dy) == pytest.approx(d_ns / 1000.0, rel=1e-9)


def test_latitude_bands_partition_rows_and_respect_tolerance():
    # Source: cell sizes from the WGS84 radii (checked against pyproj above); grouping rule of the contract.
    lats = 70.0 - 0.5 * (np.arange(120) + 0.5)  # 70N down to 10N, row 0 = north
    tol = 0.05
    bands = latitude_band_kernels("exponential", 20.0, lat_centres_deg=lats, dlon_deg=0.5, dlat_deg=0.5,
                                  band_tolerance=tol)
    assert bands[0][0] == 0 and bands[-1][1] == lats.size
    for (_, stop, _), (start, _, _) in zip(bands[:-1], bands[1:]):
        assert stop == start
    dx, _ = cell_size_km(lats, 0.5, 0.5)
    widths = []
    for r0, r1, kernel in bands:
        assert dx[r0:r1].max() / dx[r0:r1].min() - 1 < tol
        assert kernel.sum() == pytest.approx(1.0, abs=1e-12)
        widths.append(kernel.shape[1])
    # Cells narrow polewards, so the northern kernels span more columns.
    assert widths[0] > widths[-1]
    assert len(bands) > 3


@pytest.mark.parametrize("call,match", [
    (lambda: kernel_scale("exponential", -1.0), r"mean_distance_km must be > 0, got -1"),
    (lambda: kernel_scale("gaussian", 0.0), r"mean_distance_km must be > 0"),
    (lambda: kernel_scale("2dt", 2.0, 1.5), r"shape must be > 1\.5"),
    (lambda: kernel_scale("2dt", 2.0, 1.2), r"shape must be > 1\.5.*got 1\.2"),
    (lambda: kernel_scale("2dt", 2.0), r"shape is required"),
    (lambda: kernel_scale("gaussian", 2.0, 3.0), r"shape applies only to kernel .2dt."),
    (lambda: kernel_scale("cauchy", 2.0), r"kernel must be one of exponential, gaussian, 2dt, got 'cauchy'"),
    (lambda: discretise_kernel("gaussian", 2.0, cell_dx_km=1, cell_dy_km=1, tail_tolerance=0.0), r"tail_tolerance"),
    (lambda: discretise_kernel("gaussian", 2.0, cell_dx_km=1, cell_dy_km=1, tail_tolerance=0.2), r"tail_tolerance"),
    (lambda: discretise_kernel("gaussian", 2.0, cell_dx_km=0, cell_dy_km=1), r"cell_dx_km must be > 0"),
    (lambda: kernel_density("gaussian", -1.0, 2.0), r"r \(distance, km\) must be >= 0"),
    (lambda: rectangle_tail_mass("gaussian", 2.0, half_width_km=0.0, half_height_km=1.0), r"half_width_km must be > 0"),
    (lambda: latitude_band_kernels("gaussian", 2.0, lat_centres_deg=[90.0], dlon_deg=1, dlat_deg=1),
     r"lat_centres_deg"),
])
def test_bad_input_names_the_parameter(call, match):
    # Common practice, no source: one-line InputError naming the parameter.
    with pytest.raises(InputError, match=match):
        call()
