"""The spatial autocovariate on grids, its fit term, its handling in projection, residual correlograms."""

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr
import rioxarray  # noqa: F401

from envelope.autocovariate import (AUTOCOVARIATE_VARIABLE, autocovariate_for_projection, autocovariate_layer,
                                    with_autocovariate)
from envelope.errors import InputError
from envelope.pipelines.fit import FitOptions, fit_model, write_fit_outputs
from envelope.projection import project_suitability
from envelope.records import values_at
from tests.conftest import make_stack


def _occupancy(stack, cells):
    occ = xr.zeros_like(stack.isel(variable=0, drop=True), dtype=float)
    for r, c in cells:
        occ[r, c] = 1.0
    return occ


def test_layer_against_geodesic_distances():
    # Source: pyproj.Geod.inv (Karney 2013) for the inverse-distance weights; the layer uses
    # chords on a sphere, within 0.5 % of geodesic distances at these 10-30 km ranges
    # (ellipsoid vs sphere), so the weighted shares agree to about 1e-3.
    stack = make_stack(nx=6, ny=5, lat0=45.0, res=0.1)
    occ = _occupancy(stack, [(1, 1), (2, 3), (4, 5)])
    layer = autocovariate_layer(occ, 25.0, grid=stack)
    geod = pyproj.Geod(ellps="WGS84")
    lon, lat = np.meshgrid(stack["x"].values, stack["y"].values)
    lon, lat, o = lon.ravel(), lat.ravel(), occ.values.ravel()
    for i in (0, 7, 14, 29):
        _, _, d = geod.inv(np.full(lon.size, lon[i]), np.full(lon.size, lat[i]), lon, lat)
        d = d / 1000.0
        near = (d > 0) & (d <= 25.0)
        expected = np.sum(o[near] / d[near]) / np.sum(1.0 / d[near])
        assert layer.values.ravel()[i] == pytest.approx(expected, abs=2e-3)


def test_projection_modes():
    # Analytic: "held" returns today's layer unchanged; from a fully occupied landscape every
    # cell's neighbours are all occupied, so the share is 1 everywhere.
    stack = make_stack(nx=6, ny=5)
    today = autocovariate_layer(_occupancy(stack, [(1, 1)]), 30.0, grid=stack)
    assert autocovariate_for_projection(today) is today
    full = autocovariate_for_projection(today, mode="occupancy", occupancy=_occupancy(stack, [(r, c) for r in range(5)
                                                                                             for c in range(6)]))
    assert np.allclose(full.values, 1.0)
    with pytest.raises(InputError, match="expected one of held, occupancy"):
        autocovariate_for_projection(today, mode="future")
    with pytest.raises(InputError, match="already holds"):
        with_autocovariate(with_autocovariate(stack, today), today)


@pytest.fixture(scope="module")
def clustered():
    """Records in tight clusters on a climate of pure noise: the residuals are clustered too."""
    stack = make_stack(nx=40, ny=40, res=0.1, seed=4)
    rng = np.random.default_rng(5)
    centres = rng.uniform(0.5, 3.5, size=(6, 2))
    pts = np.vstack([c + rng.normal(scale=0.12, size=(15, 2)) for c in centres])
    table = pd.DataFrame({"decimalLongitude": -150.0 + np.clip(pts[:, 0], 0.01, 3.99),
                          "decimalLatitude": 45.0 - np.clip(pts[:, 1], 0.01, 3.99)})
    base = dict(method="pointprocess", features=("linear", "quadratic"), background=1500, folds=3, cv="random",
                seed=0, permutation_repeats=1)
    without = fit_model(table, stack, options=FitOptions(**base))
    with_term = fit_model(table, stack, options=FitOptions(**base, autocovariate_km=25.0))
    return stack, table, without, with_term


def test_fit_summaries_report_correlograms_and_the_term_lowers_short_lag_moran(clustered):
    # Common practice, no source (Dormann et al. 2007 review the idea): an autocovariate term
    # absorbs clustering the climate cannot explain, so residual Moran's I at the shortest lag falls.
    _, _, without, with_term = clustered
    a = without.summary["residual_autocorrelation"]["classes"]
    b = with_term.summary["residual_autocorrelation"]["classes"]
    assert len(a) == len(b) == 10
    assert a[0]["morans_i"] > 0.05
    assert b[0]["morans_i"] < a[0]["morans_i"]
    assert AUTOCOVARIATE_VARIABLE in with_term.summary["variables"]
    assert AUTOCOVARIATE_VARIABLE not in without.summary["variables"]
    assert with_term.summary["autocovariate"]["radius_km"] == 25.0


def test_held_projection_reproduces_the_fit_and_the_layer_is_written(clustered, tmp_path):
    # Analytic: projecting onto the training climate with today's neighbourhood held gives the
    # fitted model's own predictions at the record cells (same inputs, same model).
    stack, _, _, with_term = clustered
    layer = with_term.autocovariate
    names = with_term.summary["variables"]
    rng_ = with_term.summary["training_range"]
    suit = project_suitability(with_term.estimator, with_autocovariate(stack, autocovariate_for_projection(layer)),
                               names, rng_).values
    rows, cols = np.nonzero(layer.values > 0.5)
    X = values_at(with_autocovariate(stack, layer), rows, cols)
    lower = np.array([rng_[n][0] for n in names])
    upper = np.array([rng_[n][1] for n in names])
    direct = with_term.estimator.predict_proba(np.clip(X, lower, upper))[:, 1]
    assert np.allclose(suit[rows, cols], direct, atol=1e-5)
    paths = write_fit_outputs(with_term, tmp_path / "m.envm")
    assert paths["autocovariate"].endswith("m.autocovariate.tif")
    from envelope.io.rasters import open_layer

    assert np.allclose(open_layer(paths["autocovariate"]).values, layer.values, equal_nan=True)


def test_project_file_takes_the_layer_beside_the_model(clustered, tmp_path):
    # The model's autocovariate layer is found beside the model file: projecting the climate
    # alone equals projecting it with the layer passed as one more climate file (the held
    # mode), and without the layer the error names the missing file.
    import shutil

    from envelope.io.rasters import open_layer
    from envelope.io.writing import write_raster
    from envelope.pipelines.project import project_file

    stack, _, _, with_term = clustered
    paths = write_fit_outputs(with_term, tmp_path / "m.envm")
    climate = tmp_path / "climate.tif"
    write_raster(stack, climate)
    shutil.copy(paths["autocovariate"], tmp_path / "autocovariate.tif")
    project_file(paths["model"], climate, tmp_path / "auto.tif")
    project_file(paths["model"], [climate, tmp_path / "autocovariate.tif"], tmp_path / "given.tif")
    np.testing.assert_array_equal(open_layer(tmp_path / "auto.tif").values, open_layer(tmp_path / "given.tif").values)
    Path(paths["autocovariate"]).unlink()
    with pytest.raises(InputError, match="m.autocovariate.tif is missing"):
        project_file(paths["model"], climate, tmp_path / "none.tif")
    assert not (tmp_path / "none.tif").exists()
