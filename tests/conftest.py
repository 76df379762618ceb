"""Shared fixtures: tiny synthetic grids built in memory (no project data)."""

import numpy as np
import pytest
import xarray as xr
import rioxarray  # noqa: F401  (registers .rio)


def make_stack(nx=20, ny=15, variables=("t", "p"), lon0=-150.0, lat0=45.0, res=0.1, seed=0, crs="EPSG:4326"):
    """A small north-up climate stack with dims (variable, y, x) and CRS attached."""
    rng = np.random.default_rng(seed)
    x = lon0 + res * (np.arange(nx) + 0.5)
    y = lat0 - res * (np.arange(ny) + 0.5)
    data = rng.normal(size=(len(variables), ny, nx)).astype("float32")
    da = xr.DataArray(data, dims=("variable", "y", "x"),
                      coords={"variable": list(variables), "y": y, "x": x}, name="climate")
    return da.rio.write_crs(crs)


@pytest.fixture
def small_stack():
    return make_stack()
