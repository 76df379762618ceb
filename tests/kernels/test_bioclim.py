"""BIO1-BIO19 and GDD kernel against REFERENCES item 5 (O'Donnell & Ignizio 2012) and a slow reference."""

import statistics

import numpy as np
import pytest

from envelope.errors import InputError
from envelope.kernels.bioclim import bioclim_kernel, quarter_sums, variable_names

# Source: REFERENCES item 5, "Check values" inputs (hand-made 12-month series).
TMIN = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8], dtype=float)
TMAX = TMIN + np.array([8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8], dtype=float)
PREC = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110], dtype=float)

# Source: REFERENCES item 5 table (COMPUTED from the DS 691 definitions); wrap=True column.
EXPECTED_WRAP = {
    "BIO1": 6.166667, "BIO2": 10.5, "BIO3": 30.0, "BIO5": 25, "BIO6": -10, "BIO7": 35,
    "BIO8": -4.5, "BIO9": 15.333333, "BIO10": 17.333333, "BIO11": -4.5, "BIO12": 465,
    "BIO13": 110, "BIO14": 5, "BIO16": 300, "BIO17": 15, "BIO18": 20, "BIO19": 300,
}
# Source: REFERENCES item 5 table, wrap=False column (10 windows JFM ... OND).
EXPECTED_NO_WRAP = dict(EXPECTED_WRAP, BIO8=-2.833333, BIO11=-2.833333, BIO16=210, BIO19=210)
# Source: REFERENCES item 5 table: BIO4 and BIO15 by ddof, and BIO15 on P+1.
BIO4 = {0: 832.749796, 1: 869.778795}
BIO15 = {0: 99.268920, 1: 103.683005}
BIO15_PLUS_ONE = {0: 96.771588, 1: 101.074628}

NAMES = list(variable_names(5.0))


def _col(out, name):
    return out[NAMES.index(name)]


@pytest.mark.parametrize("wrap", [True, False])
@pytest.mark.parametrize("ddof", [0, 1])
def test_reference_example_every_variable(wrap, ddof):
    # Source: REFERENCES item 5 (tolerance 1e-6 as stated there).
    out = bioclim_kernel(TMIN, TMAX, PREC, wrap=wrap, ddof=ddof)
    expected = EXPECTED_WRAP if wrap else EXPECTED_NO_WRAP
    for name, value in expected.items():
        assert _col(out, name) == pytest.approx(value, abs=1e-6), name
    assert _col(out, "BIO4") == pytest.approx(BIO4[ddof], abs=1e-6)
    assert _col(out, "BIO15") == pytest.approx(BIO15[ddof], abs=1e-6)


@pytest.mark.parametrize("ddof", [0, 1])
def test_precipitation_cv_plus_one(ddof):
    # Source: REFERENCES item 5, "BIO15 with P+1" row.
    out = bioclim_kernel(TMIN, TMAX, PREC, ddof=ddof, cv_plus_one=True)
    assert _col(out, "BIO15") == pytest.approx(BIO15_PLUS_ONE[ddof], abs=1e-6)


def test_quarter_sums_with_and_without_wrap():
    # Source: REFERENCES item 5, "Quarterly precipitation with wrap (start month Jan...Dec)".
    expected = [210, 120, 35, 20, 15, 20, 35, 60, 110, 200, 270, 300]
    np.testing.assert_allclose(quarter_sums(PREC, wrap=True), expected)
    np.testing.assert_allclose(quarter_sums(PREC, wrap=False), expected[:10])


def _slow_reference(tmin, tmax, prec, *, wrap, ddof, cv_plus_one, gdd_base):
    """Obvious loop version of the DS 691 definitions (REFERENCES item 5), using the stdlib."""
    tavg = [(a + b) / 2 for a, b in zip(tmin, tmax)]
    starts = range(12) if wrap else range(10)
    quarters = [[(s + k) % 12 for k in range(3)] for s in starts]
    qt = [sum(tavg[m] for m in q) / 3 for q in quarters]
    qp = [sum(prec[m] for m in q) for q in quarters]
    sd = statistics.pstdev if ddof == 0 else statistics.stdev
    p_cv = [p + 1 for p in prec] if cv_plus_one else list(prec)
    wet, dry = qp.index(max(qp)), qp.index(min(qp))
    warm, cold = qt.index(max(qt)), qt.index(min(qt))
    bio2 = sum(b - a for a, b in zip(tmin, tmax)) / 12
    bio7 = max(tmax) - min(tmin)
    days = [31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31]
    return [
        sum(tavg) / 12, bio2, 100 * bio2 / bio7, 100 * sd(tavg), max(tmax), min(tmin), bio7,
        qt[wet], qt[dry], qt[warm], qt[cold], sum(prec), max(prec), min(prec),
        100 * sd(p_cv) / (sum(p_cv) / 12), qp[wet], qp[dry], qp[warm], qp[cold],
        sum(max(t - gdd_base, 0) * d for t, d in zip(tavg, days)),
    ]


@pytest.mark.parametrize("wrap", [True, False])
@pytest.mark.parametrize("ddof", [0, 1])
@pytest.mark.parametrize("cv_plus_one", [True, False])
def test_matches_slow_reference_on_random_cells(wrap, ddof, cv_plus_one):
    # Source: REFERENCES item 5 definitions, written out as loops with statistics.pstdev/stdev.
    rng = np.random.default_rng(3)
    tmin = rng.normal(0, 8, size=(12, 7))  # months first, 7 cells
    tmax = tmin + rng.uniform(1, 15, size=(12, 7))
    prec = rng.gamma(2.0, 30.0, size=(12, 7))
    fast = bioclim_kernel(tmin, tmax, prec, wrap=wrap, ddof=ddof, cv_plus_one=cv_plus_one, gdd_base=5.0)
    slow = np.array([_slow_reference(a, b, c, wrap=wrap, ddof=ddof, cv_plus_one=cv_plus_one, gdd_base=5.0)
                     for a, b, c in zip(tmin.T.tolist(), tmax.T.tolist(), prec.T.tolist())])
    np.testing.assert_allclose(fast, slow.T, rtol=1e-12, atol=1e-9)


def test_southern_hemisphere_series_picks_the_shifted_quarters():
    # Source: REFERENCES item 5 series shifted by 6 months (a southern-hemisphere site):
    # the wettest/coldest quarter becomes JJA and the warmest becomes DJF (wrapping).
    shift = lambda a: np.roll(a, 6)  # noqa: E731  July of the original becomes January
    out = bioclim_kernel(shift(TMIN), shift(TMAX), shift(PREC), wrap=True)
    for name, value in EXPECTED_WRAP.items():  # a circular year is shift-invariant
        assert _col(out, name) == pytest.approx(value, abs=1e-6), name
    # the chosen windows themselves: wettest starts June (index 5), warmest starts December (11)
    qp = quarter_sums(shift(PREC), wrap=True)
    qt = quarter_sums((shift(TMIN) + shift(TMAX)) / 2, wrap=True) / 3
    assert int(qp.argmax()) == 5 and int(qt.argmax()) == 11
    # without wrap DJF is not a candidate: warmest quarter falls back to JFM (mean 15.6667,
    # precipitation 35 = the original JAS window).
    out = bioclim_kernel(shift(TMIN), shift(TMAX), shift(PREC), wrap=False)
    assert _col(out, "BIO10") == pytest.approx(15.666667, abs=1e-6)
    assert _col(out, "BIO18") == pytest.approx(35.0)


def test_growing_degree_days_by_hand():
    # Analytic: sum of max(Tavg - 5, 0) x days: Apr 0.5x30 + May 6x31 + Jun 11.5x30 +
    # Jul 13.5x31 + Aug 12x31 + Sep 6.5x30 + Oct 1x31 = 1562.5 (common practice, no source).
    out = bioclim_kernel(TMIN, TMAX, PREC, gdd_base=5.0)
    assert _col(out, "GDD5") == pytest.approx(1562.5)
    out0 = bioclim_kernel(TMIN, TMAX, PREC, gdd_base=None)
    assert out0.shape == (19,)


def test_tmean_input_replaces_the_midrange():
    # Common practice, no source: a given Tmean enters BIO1/BIO4/quarters instead of (Tmin+Tmax)/2.
    tmean = (TMIN + TMAX) / 2 + 1.0
    out = bioclim_kernel(TMIN, TMAX, PREC, tmean=tmean)
    assert _col(out, "BIO1") == pytest.approx(7.166667, abs=1e-6)
    assert _col(out, "BIO4") == pytest.approx(832.749796, abs=1e-6)  # SD is shift-invariant
    assert _col(out, "BIO2") == pytest.approx(10.5)                   # still Tmax - Tmin


def test_nan_month_blanks_only_that_cell():
    # Common practice, no source: a partial year gives no bioclim values.
    tmin = np.stack([TMIN, TMIN], axis=1)  # (month, cell)
    tmin[4, 1] = np.nan
    out = bioclim_kernel(tmin, np.stack([TMAX, TMAX], axis=1), np.stack([PREC, PREC], axis=1))
    assert np.isnan(out[:, 1]).all()
    assert _col(out[:, 0], "BIO1") == pytest.approx(6.166667, abs=1e-6)


def test_undefined_ratios_are_nan_and_ties_pick_the_earliest_quarter():
    # Analytic: constant temperature -> BIO7 = 0 so BIO3 = 0/0; no rain -> BIO15 = 0/0,
    # while on P+1 the CV of a constant is 0.
    flat = np.full(12, 10.0)
    dry = np.zeros(12)
    out = bioclim_kernel(flat, flat, dry)
    assert np.isnan(_col(out, "BIO3")) and np.isnan(_col(out, "BIO15"))
    assert _col(bioclim_kernel(flat, flat, dry, cv_plus_one=True), "BIO15") == 0.0
    # all quarters tie: the January-start window is chosen (BIO8 = mean temp of JFM)
    tmin = np.arange(12.0)
    out = bioclim_kernel(tmin, tmin, dry)
    assert _col(out, "BIO8") == pytest.approx(1.0)


def test_leading_dimensions_are_kept():
    rng = np.random.default_rng(0)
    tmin = rng.normal(size=(12, 3, 4))  # (month, y, x) as a grid block is read
    out = bioclim_kernel(tmin, tmin + 5, np.abs(tmin) * 10)
    assert out.shape == (20, 3, 4)
    cell = tmin[:, 2, 1]
    np.testing.assert_array_equal(out[:, 2, 1], bioclim_kernel(cell, cell + 5, np.abs(cell) * 10))


def test_bad_input_is_named():
    with pytest.raises(InputError, match="prec: expected 12 months"):
        bioclim_kernel(TMIN, TMAX, PREC[:11])
    with pytest.raises(InputError, match="ddof must be 0 or 1"):
        bioclim_kernel(TMIN, TMAX, PREC, ddof=2)
    with pytest.raises(InputError, match="differ in shape"):
        bioclim_kernel(np.stack([TMIN, TMIN], axis=1), TMAX, PREC)
    with pytest.raises(InputError, match="tmin: expected 12 months on the first axis"):
        bioclim_kernel(np.stack([TMIN, TMIN]), TMAX, PREC)
