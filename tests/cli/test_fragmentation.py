"""`envelope fragmentation` from the command line: table, summary and bad input."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.writing import write_raster
from tests.test_habitat import ellipsoid_band_area_km2, layer

# The hand-computed grid of tests/test_habitat.py: 0–2° N, 0.5° cells, bands 0–1 and 1–2° N.
HAB = np.array([
    [0.9, 0.0, 0.0, 0.0],
    [0.9, 0.0, 0.7, 0.7],
    [0.9, 0.0, 0.0, 0.3],
    [0.9, 0.0, 0.6, 0.0],
], "float32")


@pytest.fixture
def habitat(tmp_path):
    p = tmp_path / "habitat.tif"
    write_raster(layer(HAB, x0=0.0, y_top=2.0, res=0.5).rename("habitat"), p)
    return p


def test_table_and_summary_hand_computed(habitat, tmp_path):
    # Source: Jaeger 2000, m_eff = Σ A_i² / A_t per band with cutting-out; closed-form
    # ellipsoid cell areas (REFERENCES.md §6), worked by hand as in tests/test_habitat.py.
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), "--out", str(tmp_path / "f.csv"),
                                      "--summary", str(tmp_path / "f.json")])
    assert result.exit_code == 0, result.output
    table = pd.read_csv(tmp_path / "f.csv")
    a = {lat: ellipsoid_band_area_km2(lat, lat + 0.5, 0.5) for lat in (0.0, 0.5, 1.0, 1.5)}
    south = [a[0.0] + a[0.5], a[0.0]]
    north = [a[1.0] + a[1.5], 2 * a[1.0]]
    assert list(table["lat_min"]) == [0.0, 1.0]
    np.testing.assert_allclose(table["effective_mesh_size_km2"],
                               [sum(p * p for p in south) / (4 * (a[0.0] + a[0.5])),
                                sum(p * p for p in north) / (4 * (a[1.0] + a[1.5]))], rtol=1e-9)
    summary = json.loads((tmp_path / "f.json").read_text())
    assert summary["poleward_half_more_fragmented"] is False  # the northern band's patches are larger
    assert summary["bands"][1]["n_patches"] == 2 and summary["inputs"]["habitat"] == str(habitat)
    assert "equator to pole" in result.output


def test_grid_sets_land_and_connectivity_8(habitat, tmp_path):
    # Definition: land is where --grid has data; 8-connectivity joins corner neighbours
    # (in the northern band the column-0 patch and the cols 2-3 patch stay apart either way).
    grid = tmp_path / "grid.tif"
    g = np.ones((4, 4), "float32")
    g[:, 3] = np.nan
    write_raster(layer(g, x0=0.0, y_top=2.0, res=0.5).rename("bio1"), grid)
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), "--grid", str(grid),
                                      "--connectivity", "8", "--out", str(tmp_path / "f.csv")])
    assert result.exit_code == 0, result.output
    table = pd.read_csv(tmp_path / "f.csv")
    a = {lat: ellipsoid_band_area_km2(lat, lat + 0.5, 0.5) for lat in (0.0, 1.0, 1.5)}
    assert table["land_area_km2"].iloc[1] == pytest.approx(3 * (a[1.0] + a[1.5]), rel=1e-9)
    # column 3 (0.7 at 1.0-1.5°N) is sea now: the northern patches are col 0 and col 2
    assert table["habitat_area_km2"].iloc[1] == pytest.approx(2 * a[1.0] + a[1.5], rel=1e-9)


def test_demo_land_cover(tmp_path):
    # Source: sample_grids/README.md: the demo's habitat fragments poleward.
    from envelope.study.demo import demo_dir

    demo = demo_dir()
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(demo / "landcover.tif"), "--classes",
                                      str(demo / "landcover_classes.csv"), "--grid", str(demo / "baseline.tif"),
                                      "--out", str(tmp_path / "f.csv"), "--summary", str(tmp_path / "f.json")])
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "f.json").read_text())["poleward_half_more_fragmented"] is True


@pytest.mark.parametrize("extra, phrase", [
    (["--habitat-threshold", "0"], "--habitat-threshold must lie in (0, 1]"),
    (["--band-deg", "-1"], "--band-deg must be a width in degrees"),
    (["--grid", "OTHER"], "align=True"),
])
def test_bad_input_exit_2_nothing_written(habitat, tmp_path, extra, phrase):
    other = tmp_path / "other.tif"
    write_raster(layer(np.ones((3, 3), "float32"), x0=10.0, y_top=5.0, res=1.0).rename("g"), other)
    extra = [str(other) if e == "OTHER" else e for e in extra]
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), *extra,
                                      "--out", str(out / "f.csv"), "--summary", str(out / "f.json")])
    assert result.exit_code == 2, result.output
    assert phrase in result.output
    assert len([ln for ln in result.output.strip().splitlines() if ln.strip()]) == 1
    assert list(out.iterdir()) == []


def test_refuses_to_overwrite(habitat, tmp_path):
    out = tmp_path / "f.csv"
    out.write_text("keep")
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), "--out", str(out)])
    assert result.exit_code == 2 and "--overwrite" in result.output
    assert out.read_text() == "keep"
    ok = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), "--out", str(out), "--overwrite"])
    assert ok.exit_code == 0 and out.read_text().startswith("lat_min")


def test_bad_connectivity_is_a_usage_error(habitat, tmp_path):
    result = CliRunner().invoke(cli, ["fragmentation", "--habitat", str(habitat), "--connectivity", "6",
                                      "--out", str(tmp_path / "f.csv")])
    assert result.exit_code == 2 and "Invalid value for '--connectivity'" in result.output
