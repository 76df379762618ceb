"""`envelope change`: success paths, and bad input -> exit 2 with nothing written."""

import json

import numpy as np
import pandas as pd
import pytest
import rioxarray  # noqa: F401  (registers .rio)
import xarray as xr
from click.testing import CliRunner

from envelope.cli.main import cli


def _layer(values, lon0=0.0, lat0=10.0):
    values = np.asarray(values, dtype="float32")
    ny, nx = values.shape
    return xr.DataArray(values, dims=("y", "x"),
                        coords={"y": lat0 - (np.arange(ny) + 0.5), "x": lon0 + np.arange(nx) + 0.5}).rio.write_crs("EPSG:4326")


def _write(da, path, **tags):
    from envelope.io.writing import write_raster

    write_raster(da, path, tags=tags or None)
    return str(path)


@pytest.fixture
def files(tmp_path):
    return {
        "now": _write(_layer([[0.9, 0.9], [0.1, 0.1]]), tmp_path / "now.tif", threshold=0.5),
        "future": _write(_layer([[0.9, 0.1], [0.9, 0.1]]), tmp_path / "future.tif", threshold=0.5),
        "bare": _write(_layer([[0.9, 0.1], [0.9, 0.1]]), tmp_path / "bare.tif"),
        "shifted": _write(_layer([[0.9, 0.1], [0.9, 0.1]], lon0=5.0), tmp_path / "shifted.tif", threshold=0.5),
        "dir": tmp_path,
    }


def _run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def test_change_writes_map_and_summary(files):
    out, summ = files["dir"] / "c.tif", files["dir"] / "c.json"
    r = _run("change", "--now", files["now"], "--future", files["future"], "--out", out, "--summary", summ)
    assert r.exit_code == 0, r.output
    assert "Wrote" in r.output
    s = json.loads(summ.read_text())
    assert s["threshold"] == 0.5 and s["n_cells"]["stable"] == 1 and s["n_cells"]["gained"] == 1
    # rerun refuses without --overwrite, succeeds with it
    r = _run("change", "--now", files["now"], "--future", files["future"], "--out", out, "--summary", summ)
    assert r.exit_code == 2 and "add --overwrite" in r.output
    r = _run("change", "--now", files["now"], "--future", files["future"], "--out", out, "--summary", summ,
             "--overwrite", "--threshold", "0.95")
    assert r.exit_code == 0 and json.loads(summ.read_text())["threshold"] == 0.95


@pytest.mark.parametrize("case,phrase", [
    ("no_threshold", "bare.tif has no 'threshold' tag; pass --threshold"),
    ("grid", "shifted.tif: origin/transform"),
    ("bad_threshold", "--threshold: found 1.5; expected a number between 0 and 1"),
])
def test_bad_input_exit_2_nothing_written(files, case, phrase):
    # Common practice, no source: the error contract of the brief (one line, exit 2).
    out, summ = files["dir"] / "c.tif", files["dir"] / "c.json"
    now, future, extra = files["now"], files["future"], []
    if case == "no_threshold":
        now = future = files["bare"]
    elif case == "grid":
        future = files["shifted"]
    else:
        extra = ["--threshold", "1.5"]
    r = _run("change", "--now", now, "--future", future, "--out", out, "--summary", summ, *extra)
    assert r.exit_code == 2
    assert phrase in r.output
    if case == "grid":
        assert "now.tif" in r.output  # the message names both grids
    assert not out.exists() and not summ.exists()


def test_batch_form(files):
    d = files["dir"]
    pd.DataFrame({"name": ["a"], "pathway": ["p1"], "climate_model": ["m1"], "horizon": ["2050"],
                  "path": ["future.tif"]}).to_csv(d / "scen.csv", index=False)
    r = _run("change", "--now", files["now"], "--scenarios", d / "scen.csv", "--out-dir", d / "out",
             "--table", d / "changes.csv")
    assert r.exit_code == 0, r.output
    table = pd.read_csv(d / "changes.csv")
    assert table.loc[0, "name"] == "a" and "area_km2.gained" in table.columns
    r = _run("change", "--now", files["now"], "--scenarios", d / "scen.csv", "--out-dir", d / "out")
    assert r.exit_code == 2 and "--scenarios needs --out-dir and --table" in r.output


def test_netcdf_future_against_geotiff_now(tmp_path):
    # Analytic: the same grid written as GeoTIFF and as CF-NetCDF by envelope's own writer is one
    # grid; `change` compares them by transform and shape (issue 19, group 9), not by exact labels.
    now = _layer([[0.9, 0.9, 0.1], [0.1, 0.1, 0.1]], lon0=0.1, lat0=10.3)
    future = _layer([[0.9, 0.1, 0.9], [0.9, 0.1, 0.1]], lon0=0.1, lat0=10.3)
    now_path = _write(now, tmp_path / "now.tif", threshold=0.5)
    future_path = _write(future, tmp_path / "future.nc", threshold=0.5)
    result = CliRunner().invoke(cli, ["change", "--now", now_path, "--future", future_path,
                                      "--out", str(tmp_path / "c.tif"), "--summary", str(tmp_path / "c.json")])
    assert result.exit_code == 0, result.output
    summary = json.loads((tmp_path / "c.json").read_text())
    # Analytic: by construction one cell stays suitable, one is lost and two are gained
    assert summary["n_cells"]["stable"] == 1 and summary["n_cells"]["lost"] == 1 and summary["n_cells"]["gained"] == 2


def test_windowed_above_the_cell_limit_gives_the_same_summary(files, tmp_path, monkeypatch):
    # Common practice, no source: measuring window by window equals the whole-grid pass.
    from envelope.pipelines import change as change_pipeline

    args = ["change", "--now", files["now"], "--future", files["future"]]
    whole = _run(*args, "--out", tmp_path / "w.tif", "--summary", tmp_path / "w.json")
    monkeypatch.setattr(change_pipeline, "WINDOWED_CELLS", 1)
    part = _run(*args, "--out", tmp_path / "p.tif", "--summary", tmp_path / "p.json")
    assert whole.exit_code == part.exit_code == 0, part.output
    a, b = (json.loads((tmp_path / f"{n}.json").read_text()) for n in ("w", "p"))
    assert a["n_cells"] == b["n_cells"] and a["leading_edge_lat"] == b["leading_edge_lat"]
    assert b["area_km2"]["stable"] == pytest.approx(a["area_km2"]["stable"], rel=1e-12)
    assert part.output.splitlines()[0] == whole.output.splitlines()[0]  # the printed areas
