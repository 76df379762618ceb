"""Grid wrapper for bioclimatic variables: same numbers as the kernel, lazy, grid and value checks."""

import dask
import dask.array as dsa
import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from dask.callbacks import Callback

from envelope.bioclim import bioclim, check_monthly
from envelope.errors import GridMismatchError, InputError
from envelope.kernels.bioclim import bioclim_kernel

# Source: REFERENCES item 5 inputs (hand-made 12-month series).
TMIN = np.array([-10, -8, -4, 0, 5, 10, 12, 11, 6, 1, -4, -8], dtype=float)
TMAX = TMIN + np.array([8, 9, 10, 11, 12, 13, 13, 12, 11, 10, 9, 8], dtype=float)
PREC = np.array([100, 90, 20, 10, 5, 5, 5, 10, 20, 30, 60, 110], dtype=float)


def monthly(series, ny=4, nx=5, shift=None, chunks=None, lat0=-20.0):
    """A (month, y, x) stack repeating ``series`` in every cell; south rows optionally shifted 6 months."""
    data = np.broadcast_to(np.asarray(series, float)[:, None, None], (12, ny, nx)).copy()
    if shift:
        data[:, ny // 2:, :] = np.roll(np.asarray(series, float), shift)[:, None, None]
    da = xr.DataArray(data.astype("float32"), dims=("month", "y", "x"),
                      coords={"month": np.arange(1, 13), "y": lat0 - np.arange(ny) - 0.5,
                              "x": -150.0 + np.arange(nx) + 0.5})
    da = da.rio.write_crs("EPSG:4326")
    return da.chunk({"month": 4, "y": 2, "x": 3}) if chunks else da


class CountComputes(Callback):
    def __init__(self):
        super().__init__()
        self.count = 0

    def _start(self, dsk):
        self.count += 1


def test_grid_values_match_reference_and_layout():
    # Source: REFERENCES item 5 table (wrap=True, ddof=0).
    out = bioclim(monthly(TMIN), monthly(TMAX), monthly(PREC))
    assert out.dims == ("variable", "y", "x") and out.dtype == np.float32
    assert list(out["variable"].values[:3]) == ["BIO1", "BIO2", "BIO3"] and out["variable"].values[-1] == "GDD5"
    np.testing.assert_allclose(out.sel(variable="BIO1").values, 6.166667, atol=1e-5)
    np.testing.assert_allclose(out.sel(variable="BIO16").values, 300)
    np.testing.assert_allclose(out.sel(variable="BIO4").values, 832.749796, rtol=1e-6)
    assert out["units"].sel(variable="BIO12").item() == "mm"
    assert out["long_name"].sel(variable="BIO15").item() == "precipitation seasonality"
    assert out.rio.crs.to_epsg() == 4326


def test_southern_rows_pick_their_own_quarters_without_wrap():
    # Source: REFERENCES item 5 series; southern rows shifted 6 months. Without wrap the
    # northern rows give BIO8 = -2.833333 (JFM) and the southern rows' wettest quarter is
    # JJA (= the original DJF) with BIO8 = -4.5 and BIO16 = 300.
    out = bioclim(monthly(TMIN, shift=6), monthly(TMAX, shift=6), monthly(PREC, shift=6), wrap=False)
    bio8 = out.sel(variable="BIO8").values
    np.testing.assert_allclose(bio8[:2], -2.833333, atol=1e-5)
    np.testing.assert_allclose(bio8[2:], -4.5, atol=1e-5)
    np.testing.assert_allclose(out.sel(variable="BIO16").values[2:], 300)


def test_wrapper_stays_lazy_and_computes_once():
    # Common practice, no source (xarray habit: lazy wrappers stay lazy).
    tmin, tmax, prec = (monthly(s, chunks=True) for s in (TMIN, TMAX, PREC))
    counter = CountComputes()
    with counter:
        out = bioclim(tmin, tmax, prec, variables=["BIO1", "BIO12"])
        assert isinstance(out.data, dsa.Array)
        assert counter.count == 0
        values = out.compute()
    assert counter.count == 1
    np.testing.assert_allclose(values.sel(variable="BIO12").values, 465)
    assert list(values["variable"].values) == ["BIO1", "BIO12"]


def test_nan_cells_stay_nan():
    tmin = monthly(TMIN)
    tmin[3, 0, 0] = np.nan
    out = bioclim(tmin, monthly(TMAX), monthly(PREC))
    assert np.isnan(out.values[:, 0, 0]).all()
    assert np.isfinite(out.values[:, 1, 1]).all()


def test_mismatched_grids_and_wrong_month_count():
    shifted = monthly(PREC).assign_coords(x=monthly(PREC)["x"] + 0.5)
    with pytest.raises(GridMismatchError, match="prec"):
        bioclim(monthly(TMIN), monthly(TMAX), shifted)
    with pytest.raises(InputError, match="tmax: 11 months; expected 12"):
        bioclim(monthly(TMIN), monthly(TMAX).isel(month=slice(0, 11)), monthly(PREC))
    with pytest.raises(InputError, match="'BIO20' is not a bioclimatic variable"):
        bioclim(monthly(TMIN), monthly(TMAX), monthly(PREC), variables=["BIO20"])


def test_value_checks_name_the_file():
    bad = monthly(PREC)
    bad[0, 0, 0] = -1.0
    with pytest.raises(InputError, match=r"p\.tif: 1 cell-months of negative precipitation"):
        check_monthly(monthly(TMIN), monthly(TMAX), bad, names={"prec": "p.tif"})
    with pytest.raises(InputError, match="tmin > tmax in 240 cell-months"):
        check_monthly(monthly(TMAX), monthly(TMIN), monthly(PREC))
    with pytest.raises(InputError, match="kelvin"):
        check_monthly(monthly(TMIN + 273.15), monthly(TMAX + 273.15), monthly(PREC))
    check_monthly(monthly(TMIN, chunks=True), monthly(TMAX, chunks=True), monthly(PREC, chunks=True))


def test_precipitation_plausibility(caplog):
    # From memory: the wettest calendar month on record is about 9,300 mm (Cherrapunji, July
    # 1861), so 10,000 mm in one month is scaled integers; kg m-2 s-1 read as mm is 86,400x small.
    tenfold = monthly(PREC) * 10 + 10_001.0
    with pytest.raises(InputError, match=r"p\.tif: precipitation up to .* mm in one month; .*scaled integers"):
        check_monthly(monthly(TMIN), monthly(TMAX), tenfold, names={"prec": "p.tif"})
    with caplog.at_level("WARNING", logger="envelope.bioclim"):
        check_monthly(monthly(TMIN), monthly(TMAX), monthly(PREC), names={"prec": "p.tif"})
        assert not caplog.records
        check_monthly(monthly(TMIN), monthly(TMAX), monthly(PREC) / 86_400 / 30, names={"prec": "p.tif"})
    assert len(caplog.records) == 1 and "p.tif: the wettest cell-month holds" in caplog.records[0].getMessage()


def _numpy_reference(tmin, tmax, prec, tmean=None, *, wrap=True, ddof=0, cv_plus_one=False, gdd_base=5.0):
    """The DS 691 definitions (REFERENCES item 5) in plain NumPy on cell-major float64 copies
    (y, x, month), the layout xarray.apply_ufunc hands a kernel: float64 (variable, y, x).
    Undefined ratios (BIO3, BIO15) and cells with a missing month are NaN."""
    lo, hi, p = (np.ascontiguousarray(np.moveaxis(a, 0, -1), dtype=np.float64) for a in (tmin, tmax, prec))
    tavg = (lo + hi) / 2 if tmean is None else np.ascontiguousarray(np.moveaxis(tmean, 0, -1), dtype=np.float64)
    windows = [[(s + k) % 12 for k in range(3)] for s in range(12 if wrap else 10)]
    q_temp = np.stack([tavg[..., w].sum(axis=-1) for w in windows], axis=-1) / 3
    q_prec = np.stack([p[..., w].sum(axis=-1) for w in windows], axis=-1)

    def at(q, index):
        return np.take_along_axis(q, index[..., None], axis=-1)[..., 0]

    wet, dry, warm, cold = q_prec.argmax(-1), q_prec.argmin(-1), q_temp.argmax(-1), q_temp.argmin(-1)
    p_cv = p + 1 if cv_plus_one else p
    days = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        bio2, bio7 = (hi - lo).mean(-1), hi.max(-1) - lo.min(-1)
        layers = [tavg.mean(-1), bio2, np.where(bio7 != 0, 100 * bio2 / bio7, np.nan), 100 * tavg.std(-1, ddof=ddof),
                  hi.max(-1), lo.min(-1),
                  bio7, at(q_temp, wet), at(q_temp, dry), at(q_temp, warm), at(q_temp, cold), p.sum(-1),
                  p.max(-1), p.min(-1), np.where(p_cv.mean(-1) != 0, 100 * p_cv.std(-1, ddof=ddof) / p_cv.mean(-1), np.nan),
                  at(q_prec, wet), at(q_prec, dry), at(q_prec, warm), at(q_prec, cold)]
        if gdd_base is not None:
            layers.append((np.maximum(tavg - gdd_base, 0) * days).sum(-1))
    out = np.stack(layers)
    given = [a for a in (tmin, tmax, prec, tmean) if a is not None]
    out[:, ~np.isfinite(np.stack(given)).all(axis=(0, 1))] = np.nan
    return out


def _random_monthly(ny=150, nx=130, seed=11):
    """Random 12-month grids with NaN and inf months, dry months and whole-degree ties.

    150 x 130 cells are more than envelope.projection.KERNEL_CELLS, so one block is
    computed in two runs of cells.
    """
    rng = np.random.default_rng(seed)
    tmin = rng.normal(0, 10, size=(12, ny, nx)).astype(np.float32)
    tmax = tmin + rng.uniform(0, 15, size=tmin.shape).astype(np.float32)
    prec = rng.gamma(1.5, 40, size=tmin.shape).astype(np.float32)
    prec[rng.random(prec.shape) < 0.2] = 0.0                 # ties between dry quarters
    tmin[:, :10] = np.round(tmin[:, :10])                     # ties between quarters
    tmax[:, :10] = tmin[:, :10] + 4
    tmax[:, 10, :5] = tmin[:, 10, :5] = 3.0                   # BIO7 = 0
    prec[:, 11, :5] = 0.0                                     # mean precipitation 0
    tmin[rng.random(tmin.shape) < 0.002] = np.nan
    prec[rng.random(prec.shape) < 0.001] = np.inf
    tmean = (tmin + tmax) / 2 + rng.normal(0, 0.5, size=tmin.shape).astype(np.float32)
    return tmin, tmax, prec, tmean


def _grid(values, chunks=None):
    ny, nx = values.shape[1:]
    da = xr.DataArray(values, dims=("month", "y", "x"),
                      coords={"month": np.arange(1, 13), "y": 30.0 - 0.1 * np.arange(ny), "x": -140.0 + 0.1 * np.arange(nx)})
    da = da.rio.write_crs("EPSG:4326")
    return da if chunks is None else da.chunk(chunks)


def _same_bits(a, b):
    a, b = np.asarray(a), np.asarray(b)
    assert a.dtype == b.dtype
    np.testing.assert_array_equal(a.view(f"u{a.dtype.itemsize}"), b.view(f"u{b.dtype.itemsize}"))


@pytest.mark.parametrize("conventions", [{}, {"wrap": False, "ddof": 1, "cv_plus_one": True}])
def test_month_first_kernel_is_bit_identical_in_float64(conventions):
    # Source: NumPy on the DS 691 definitions, month-last (as above), before rounding to
    # float32: the month-first kernel's sums and SDs keep NumPy's order of additions.
    tmin, tmax, prec, _ = _random_monthly(ny=40, nx=50)
    _same_bits(bioclim_kernel(tmin, tmax, prec, **conventions), _numpy_reference(tmin, tmax, prec, **conventions))


@pytest.mark.parametrize("chunks", [None, {"y": 40, "x": 64}, {"month": 5, "y": 150, "x": 13}, {"y": 1, "x": 130}])
@pytest.mark.parametrize("conventions", [{}, {"wrap": False, "ddof": 1, "cv_plus_one": True, "gdd_base": 0.5},
                                         {"gdd_base": None, "use_tmean": True}])
def test_bit_identical_to_numpy_on_a_random_grid(chunks, conventions):
    # Source: NumPy on the DS 691 definitions (REFERENCES item 5), month-last as the former
    # apply_ufunc path computed them: every bit and every NaN the same, in memory or
    # dask-backed, whatever the y/x (and month) chunks.
    conventions = dict(conventions)
    use_tmean = conventions.pop("use_tmean", False)
    tmin, tmax, prec, tmean = _random_monthly()
    tmean = tmean if use_tmean else None
    expected = _numpy_reference(tmin, tmax, prec, tmean, **conventions).astype(np.float32)
    grids = [None if a is None else _grid(a, chunks) for a in (tmin, tmax, prec, tmean)]
    out = bioclim(*grids, **conventions)
    assert isinstance(out.data, dsa.Array) == (chunks is not None)
    _same_bits(out.values, expected)
    assert np.isnan(expected).any() and np.isfinite(expected).any()


def test_month_axis_anywhere_and_mixed_backends():
    # Source: as above (NumPy reference); a (y, x, month) stack and a numpy-backed stack
    # among dask-backed ones give the same bits.
    tmin, tmax, prec, _ = _random_monthly(ny=20, nx=30)
    expected = _numpy_reference(tmin, tmax, prec).astype(np.float32)
    out = bioclim(_grid(tmin).transpose("y", "x", "month"), _grid(tmax, {"y": 7}), _grid(prec, {"x": 11}))
    assert out.dims == ("variable", "y", "x")
    _same_bits(out.values, expected)


@pytest.mark.parametrize("ny, nx", [(1, 6), (5, 1)])
def test_one_row_or_column_grid_keeps_its_transform(ny, nx):
    # A one-row or one-column grid cannot recover its cell size from its coordinates: the
    # output carries the input's stated transform (Source: rioxarray's rio.transform of the
    # input, written with rio.write_transform), not an identity one
    from affine import Affine

    stated = Affine(1.0, 0.0, -150.0, 0.0, -1.0, -20.0)  # the cells of monthly(): 1 degree from (-150, -20)
    tmin = monthly(np.linspace(-2, 14, 12), ny=ny, nx=nx).rio.write_transform(stated)
    tmax = (tmin + 8.0).rio.write_transform(stated)
    prec = (tmin * 0 + 50.0).rio.write_transform(stated)
    assert tmin.rio.transform() == stated
    out = bioclim(tmin, tmax, prec)
    assert out.rio.transform() == stated and out.rio.crs == tmin.rio.crs
