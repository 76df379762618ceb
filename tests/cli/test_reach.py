"""`envelope reach` from the command line: outputs and bad input."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.rasters import open_layer, read_tags
from envelope.io.writing import write_raster
from tests.test_reach import corridor, layer


@pytest.fixture
def inputs(tmp_path):
    now, fut, hab, start = corridor(gap_rows=slice(10, 30))
    paths = {}
    for name, da in (("now", now), ("fut", fut), ("hab", hab)):
        paths[name] = tmp_path / f"{name}.tif"
        write_raster(da.rename(name), paths[name], tags={"threshold": 0.5, "threshold_rule": "max-sss"}
                     if name != "hab" else None)
    paths["start"] = tmp_path / "start.tif"
    write_raster(layer(start).rename("occupied"), paths["start"])
    return paths


def args(p, out_dir, *extra):
    return ["reach", "--now", str(p["now"]), "--future", str(p["fut"]), "--years", "2050",
            "--habitat", str(p["hab"]), "--start", str(p["start"]), "--kernel", "exponential",
            "--mean-distance-km", "2", "--rate", "2", "--out", str(out_dir / "reach.tif"),
            "--summary", str(out_dir / "reach.json"), *extra]


def test_reach_writes_classes_summary_front_arrival(inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out, "--front", str(out / "front.geojson"),
                                          "--arrival", str(out / "arrival.tif")))
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "reach.json").read_text())
    for key in ("gained_reached", "gained_unreached", "gained_no_habitat", "lost", "stable"):
        assert key in summary["area_km2"]
    for key in ("reached_share_of_gain", "front_advance_km", "spread_rate_km_per_decade", "front_columns_used",
                "leading_edge_shift_km", "kernel_tail_mass_truncated"):
        assert key in summary
    # Definition: the grid's rows span 7-10° N, so three 1° bands, equator to pole
    frag = summary["fragmentation_by_latitude"]
    assert [b["lat_min"] for b in frag["bands"]] == [7.0, 8.0, 9.0]
    assert "habitat fragmentation by latitude" in result.output
    tags = read_tags(out / "reach.tif")
    assert tags["categories"][3] == "gained_reached"
    classes = open_layer(out / "reach.tif", categorical=True).values
    assert (classes[:10] == 4).all()
    front = json.loads((out / "front.geojson").read_text())
    assert front["type"] == "FeatureCollection"
    assert np.nanmax(open_layer(out / "arrival.tif").values) <= 2050


def test_start_from_records_and_land_cover_classes(inputs, tmp_path):
    lc = layer(np.where(open_layer(inputs["hab"]).values > 0, 1, 2).astype("float32")).astype("uint8")
    write_raster(lc.rename("landcover"), tmp_path / "lc.tif", nodata=0)
    pd.DataFrame({"code": [1, 2], "name": ["open", "forest"], "habitat_quality": [1.0, 0.0]}).to_csv(
        tmp_path / "classes.csv", index=False)
    pd.DataFrame({"decimalLongitude": [0.6, 0.8], "decimalLatitude": [7.1, 7.1]}).to_csv(
        tmp_path / "rec.csv", index=False)
    p = dict(inputs, hab=tmp_path / "lc.tif", start=tmp_path / "rec.csv")
    result = CliRunner().invoke(cli, args(p, tmp_path, "--classes", str(tmp_path / "classes.csv")))
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "reach.json").read_text())["start"]["n_cells"] == 2


@pytest.mark.parametrize("extra, phrase", [
    (["--mean-distance-km", "-1"], "--mean-distance-km"),
    (["--years", "2050,2080"], "one per map"),
    (["--kernel", "2dt"], "shape is required"),
    (["--threshold", "1.5"], "threshold"),
])
def test_bad_input_exit_2_nothing_written(inputs, tmp_path, extra, phrase):
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out) + extra)
    assert result.exit_code == 2, result.output
    assert phrase in result.output
    assert list(out.iterdir()) == []


def test_habitat_out_of_range_and_unknown_class(inputs, tmp_path):
    write_raster(layer(np.full((60, 30), 1.5)).rename("h"), tmp_path / "bad.tif")
    out = tmp_path / "out"
    out.mkdir()
    r = CliRunner().invoke(cli, args(dict(inputs, hab=tmp_path / "bad.tif"), out))
    assert r.exit_code == 2 and "bad.tif" in r.output
    lc = layer(np.full((60, 30), 9.0)).astype("uint8")
    write_raster(lc.rename("lc"), tmp_path / "lc.tif", nodata=0)
    pd.DataFrame({"code": [1], "name": ["open"], "habitat_quality": [1.0]}).to_csv(tmp_path / "c.csv", index=False)
    r = CliRunner().invoke(cli, args(dict(inputs, hab=tmp_path / "lc.tif"), out, "--classes", str(tmp_path / "c.csv")))
    assert r.exit_code == 2 and "9" in r.output
    assert list(out.iterdir()) == []


def test_start_records_outside_grid(inputs, tmp_path):
    pd.DataFrame({"decimalLongitude": [50.0], "decimalLatitude": [50.0]}).to_csv(tmp_path / "far.csv", index=False)
    out = tmp_path / "out"
    out.mkdir()
    r = CliRunner().invoke(cli, args(dict(inputs, start=tmp_path / "far.csv"), out))
    assert r.exit_code == 2 and "inside the grid" in r.output


def test_reach_probability_is_the_share_of_replicates(inputs, tmp_path):
    # Analytic: with N replicates the probability of reach takes the values k/N, and the
    # summary's gained_reached is the median of the N replicates with its 5/50/95 % values.
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out, "--replicates", "4", "--seed", "3",
                                          "--probability", str(out / "reach_probability.tif")))
    assert result.exit_code == 0, result.output
    p = open_layer(out / "reach_probability.tif").values
    finite = p[np.isfinite(p)]
    assert finite.size and np.allclose(finite * 4, np.round(finite * 4), atol=1e-6)
    s = json.loads((out / "reach.json").read_text())
    iv = s["intervals"]["area_km2"]["gained_reached"]
    assert s["n_runs"] == 4 and iv["p05"] <= s["area_km2"]["gained_reached"] == iv["p50"] <= iv["p95"]
    assert set(s["intervals"]) >= {"area_km2", "front_advance_km"}


def test_start_records_of_several_taxa_need_species(inputs, tmp_path):
    # A portal download holding two taxa: without --species the start is ambiguous (exit 2,
    # both taxa named); with it only that taxon's records start the spread
    pd.DataFrame({"scientificName": ["Aus bus", "Aus bus", "Cus dus"],
                  "decimalLongitude": [0.6, 0.8, 1.2], "decimalLatitude": [7.1, 7.1, 7.3]}).to_csv(
        tmp_path / "two.csv", index=False)
    p = dict(inputs, start=tmp_path / "two.csv")
    out = tmp_path / "out"
    out.mkdir()
    bad = CliRunner().invoke(cli, args(p, out))
    assert bad.exit_code == 2 and "Aus bus" in bad.output and "Cus dus" in bad.output
    assert not (out / "reach.json").exists()
    ok = CliRunner().invoke(cli, args(p, out, "--species", "aus bus"))
    assert ok.exit_code == 0, ok.output
    start = json.loads((out / "reach.json").read_text())["start"]
    assert start["n_cells"] == 2 and start["n_read"] == 3


def test_species_with_a_raster_start_is_an_error(inputs, tmp_path):
    r = CliRunner().invoke(cli, args(inputs, tmp_path, "--species", "Aus bus"))
    assert r.exit_code == 2 and "--start" in r.output and "raster" in r.output
    assert not (tmp_path / "reach.json").exists()
