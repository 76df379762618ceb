"""Tests of projection onto climate grids: suitability, clamping, MESS, novel share, tags, laziness, distributed."""

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from dask.callbacks import Callback

from envelope.errors import InputError, ModelError, OutputExistsError
from envelope.io.modelfile import save_model
from envelope.io.rasters import open_layer, read_tags
from envelope.io.writing import write_raster
from envelope.kernels.mess import mess, reference_from_training
from envelope.models import BoostedTrees, PointProcessModel
from envelope.grids import match_variables
from envelope.projection import novel_share, project_mess, project_suitability, training_range
from envelope.pipelines.project import project_file

NAMES = ["t", "p", "q"]


def _grid(values, names=NAMES, lon0=-150.0, lat0=-40.0, res=0.5):
    values = np.asarray(values, dtype=np.float32)
    _, ny, nx = values.shape
    da = xr.DataArray(values, dims=("variable", "y", "x"),
                      coords={"variable": list(names), "y": lat0 - res * (np.arange(ny) + 0.5),
                              "x": lon0 + res * (np.arange(nx) + 0.5)}, name="climate")
    return da.rio.write_crs("EPSG:4326")


def _training(seed=0, p=3):
    rng = np.random.default_rng(seed)
    X = np.r_[rng.normal(0.5, 0.5, (120, p)), rng.normal(0, 1, (1200, p))]
    y = np.r_[np.ones(120), np.zeros(1200)]
    return X, y


def _metadata(X, names=NAMES):
    return {"variables": [{"name": n, "units": "", "min": float(X[:, j].min()), "max": float(X[:, j].max())}
                          for j, n in enumerate(names)],
            "threshold": {"value": 0.25, "rule": "max_tss"},
            "mess_reference": reference_from_training(X).to_dict()}


@pytest.fixture(scope="module")
def fitted():
    X, y = _training()
    model = PointProcessModel(classes=("linear", "quadratic", "product", "hinge"), n_knots=5, C=20.0).fit(X, y)
    return model, X


@pytest.fixture
def files(tmp_path, fitted):
    model, X = fitted
    save_model(tmp_path / "m.envm", model, _metadata(X))
    rng = np.random.default_rng(3)
    grid = _grid(rng.normal(0, 1.6, (3, 20, 24)))
    grid[:, 0, 0] = np.nan
    write_raster(grid, tmp_path / "clim.tif")
    return tmp_path, model, X, grid


def _clamped_rows(grid, X):
    cells = grid.values.reshape(grid.sizes["variable"], -1).T.astype(np.float64)
    return np.clip(cells, X.min(0), X.max(0))


@pytest.mark.parametrize("chunked", [False, True])
def test_suitability_equals_estimator(fitted, chunked):
    # Source: the estimator's own predict_proba on the clamped cells
    model, X = fitted
    grid = _grid(np.random.default_rng(1).normal(0, 2, (3, 9, 11)))
    grid[1, 2, 3] = np.nan
    stack = grid.chunk({"y": 4, "x": 5}) if chunked else grid
    got = project_suitability(model, stack, NAMES, dict(zip(NAMES, zip(X.min(0), X.max(0))))).values
    rows = _clamped_rows(grid, X)
    ok = np.isfinite(rows).all(axis=1)
    np.testing.assert_allclose(got.ravel()[ok], model.predict_proba(rows[ok])[:, 1], atol=1e-6)  # float32 output
    assert np.isnan(got[2, 3]) and got.dtype == np.float32


def test_generic_estimator_path_and_variable_order():
    # Source: BoostedTrees' own predict_proba; the grid lists variables in another order
    X, y = _training(p=2)
    brt = BoostedTrees(max_iter=20, early_stopping=False, random_state=0).fit(X, y)
    grid = _grid(np.random.default_rng(2).normal(0, 1, (2, 6, 7)), names=["p", "t"])
    got = project_suitability(brt, grid.chunk({"x": 3}), ["t", "p"], None, clamp=False).values
    rows = grid.sel(variable=["t", "p"]).values.reshape(2, -1).T
    np.testing.assert_allclose(got.ravel(), brt.predict_proba(rows)[:, 1], atol=1e-6)


def test_missing_variable_named():
    # Common practice, no source: the error names the missing variable
    grid = _grid(np.zeros((2, 2, 2)), names=["t", "p"])
    with pytest.raises(InputError, match="variable 'q' needed by the model is missing"):
        match_variables(grid, NAMES)


def test_training_range_needs_bounds():
    # Common practice, no source
    with pytest.raises(InputError, match="'t' has no training min/max"):
        training_range({"variables": [{"name": "t"}]})


def test_mess_grid_against_kernel(fitted):
    # Source: envelope.kernels.mess.mess on the same cells (reference implementation)
    model, X = fitted
    ref = reference_from_training(X)
    grid = _grid(np.random.default_rng(4).normal(0, 2, (3, 8, 6)))
    grid[2, 1, 1] = np.nan
    out = project_mess(grid.chunk({"y": 3}), NAMES, ref.to_dict()).values
    cells = grid.values.reshape(3, -1).T.astype(np.float64)
    ok = np.isfinite(cells).all(axis=1)
    values, index = mess(cells[ok], ref)
    np.testing.assert_allclose(out[0].ravel()[ok], values, rtol=1e-6)
    np.testing.assert_array_equal(out[1].ravel()[ok], index)
    assert np.isnan(out[:, 1, 1]).all()


def test_mess_references_item4():
    # Source: REFERENCES.md item 4 (Elith, Kearney & Phillips 2010 worked example, COMPUTED)
    ref = reference_from_training(np.c_[np.arange(1.0, 11.0), np.arange(10.0, 101.0, 10.0)])
    points = np.array([[3.5, 55], [12, 55], [5.5, 55], [7.5, 95], [0, 200]], dtype=np.float32)
    grid = _grid(points.T[:, None, :], names=["v1", "v2"])
    out = project_mess(grid, ["v1", "v2"], ref).values
    np.testing.assert_allclose(out[0, 0], [60, -22.2222222, 100, 20, -111.1111111], atol=1e-4)
    assert out[1, 0, [0, 1, 3, 4]].tolist() == [0, 0, 1, 1]


def test_novel_share_against_hand_area_sum():
    # Source: pyproj.Geod (WGS84) polygon areas of each cell, summed by hand
    from pyproj import Geod

    mess_values = np.array([[-1.0, 5.0, np.nan], [3.0, -2.0, -0.5], [7.0, 1.0, 2.0]], dtype=np.float32)
    res, lon0, lat0 = 10.0, -150.0, -20.0
    da = xr.DataArray(mess_values, dims=("y", "x"),
                      coords={"y": lat0 - res * (np.arange(3) + 0.5), "x": lon0 + res * (np.arange(3) + 0.5)})
    da = da.rio.write_crs("EPSG:4326")
    from envelope.grids import cell_area_km2

    share = novel_share(da.chunk({"y": 2}), cell_area_km2(da))
    geod = Geod(ellps="WGS84")
    area = np.zeros((3, 3))
    for i in range(3):
        top, bottom = lat0 - res * i, lat0 - res * (i + 1)
        for j in range(3):
            left, right = lon0 + res * j, lon0 + res * (j + 1)
            # densify the parallels: a geodesic edge between two corners is not a parallel
            edge = np.linspace(left, right, 2001)
            lons = np.r_[edge, edge[::-1]]
            lats = np.r_[np.full(edge.size, bottom), np.full(edge.size, top)]
            a, _ = geod.polygon_area_perimeter(lons, lats)
            area[i, j] = abs(a)
    valid = np.isfinite(mess_values)
    expected = area[valid & (mess_values < 0)].sum() / area[valid].sum()
    assert share == pytest.approx(expected, rel=1e-6)
    assert abs(share - 3 / 8) > 1e-3  # area weighting differs from counting cells


class _ComputeCounter(Callback):
    def __init__(self):
        super().__init__()
        self.n = 0

    def _start(self, dsk):
        self.n += 1


def test_wrappers_stay_lazy(files):
    # Common practice, no source: building the graph runs no dask compute
    from envelope.io.rasters import open_climate

    tmp, model, X, _ = files
    stack = open_climate(tmp / "clim.tif", chunks={"band": 1, "y": 8, "x": 8})
    with _ComputeCounter() as counter:
        s = project_suitability(model, stack, NAMES, dict(zip(NAMES, zip(X.min(0), X.max(0)))))
        m = project_mess(stack, NAMES, reference_from_training(X))
    assert counter.n == 0
    assert s.chunks is not None and m.chunks is not None
    with _ComputeCounter() as counter:
        s.compute()
    assert counter.n >= 1


@pytest.mark.parametrize("suffix", [".tif", ".nc"])
def test_project_file_tags_round_trip(files, suffix):
    # Common practice, no source: threshold and provenance survive GeoTIFF and NetCDF
    tmp, model, X, grid = files
    out, mess_out, binary = tmp / f"s{suffix}", tmp / f"mess{suffix}", tmp / f"b{suffix}"
    res = project_file(tmp / "m.envm", tmp / "clim.tif", out, mess_out=mess_out, binary_out=binary)
    tags = read_tags(out)
    assert tags["threshold"] == 0.25 and tags["threshold_rule"] == "max_tss"
    assert tags["method"] == "pointprocess" and tags["clamped"] is True
    assert len(tags["model_sha256"]) == 64 and tags["novel_share"] == pytest.approx(res["novel_share"])
    s = open_layer(out).values
    rows = _clamped_rows(grid, X)
    ok = np.isfinite(rows).all(axis=1)
    # Source: the estimator's own predict_proba
    np.testing.assert_allclose(s.ravel()[ok], model.predict_proba(rows[ok])[:, 1], atol=1e-6)
    b = open_layer(binary, categorical=True).values if suffix == ".tif" else open_layer(binary).values
    np.testing.assert_array_equal(b.ravel()[ok], (s.ravel()[ok] >= 0.25).astype(b.dtype))
    assert read_tags(binary)["categories"] in ({"0": "unsuitable", "1": "suitable"}, {0: "unsuitable", 1: "suitable"})
    assert read_tags(mess_out)["categories"] in ({"0": "t", "1": "p", "2": "q"}, {0: "t", 1: "p", 2: "q"})
    if suffix == ".tif":
        import rasterio

        # Source: GDAL's IMAGE_STRUCTURE metadata: suitability with the floating-point
        # predictor, the MESS raster (plateaus of levels and an index) with none
        with rasterio.open(out) as a, rasterio.open(mess_out) as m:
            assert a.tags(ns="IMAGE_STRUCTURE").get("PREDICTOR") == "3"
            assert m.tags(ns="IMAGE_STRUCTURE").get("PREDICTOR") is None
            assert m.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG"


def test_no_clamp_changes_extrapolation(files):
    # Common practice, no source: without clamping the estimator sees the raw values
    tmp, model, X, grid = files
    project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "raw.tif", clamp=False)
    s = open_layer(tmp / "raw.tif").values.ravel()
    rows = grid.values.reshape(3, -1).T.astype(np.float64)
    ok = np.isfinite(rows).all(axis=1)
    np.testing.assert_allclose(s[ok], model.predict_proba(rows[ok])[:, 1], atol=1e-6)
    assert read_tags(tmp / "raw.tif")["clamped"] is False


def test_bad_inputs_write_nothing(files, tmp_path):
    # Common practice, no source: clear errors, no output left behind
    tmp, model, X, grid = files
    bad = tmp / "bad.envm"
    bad.write_bytes(b"not a model")
    with pytest.raises(ModelError, match="bad.envm"):
        project_file(bad, tmp / "clim.tif", tmp / "o1.tif")
    write_raster(grid.isel(variable=[0, 1]), tmp / "two.tif")
    with pytest.raises(InputError, match="'q' needed by the model is missing"):
        project_file(tmp / "m.envm", tmp / "two.tif", tmp / "o2.tif", mess_out=tmp / "o2m.tif")
    (tmp / "exists.tif").write_bytes(b"x")
    with pytest.raises(OutputExistsError, match="--overwrite"):
        project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "o3.tif", mess_out=tmp / "exists.tif")
    assert not any((tmp / n).exists() for n in ("o1.tif", "o2.tif", "o2m.tif", "o3.tif"))
    assert not list(tmp.glob("*.part*"))


def test_distributed_equals_local(files):
    # Common practice, no source: the same graph on a dask.distributed cluster gives the same bytes
    distributed = pytest.importorskip("distributed")
    tmp, *_ = files
    project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "local.tif", mess_out=tmp / "local_m.tif")
    # tcp on loopback: processes=False would otherwise pick the in-process transport
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "dist.tif", mess_out=tmp / "dist_m.tif",
                     scheduler=cluster.scheduler_address)
    np.testing.assert_array_equal(open_layer(tmp / "dist.tif").values, open_layer(tmp / "local.tif").values)
    for band in ("mess", "most_dissimilar"):
        np.testing.assert_array_equal(open_layer(tmp / "dist_m.tif", band=band).values,
                                      open_layer(tmp / "local_m.tif", band=band).values)
    assert read_tags(tmp / "dist.tif")["novel_share"] == read_tags(tmp / "local.tif")["novel_share"]
    # the client is closed afterwards: later work runs on local threads again
    from distributed import default_client

    with pytest.raises(ValueError):
        default_client()


def test_ensemble_uses_member_tables():
    # Source: SkillWeightedEnsemble's own predict_proba (members' tables summed with its weights)
    from envelope.models import SkillWeightedEnsemble

    X, y = _training(p=2)
    ens = SkillWeightedEnsemble(members=[("pp", PointProcessModel(classes=("linear", "hinge"), C=10.0)),
                                         ("brt", BoostedTrees(max_iter=10, early_stopping=False, random_state=0))],
                                weights_from={"pp": 0.8, "brt": 0.7}).fit(X, y)
    grid = _grid(np.random.default_rng(6).normal(0, 1, (2, 5, 6)), names=["t", "p"])
    got = project_suitability(ens, grid, ["t", "p"], None, clamp=False).values
    np.testing.assert_allclose(got.ravel(), ens.predict_proba(grid.values.reshape(2, -1).T)[:, 1], atol=1e-6)


def test_one_pass_reads_each_window_once(files, monkeypatch):
    # Common practice, no source: suitability, MESS, binary map and novel share share one read
    from envelope.io import blocks

    tmp, *_ = files
    seen = []
    original = blocks.WindowReader.__getitem__

    def logged(self, key):
        seen.append(tuple((k.start, k.stop) for k in key[1:]))
        return original(self, key)

    monkeypatch.setattr(blocks.WindowReader, "__getitem__", logged)
    project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "s.tif", mess_out=tmp / "m.tif", binary_out=tmp / "b.tif",
                 chunks={"y": 8, "x": 16})
    assert len(seen) == 3 * 2 and len(set(seen)) == len(seen)  # 20 x 24 grid in 8 x 16 windows


def test_novel_share_tag_equals_area_sum_of_written_mess(files):
    # Analytic: the definition (area where MESS < 0 over area where MESS is defined), summed here
    # from the written file; cell areas from envelope.grids.cell_area_km2, itself checked against
    # pyproj.Geod in tests/kernels/test_areas.py
    from envelope.grids import cell_area_km2

    tmp, *_ = files
    res = project_file(tmp / "m.envm", tmp / "clim.tif", tmp / "s.tif", mess_out=tmp / "m.tif")
    values = open_layer(tmp / "m.tif", band="mess")
    area = cell_area_km2(values).values
    m = values.values
    expected = area[np.isfinite(m) & (m < 0)].sum() / area[np.isfinite(m)].sum()
    assert 0 < expected < 1
    assert read_tags(tmp / "s.tif")["novel_share"] == pytest.approx(expected, rel=1e-12)
    assert res["novel_share"] == pytest.approx(expected, rel=1e-12)


def test_effort_covariate_model_projects_at_its_reference_effort(tmp_path):
    # Source: the estimator's own predict_proba (which predicts at effort_reference_), on the exact table
    # path in memory and from a saved model file; the table's constant carries effort_coef_ * log(reference).
    from envelope.projection import pointprocess_table

    X, y = _training(seed=4)
    rng = np.random.default_rng(5)
    effort = np.exp(0.5 * X[:, 0] + rng.normal(size=y.size))
    model = PointProcessModel(classes=("linear", "quadratic", "hinge"), n_knots=5, C=20.0).fit(X, y, effort=effort)
    assert model.effort_term_ != 0.0 and model.effort_reference_ == pytest.approx(effort.max())
    plain_constant = model.intercept_ + model.offset_
    assert pointprocess_table(model).constant == pytest.approx(plain_constant + model.effort_term_)
    grid = _grid(np.random.default_rng(6).normal(0, 1.2, (3, 8, 10)))
    bounds = dict(zip(NAMES, zip(X.min(0), X.max(0))))
    rows = _clamped_rows(grid, X)
    want = model.predict_proba(rows)[:, 1]
    got = project_suitability(model, grid, NAMES, bounds).values.ravel()
    np.testing.assert_allclose(got, want, atol=1e-6)  # float32 output
    save_model(tmp_path / "effort.envm", model, _metadata(X))
    write_raster(grid, tmp_path / "clim.tif")
    project_file(tmp_path / "effort.envm", tmp_path / "clim.tif", tmp_path / "s.tif")
    np.testing.assert_allclose(open_layer(tmp_path / "s.tif").values.ravel(), want, atol=1e-6)


def _percentile_case(seed=7):
    from envelope.models import PercentileEnvelope

    X, y = _training(seed=seed)
    X = X.round(1)  # presence values on a lattice: grid cells fall exactly on them
    w = np.random.default_rng(seed).uniform(0.5, 2.0, y.size)
    model = PercentileEnvelope().fit(X, y, sample_weight=w)
    values = np.random.default_rng(seed + 1).normal(0.3, 1.5, (3, 12, 14)).round(1)
    values[:, 0, :5] = X[y == 1][:5].T  # exactly on presence values
    values[0, 1, :3] = [X[:, 0].min(), X[:, 0].max(), 50.0]  # on the training bounds and far outside
    values[1, 2, 2], values[2, 3, 3], values[0, 4, 4] = np.nan, np.inf, -np.inf
    return model, X, y, _grid(values)


@pytest.mark.parametrize("chunked", [False, True])
def test_percentile_envelope_table_path_equals_estimator(chunked):
    # Source: PercentileEnvelope.predict_proba on the cells clamped to the training range in float64
    # (the generic path), equal to the last bit once rounded to the float32 output
    from envelope.projection import percentile_table

    model, X, _, grid = _percentile_case()
    stack = grid.chunk({"y": 5, "x": 4}) if chunked else grid
    bounds = dict(zip(NAMES, zip(X.min(0), X.max(0))))
    assert percentile_table(model, X.min(0), X.max(0)) is not None
    got = project_suitability(model, stack, NAMES, bounds).values.ravel()
    rows = _clamped_rows(grid, X)
    ok = np.isfinite(grid.values.reshape(3, -1)).all(axis=0)
    np.testing.assert_array_equal(got[ok], model.predict_proba(rows[ok])[:, 1].astype(np.float32))
    assert np.isnan(got[~ok]).all() and (~ok).sum() == 3
    unclamped = project_suitability(model, stack, NAMES, None, clamp=False).values.ravel()
    raw = grid.values.reshape(3, -1).T.astype(np.float64)
    np.testing.assert_array_equal(unclamped[ok], model.predict_proba(raw[ok])[:, 1].astype(np.float32))


def test_ensemble_with_percentile_member_equals_generic_path(monkeypatch):
    # Source: the generic path the ensemble took before (each member's predict_proba on the
    # clamped cells, weighted and summed in float64), bit for bit; and the ensemble's own
    # predict_proba to float32 precision
    from envelope.kernels.predict import predict_cells, suitability_table
    from envelope.models import PercentileEnvelope, SkillWeightedEnsemble
    from envelope.projection import pointprocess_table

    _, X, y, grid = _percentile_case(seed=9)
    ens = SkillWeightedEnsemble(members=[("env", PercentileEnvelope(ties="right")),
                                         ("pp", PointProcessModel(classes=("linear", "quadratic"), C=10.0))],
                                weights_from={"env": 0.75, "pp": 0.85}).fit(X, y)
    bounds = dict(zip(NAMES, zip(X.min(0), X.max(0))))
    import envelope.projection as projection

    calls = []
    kernel = projection.percentile_suitability
    monkeypatch.setattr(projection, "percentile_suitability", lambda *a, **k: calls.append(1) or kernel(*a, **k))
    got = project_suitability(ens, grid.chunk({"x": 5}), NAMES, bounds).values.ravel()
    assert len(calls) == 3  # the envelope member took its table path, once per chunk
    cells = grid.values.reshape(3, -1)
    (w_env, w_pp), ((_, env), (_, pp)) = ens.weights_, ens.members_
    expected = w_env * predict_cells(env.predict_proba, cells, lower=X.min(0), upper=X.max(0))
    expected = expected + w_pp * suitability_table(pointprocess_table(pp), cells, lower=X.min(0), upper=X.max(0))
    ok = np.isfinite(cells).all(axis=0)
    np.testing.assert_array_equal(got[ok], expected[ok].astype(np.float32))
    np.testing.assert_allclose(got[ok], ens.predict_proba(_clamped_rows(grid, X)[ok])[:, 1], atol=1e-6)
    assert np.isnan(got[~ok]).all()


@pytest.mark.parametrize("chunks", [None, {"y": 3, "x": 4}])
def test_infinite_cells_counts_cells_with_an_infinite_variable(chunks):
    # Source: numpy.isinf on the same values (reference library); NaN is not infinite, and a
    # chunk that is all NaN or has no ±inf counts 0
    from envelope.projection import infinite_cells

    values = np.random.default_rng(2).normal(size=(3, 9, 12))
    values[:, :3, :4] = np.nan
    values[0, 5, 5] = values[2, 5, 5] = np.inf
    values[1, 8, 11], values[2, 0, 9] = -np.inf, np.inf
    grid = _grid(values)
    stack = grid if chunks is None else grid.chunk(chunks)
    expected = int(np.isinf(grid.values).any(axis=0).sum())
    assert expected == 3
    assert int(np.asarray(infinite_cells(stack).compute() if chunks else infinite_cells(stack))) == expected


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_nonfinite_cells_match_numpy_isfinite_and_isinf(dtype):
    # Source: numpy.isfinite / numpy.isinf on the same columns (reference library). Includes
    # +inf and -inf in one cell (their sum is NaN), NaN beside inf, and finite values whose
    # sum overflows the dtype (a suspect of the one-sum probe that must not be reported)
    from envelope.projection import nonfinite_cells

    big = np.finfo(dtype).max
    X = np.random.default_rng(5).normal(size=(4, 50)).astype(dtype)
    X[0, 3] = np.nan
    X[1, 7], X[2, 7] = np.inf, -np.inf
    X[3, 11], X[0, 11] = np.nan, np.inf
    X[:, 20] = big  # finite, the sum overflows
    X[2, 33] = -np.inf
    missing, infinite = nonfinite_cells(X)
    np.testing.assert_array_equal(missing, np.flatnonzero(~np.isfinite(X).all(axis=0)))
    np.testing.assert_array_equal(infinite, np.flatnonzero(np.isinf(X).any(axis=0)))
    assert list(missing) == [3, 7, 11, 33] and list(infinite) == [7, 11, 33]


@pytest.mark.parametrize("chunks", [None, {"y": 3, "x": 4}])
def test_suitability_counts_infinite_cells_in_the_same_tasks(chunks):
    # Source: numpy.isinf on the same values (reference library), and the layer equals the one
    # project_suitability gives without the count
    from envelope.models import PercentileEnvelope

    values = np.random.default_rng(2).normal(size=(2, 9, 12))
    values[:, :3, :4] = np.nan
    values[0, 5, 5] = np.inf
    values[1, 8, 11] = -np.inf
    grid = _grid(values, names=["t", "p"])
    X = np.random.default_rng(3).normal(size=(60, 2))
    model = PercentileEnvelope().fit(X, np.r_[np.ones(30), np.zeros(30)])
    stack = grid if chunks is None else grid.chunk(chunks)
    layer, count = project_suitability(model, stack, ["t", "p"], None, clamp=False, count_infinite=True)
    assert int(np.asarray(count.compute() if chunks else count)) == int(np.isinf(values).any(axis=0).sum()) == 2
    alone = project_suitability(model, stack, ["t", "p"], None, clamp=False)
    np.testing.assert_array_equal(np.asarray(layer.values), np.asarray(alone.values))
    assert np.isnan(layer.values[5, 5]) and np.isnan(layer.values[8, 11])
