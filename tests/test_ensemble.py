"""Tests of scenario tables and ensemble statistics across climate models."""

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401

from envelope.errors import InputError
from envelope.ensemble import consensus_count, ensemble_statistics
from envelope.io.tables import group_scenarios, read_scenarios, write_suitability_table


def _stack(values):
    values = np.asarray(values, dtype=np.float32)
    m, ny, nx = values.shape
    da = xr.DataArray(values, dims=("model", "y", "x"),
                      coords={"model": [f"m{i}" for i in range(m)], "y": 50.0 - np.arange(ny), "x": -150.0 + np.arange(nx)})
    return da.rio.write_crs("EPSG:4326")


@pytest.mark.parametrize("chunked", [False, True])
def test_ensemble_against_numpy(chunked):
    # Source: numpy mean / std(ddof=1) / sum of (S >= t) on the same hand-made stack
    rng = np.random.default_rng(0)
    S = rng.uniform(size=(3, 4, 5)).astype(np.float32)
    S[1, 0, 0] = np.nan
    da = _stack(S)
    if chunked:
        da = da.chunk({"model": 1, "y": 2, "x": 3})
    ds = ensemble_statistics(da, 0.5, agreement=2 / 3).compute()
    S64 = S.astype(np.float64)
    np.testing.assert_allclose(ds["mean"].values, S64.mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(ds["sd"].values, S64.std(axis=0, ddof=1), rtol=1e-5)
    count = (S >= 0.5).sum(axis=0)
    valid = np.isfinite(S).all(axis=0)
    np.testing.assert_array_equal(ds["count"].values[valid], count[valid])
    np.testing.assert_array_equal(ds["consensus"].values[valid], (count >= 2)[valid].astype(np.uint8))
    assert ds["count"].values[0, 0] == 255 and ds["consensus"].values[0, 0] == 255
    assert np.isnan(ds["mean"].values[0, 0])
    assert ds.attrs["consensus_min_models"] == 2 and ds.rio.crs.to_epsg() == 4326


def _numpy_statistics(S, threshold, needed, ddof):
    """mean, SD, count, consensus in plain NumPy on a cell-major float64 copy (y, x, model),
    the layout xarray.apply_ufunc hands a kernel; 255 where any model is NaN."""
    cells = np.ascontiguousarray(np.moveaxis(S, 0, -1), dtype=np.float64)
    valid = np.isfinite(cells).all(axis=-1)
    count = (cells >= threshold).sum(axis=-1)
    with np.errstate(invalid="ignore"):
        return (cells.mean(axis=-1).astype(np.float32), cells.std(axis=-1, ddof=ddof).astype(np.float32),
                np.where(valid, count, 255).astype(np.uint8), np.where(valid, count >= needed, 255).astype(np.uint8))


@pytest.mark.parametrize("models", [2, 6, 9])
@pytest.mark.parametrize("chunks", [None, {"model": 1, "y": 16, "x": 50}, {"y": 150, "x": 7}])
def test_ensemble_bit_identical_to_numpy(models, chunks):
    # Source: numpy mean / std(ddof) / sum of (S >= t) along a contiguous model axis, as the
    # former apply_ufunc path computed them: every bit the same, in memory or dask-backed,
    # whatever the chunks. 150 x 130 cells are more than envelope.projection.KERNEL_CELLS,
    # so a block is computed in two runs of cells; 9 models reach NumPy's 8-way sums.
    rng = np.random.default_rng(models)
    S = rng.uniform(size=(models, 150, 130)).astype(np.float32)
    S[:, :4, :4] = 0.5                                   # exactly at the threshold
    S[0, rng.random((150, 130)) < 0.01] = np.nan
    S[-1, rng.random((150, 130)) < 0.005] = np.inf
    da = _stack(S) if chunks is None else _stack(S).chunk(chunks)
    ds = ensemble_statistics(da, 0.5, agreement=2 / 3, ddof=1)
    expected = _numpy_statistics(S, 0.5, consensus_count(models, 2 / 3), 1)
    for name, want in zip(("mean", "sd", "count", "consensus"), expected):
        got = ds[name].values
        assert got.dtype == want.dtype, name
        np.testing.assert_array_equal(got.view(f"u{got.dtype.itemsize}"), want.view(f"u{want.dtype.itemsize}"), name)
    assert (ds["count"].values == 255).any() and np.isnan(ds["mean"].values).any()


def test_ensemble_is_lazy_and_computes_each_block_once():
    # Common practice, no source (xarray habit: lazy wrappers stay lazy); all four
    # statistics of one block come from one kernel call.
    import dask
    from unittest import mock

    import envelope.ensemble as ensemble_module

    S = np.random.default_rng(1).uniform(size=(3, 20, 30)).astype(np.float32)
    ds = ensemble_statistics(_stack(S).chunk({"model": 1, "y": 10, "x": 15}), 0.5)
    assert all(isinstance(ds[k].data, dask.array.Array) for k in ds)
    with mock.patch.object(ensemble_module, "_ensemble_block", wraps=ensemble_module._ensemble_block) as kernel:
        ds = ensemble_statistics(_stack(S).chunk({"model": 1, "y": 10, "x": 15}), 0.5)
        dask.compute(*[ds[k].data for k in ds])
    assert kernel.call_count == 4  # 2 x 2 blocks


def test_ensemble_needs_model_y_x():
    with pytest.raises(InputError, match=r"suitability: dims \('y', 'x'\); expected \(model, y, x\)"):
        ensemble_statistics(_stack(np.zeros((1, 2, 3))).isel(model=0), 0.5)


def test_ensemble_hand_values():
    # Common practice, no source: worked by hand; threshold uses >=
    S = np.array([[[0.2, 0.5]], [[0.4, 0.9]], [[0.6, 0.1]]])  # 3 models, 1 x 2 cells
    ds = ensemble_statistics(_stack(S), 0.5, agreement=0.5, ddof=0)
    assert ds["mean"].values[0].tolist() == pytest.approx([0.4, 0.5])
    assert ds["sd"].values[0, 0] == pytest.approx(np.sqrt(((0.2 - .4) ** 2 + 0 + (0.6 - .4) ** 2) / 3), rel=1e-6)
    assert ds["count"].values.tolist() == [[1, 2]]
    assert ds["consensus"].values.tolist() == [[0, 1]]  # need ceil(0.5*3) = 2


def test_consensus_count_rounding():
    # Common practice, no source: ceil(a*n) with 2/3 of 3 -> 2, of 4 -> 3, all -> n
    assert consensus_count(3, 2 / 3) == 2
    assert consensus_count(4, 2 / 3) == 3
    assert consensus_count(5, 1.0) == 5
    with pytest.raises(InputError, match="agreement"):
        consensus_count(3, 1.5)


def test_read_csv_and_toml(tmp_path):
    # Common practice, no source: both table forms give the same scenarios
    for n in ("a.tif", "b.tif"):
        (tmp_path / n).write_bytes(b"")
    (tmp_path / "s.csv").write_text("name,pathway,climate_model,horizon,path\n"
                                    "pA-m1,pA,m1,2050,a.tif\npA-m2,pA,m2,2050,b.tif\n")
    (tmp_path / "s.toml").write_text('[[scenario]]\nname="pA-m1"\npathway="pA"\nclimate_model="m1"\n'
                                     'horizon=2050\npath="a.tif"\n[[scenario]]\nname="pA-m2"\npathway="pA"\n'
                                     'climate_model="m2"\nhorizon=2050\npath="b.tif"\n')
    a, b = read_scenarios(tmp_path / "s.csv"), read_scenarios(tmp_path / "s.toml")
    assert a == b and a[0].path == tmp_path / "a.tif" and a[1].horizon == 2050
    assert list(group_scenarios(a)) == [("pA", 2050)]


def test_bad_tables(tmp_path):
    # Common practice, no source: errors name the column / row / file
    (tmp_path / "a.tif").write_bytes(b"")
    bad = tmp_path / "bad.csv"
    bad.write_text("name,pathway,horizon,path\nx,p,2050,a.tif\n")
    with pytest.raises(InputError, match="column 'climate_model' missing"):
        read_scenarios(bad)
    bad.write_text("name,pathway,climate_model,horizon,path\nx,p,m,2050,nope.tif\n")
    with pytest.raises(InputError, match="nope.tif not found"):
        read_scenarios(bad)
    bad.write_text("name,pathway,climate_model,horizon,path\nx,p,m,soon,a.tif\n")
    with pytest.raises(InputError, match="horizon 'soon'"):
        read_scenarios(bad)
    bad.write_text("name,pathway,climate_model,horizon,path\nx,p,m,2050,a.tif\nx,p,n,2050,a.tif\n")
    with pytest.raises(InputError, match="'x' appears twice"):
        read_scenarios(bad)
    with pytest.raises(InputError, match="expected .csv or .toml"):
        read_scenarios(tmp_path / "a.tif")


def test_write_suitability_table(tmp_path):
    # Common practice, no source: the header the change command reads
    out = write_suitability_table([{"name": "s", "pathway": "p", "climate_model": "m", "horizon": 2050,
                                    "path": "s.tif", "mess_path": None, "novel_share": 0.25}], tmp_path / "t.csv")
    assert out.read_text().splitlines() == ["name,pathway,climate_model,horizon,path,mess_path,novel_share",
                                            "s,p,m,2050,s.tif,,0.25"]
