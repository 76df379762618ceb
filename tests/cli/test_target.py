"""`envelope target` from the command line: outputs and bad input."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.rasters import open_layer, write_raster
from tests.test_reach import layer
from tests.test_targeting import landscape


@pytest.fixture
def inputs(tmp_path):
    now, futures, hab, start, cand = landscape()
    paths = {}
    for name, da in (("now", now), ("fut", futures[0][1]), ("hab", hab), ("cand", cand)):
        paths[name] = tmp_path / f"{name}.tif"
        write_raster(da.rename(name), paths[name],
                     tags={"threshold": 0.5} if name in ("now", "fut") else None)
    paths["start"] = tmp_path / "start.tif"
    write_raster(layer(start).rename("occupied"), paths["start"])
    return paths


def args(p, out_dir, *extra, budget="1000", cand=None):
    return ["target", "--now", str(p["now"]), "--future", str(p["fut"]), "--years", "2100",
            "--habitat", str(p["hab"]), "--start", str(p["start"]), "--mean-distance-km", "3", "--rate", "3",
            "--candidates", str(cand or p["cand"]), "--budget-km2", budget, "--random-draws", "3",
            "--out", str(out_dir / "priority.tif"), "--table", str(out_dir / "priority.csv"),
            "--summary", str(out_dir / "target.json"), *extra]


def test_target_writes_rank_table_summary(inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out, budget="2000"))
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "target.json").read_text())
    for key in ("reachable_gain_km2", "random_baseline_gain_km2", "nearest_baseline_gain_km2", "budget_km2",
                "n_candidate_patches", "n_chosen", "baseline_gained_reached_km2"):
        assert key in summary
    table = pd.read_csv(out / "priority.csv")
    assert list(table.columns) == ["rank", "patch_id", "area_km2", "cost", "added_reachable_km2",
                                   "added_per_km2", "centroid_lon", "centroid_lat"]
    assert len(table) == summary["n_chosen"] >= 1
    rank = open_layer(out / "priority.tif", categorical=True).values
    assert rank[12, 9] == 1              # the bridging patch (Analytic: only it crosses the gap)
    assert rank[31, 1] == 0              # the hole behind the front is not chosen (nodata 0)
    # Common practice, no source: the table's areas respect the budget
    assert table["area_km2"].sum() <= 2000


def _other_grid(tmp_path):
    other = layer(np.ones((10, 10)))
    p = tmp_path / "other.tif"
    write_raster(other.rename("cand"), p)
    return p


def _empty(tmp_path):
    p = tmp_path / "empty.tif"
    write_raster(layer(np.zeros((40, 20))).rename("cand"), p)
    return p


@pytest.mark.parametrize("case, phrase", [
    ("budget0", "--budget-km2 must be > 0"),
    ("budget_neg", "--budget-km2 must be > 0"),
    ("grid", "--candidates"),
    ("empty", "no candidate cell"),
])
def test_bad_input_exit_2_nothing_written(inputs, tmp_path, case, phrase):
    out = tmp_path / "out"
    out.mkdir()
    kw = {}
    if case == "budget0":
        kw["budget"] = "0"
    elif case == "budget_neg":
        kw["budget"] = "-5"
    elif case == "grid":
        kw["cand"] = _other_grid(tmp_path)
    else:
        kw["cand"] = _empty(tmp_path)
    result = CliRunner().invoke(cli, args(inputs, out, **kw))
    assert result.exit_code == 2, result.output
    assert phrase in result.output
    assert len([ln for ln in result.output.strip().splitlines() if ln.strip()]) == 1
    assert list(out.iterdir()) == []
