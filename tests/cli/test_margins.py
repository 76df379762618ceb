"""`envelope margins` from the command line: summary keys and bad input (exit status 2)."""

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import rioxarray  # noqa: F401
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.writing import write_raster

SPECIES = "Fictus marginalis"


@pytest.fixture
def inputs(tmp_path):
    """A 0.5-degree grid in open ocean; the species holds rows 10-15 in 1980 and rows 8-13 in 2010."""
    ny, nx = 20, 4
    y = 60.0 - 0.5 * (np.arange(ny) + 0.5)
    x = -150 + 0.5 * (np.arange(nx) + 0.5)
    grid = xr.DataArray(np.ones((ny, nx), "float32"), dims=("y", "x"), coords={"y": y, "x": x},
                        name="t").rio.write_crs("EPSG:4326")
    write_raster(grid, tmp_path / "grid.tif")
    write_raster((grid * 0 + (100.0 * (y - 50.0))[:, None]).astype("float32").rename("elevation"),
                 tmp_path / "dem.tif")
    rows = []
    for rows_k, year in ((range(10, 16), 1980), (range(8, 14), 2010)):
        for r in range(ny):
            for c in range(nx):
                rows.append({"decimalLongitude": x[c], "decimalLatitude": y[r], "year": year,
                             "scientificName": SPECIES if r in rows_k else "Alia communis"})
    pd.DataFrame(rows).to_csv(tmp_path / "records.csv", index=False)
    return tmp_path


def run(inputs, *extra):
    return CliRunner().invoke(cli, ["margins", str(inputs / "records.csv"), "--grid", str(inputs / "grid.tif"),
                                    "--species", SPECIES, "--summary", str(inputs / "m.json"), *extra])


def test_summary_keys_and_values(inputs):
    result = run(inputs, "--periods", "1970-1990,2000-2020", "--n-cells", "4", "--min-records", "1",
                 "--bootstrap", "100", "--elevation", str(inputs / "dem.tif"))
    assert result.exit_code == 0, result.output
    out = json.loads((inputs / "m.json").read_text())
    for key in ("poleward_margin_shift_km", "equatorward_margin_shift_km", "poleward_margin_shift_interval_km",
                "equatorward_margin_shift_interval_km", "n_cells_used", "elevation_shift_m"):
        assert key in out
    # Analytic: both margins move 2 rows (1 degree) north: about 111 km along the meridian
    # (pyproj.Geod gives 111.2-111.3 km between 52-56 N; checked exactly in tests/test_margins.py).
    assert 110.9 < out["poleward_margin_shift_km"] < 111.5
    assert 110.9 < out["equatorward_margin_shift_km"] < 111.5
    assert out["elevation_shift_m"] == pytest.approx(100.0, abs=1e-3)   # slope 100 m per degree
    assert out["n_cells_used"] == {"1970-1990": 24, "2000-2020": 24}


@pytest.mark.parametrize("periods, extra, message", [
    ("1970-1995,1990-2020", (), "overlap"),
    ("1970-1990,2030-2040", (), "no records in period 2030-2040"),
    ("1970-1990,2000-2020", ("--n-cells", "50"), "--n-cells: 50 most poleward cells"),
])
def test_bad_input_exits_2(inputs, periods, extra, message):
    result = run(inputs, "--periods", periods, "--min-records", "1", "--bootstrap", "0", *extra)
    assert result.exit_code == 2
    assert message in result.output
    assert not (inputs / "m.json").exists()


def test_help_has_examples():
    result = CliRunner().invoke(cli, ["margins", "--help"])
    assert result.exit_code == 0 and "$ envelope margins" in result.output
