"""Spread speeds: published c* values, marginal MGFs, and the simulated front of the spread step."""

import math

import numpy as np
import pytest
from scipy import integrate, special

from envelope.errors import InputError
from envelope.kernels.dispersal import discretise_kernel, kernel_density, kernel_mean
from envelope.kernels.spread import SpreadOperator
from envelope.kernels.spread_speed import (
    colonisation_spread_speed,
    lattice_spread_speed,
    linear_spread_speed,
    marginal_mgf,
)

SIGMA1_MEAN = kernel_mean("gaussian", math.sqrt(2.0))  # per-axis sigma = 1 <=> a = sqrt(2)
EXP_A1_MEAN = kernel_mean("exponential", 1.0)


@pytest.mark.parametrize("r0,gauss,expo", [
    # Source: REFERENCES item 8 (Gaussian sigma = 1; 2-D exponential a = 1).
    (2.0, 1.1774100, 2.2409805),
    (math.e, 1.4142136, 2.7823078),
    (10.0, 2.1459660, 4.7183314),
])
def test_published_spread_speeds(r0, gauss, expo):
    g = linear_spread_speed("gaussian", r0, SIGMA1_MEAN)
    assert g.regime == "finite" and g.speed == pytest.approx(gauss, abs=1e-6)
    assert g.wave_number == pytest.approx(math.sqrt(2 * math.log(r0)), rel=1e-5)  # s* = sqrt(2 ln R0)/sigma
    e = linear_spread_speed("exponential", r0, EXP_A1_MEAN)
    assert e.regime == "finite" and e.speed == pytest.approx(expo, abs=1e-6)


def test_fat_tailed_kernel_has_no_finite_speed():
    # Source: REFERENCES item 8 / Kot et al. (1996): no MGF -> accelerating invasion.
    for result in (linear_spread_speed("2dt", 2.0, 3.0, 3.0), colonisation_spread_speed("2dt", 2.0, 3.0, 3.0)):
        assert result.speed == math.inf and result.regime == "accelerating"
    assert np.isinf(marginal_mgf("2dt", 0.1, 3.0, 3.0))


@pytest.mark.parametrize("kind,s", [("gaussian", 0.4), ("exponential", 0.3), ("exponential", 0.45)])
def test_marginal_mgf_matches_double_integral(kind, s):
    # Source: scipy.integrate.dblquad of exp(s x) k(r) over the plane (polar form).
    mean = 2.0
    ref, _ = integrate.dblquad(lambda r, th: math.exp(s * r * math.cos(th)) * r * kernel_density(kind, r, mean),
                               0, 2 * math.pi, 0, 80.0, epsabs=1e-12, epsrel=1e-11)
    assert float(marginal_mgf(kind, s, mean)) == pytest.approx(ref, rel=1e-8)


def test_colonisation_speed_is_the_linearised_ide_speed():
    # Source: analytic -- the linearisation p' = (delta + R k) * p is an IDE with R0 = 1 + R and
    # kernel (delta + R k)/(1 + R); checked by direct minimisation of (1/s) ln(1 + R M(s)).
    rate, mean = 2.0, 4.0
    a = mean / 2.0
    s = np.linspace(1e-4, 1 / a - 1e-6, 200001)
    brute = np.min(np.log1p(rate * (1 - (a * s) ** 2) ** -1.5) / s)
    assert colonisation_spread_speed("exponential", rate, mean).speed == pytest.approx(brute, rel=1e-7)
    # The lattice speed of a finely discretised kernel converges to the continuous one.
    k = discretise_kernel("gaussian", 20.0, cell_dx_km=1.0, cell_dy_km=1.0)
    assert lattice_spread_speed(k, 1.0, rate=rate).speed == pytest.approx(
        colonisation_spread_speed("gaussian", rate, 20.0).speed, rel=1e-3)
    # And the IDE branch of the lattice speed agrees with the Gaussian closed form sigma sqrt(2 ln R0).
    assert lattice_spread_speed(k, 1.0, growth_R0=math.e).speed == pytest.approx(
        20.0 / math.sqrt(math.pi / 2) * math.sqrt(2.0), rel=1e-3)


def _front(row, level=0.5):
    """Interpolated position of the farthest crossing of `level` along a row (cells)."""
    i = np.nonzero(row >= level)[0].max()
    return i + (row[i] - level) / (row[i] - row[i + 1])


def _simulate_plane_front(kind, mean, rate, steps, shape=None, ny=300, nx=None, tail_tolerance=1e-6):
    k = discretise_kernel(kind, mean, shape, cell_dx_km=1.0, cell_dy_km=1.0, tail_tolerance=tail_tolerance)
    nx = nx or int(8 * steps) + 200
    op = SpreadOperator((ny, nx), k)
    ones = np.ones((ny, nx))
    p = np.zeros((ny, nx))
    p[:, :10] = 1.0
    positions = []
    for _ in range(steps):
        p = op.step(p, ones, ones, rate, check=False)
        positions.append(_front(p[ny // 2]))
        assert p[:, -60:].max() == 0.0  # the front never feels the far edge
    return k, np.array(positions)


@pytest.mark.parametrize("kind", ["exponential", "gaussian"])
def test_simulated_front_speed_matches_linear_theory(kind):
    # Source: Kot et al. (1996) / REFERENCES item 8 for c*; 0.5-contour of the expected occupancy on
    # the middle row of a 300-row strip (plane front), speed over steps 70-140 after the transient.
    mean, rate, steps = 4.0, 2.0, 140
    k, x = _simulate_plane_front(kind, mean, rate, steps)
    speed = (x[-1] - x[steps // 2 - 1]) / (steps - steps // 2)
    theory = colonisation_spread_speed(kind, rate, mean)
    assert speed == pytest.approx(theory.speed, rel=0.05)
    lattice = lattice_spread_speed(k, 1.0, rate=rate)
    assert speed < lattice.speed  # a pulled front approaches c* from below
    # From memory: Brunet, E. & Derrida, B. (1997) Phys. Rev. E 56: 2597-2604 -- a cut-off eps
    # on a pulled front lowers its speed by pi^2 s*^2 v''(s*) / (2 ln^2 eps), v(s) = ln(1 + R M(s))/s;
    # here eps is the 1e-12 pressure floor, which explains the remaining ~1-2 % gap.
    w = k.sum(axis=0)
    offs = np.arange(w.size) - w.size // 2
    log_w = np.log(np.where(w > 0, w, 1e-300))

    def v(s):
        return np.logaddexp(0.0, math.log(rate) + special.logsumexp(log_w + s * offs)) / s

    s0, h = lattice.wave_number, 1e-3
    curvature = (v(s0 + h) - 2 * v(s0) + v(s0 - h)) / h ** 2
    cut_off = lattice.speed - math.pi ** 2 * s0 ** 2 * curvature / (2 * math.log(1e-12) ** 2)
    assert speed == pytest.approx(cut_off, rel=0.01)


def test_fat_tailed_front_accelerates():
    # Source: Kot et al. (1996): kernels without an MGF give accelerating invasions. Control: the
    # exponential front's later speed is about its earlier speed (transient only).
    windows = ((5, 15), (15, 25))

    def ratio(kind, shape, tol):
        _, x = _simulate_plane_front(kind, 2.0, 1.0, 26, shape=shape, ny=160, nx=2500, tail_tolerance=tol)
        (a0, a1), (b0, b1) = windows
        return (x[b1] - x[b0]) / (x[a1] - x[a0])

    assert ratio("2dt", 3.0, 1e-8) > 2.0
    assert ratio("exponential", None, 1e-6) < 1.2


@pytest.mark.parametrize("call,match", [
    (lambda: linear_spread_speed("gaussian", 1.0, 2.0), r"growth_R0 must be > 1"),
    (lambda: linear_spread_speed("gaussian", 2.0, -1.0), r"mean_distance_km must be > 0, got -1"),
    (lambda: colonisation_spread_speed("exponential", 0.0, 2.0), r"rate must be > 0"),
    (lambda: colonisation_spread_speed("2dt", 1.0, 2.0, 1.4), r"shape must be > 1\.5"),
    (lambda: lattice_spread_speed(np.ones((3, 3)) / 9, 1.0), r"exactly one of rate"),
])
def test_bad_input(call, match):
    # Common practice, no source.
    with pytest.raises(InputError, match=match):
        call()
