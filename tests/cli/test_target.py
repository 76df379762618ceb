"""`envelope target` from the command line: outputs and bad input."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.io.rasters import open_layer
from envelope.io.writing import write_raster
from tests.test_reach import layer
from tests.test_targeting import landscape, model_and_patches


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


def failed_cleanly(result, out, phrase):
    """Exit status 2, one line `Error: ...` holding ``phrase``, nothing written to ``out``."""
    assert result.exit_code == 2, result.output
    assert phrase in result.output
    assert len([ln for ln in result.output.strip().splitlines() if ln.strip()]) == 1
    assert list(out.iterdir()) == []


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
    failed_cleanly(result, out, phrase)


# --------------------------------------------------------------------------- several climate paths


def _paths_table(tmp_path, inputs, rows=None, header="name,pathway,climate_model,horizon,path"):
    """A suitability table (the format `envelope project --scenarios` writes) with two climate models."""
    from tests.test_targeting import two_paths

    _, paths, _, _, _ = two_paths()
    east = tmp_path / "east.tif"
    write_raster(paths["east"][0][1].rename("suitability"), east, tags={"threshold": 0.5})
    rows = rows or [f"p_all_2100,p,all,2100,{inputs['fut'].name}", "p_east_2100,p,east,2100,east.tif"]
    table = tmp_path / "suitability_table.csv"
    table.write_text(header + "\n" + "\n".join(rows) + "\n")
    return table


def table_args(p, out_dir, table, *extra, budget="1000"):
    return ["target", "--now", str(p["now"]), "--scenarios", str(table), "--habitat", str(p["hab"]),
            "--start", str(p["start"]), "--mean-distance-km", "3", "--rate", "3", "--candidates", str(p["cand"]),
            "--budget-km2", budget, "--random-draws", "2", "--out", str(out_dir / "priority.tif"),
            "--table", str(out_dir / "priority.csv"), "--summary", str(out_dir / "target.json"), *extra]


@pytest.mark.parametrize("objective, first", [("mean", (12, 9)), ("worst", (20, 15))])
def test_scenario_table_mean_and_worst(inputs, tmp_path, objective, first):
    # Analytic (tests/test_targeting.py::two_paths): the bridge adds nothing under the "east"
    # climate model, so the worst case ranks the stub first and the mean the bridge.
    out = tmp_path / "out"
    out.mkdir()
    table = _paths_table(tmp_path, inputs)
    _, patches, _ = model_and_patches()
    budget = f"{patches.area_km2[patches.labels[12, 9] - 1] * 1.001:.3f}"   # room for the bridge only
    result = CliRunner().invoke(cli, table_args(inputs, out, table, "--objective", objective, budget=budget))
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "target.json").read_text())
    assert summary["objective"] == objective
    assert [p["name"] for p in summary["climate_paths"]] == ["p/all", "p/east"]
    rank = open_layer(out / "priority.tif", categorical=True).values
    assert rank[first] == 1
    csv = pd.read_csv(out / "priority.csv")
    assert {"added_reachable_km2.p/all", "added_reachable_km2.p/east"} <= set(csv.columns)
    assert "per climate path" in result.output


@pytest.mark.parametrize("case, phrase", [
    ("missing_column", "column 'climate_model' missing"),
    ("missing_file", "suitability raster"),
    ("mismatched_grid", "--scenarios"),
    ("with_future", "--scenarios replaces --future/--years"),
])
def test_bad_scenario_table(inputs, tmp_path, case, phrase):
    out = tmp_path / "out"
    out.mkdir()
    extra = []
    if case == "missing_column":
        table = _paths_table(tmp_path, inputs, rows=[f"a,p,2100,{inputs['fut'].name}"],
                             header="name,pathway,horizon,path")
    elif case == "missing_file":
        table = _paths_table(tmp_path, inputs, rows=["a,p,m,2100,nowhere.tif"])
    elif case == "mismatched_grid":
        table = _paths_table(tmp_path, inputs, rows=[f"a,p,m,2100,{_other_grid(tmp_path).name}"])
    else:
        table = _paths_table(tmp_path, inputs)
        extra = ["--future", str(inputs["fut"]), "--years", "2100"]
    result = CliRunner().invoke(cli, table_args(inputs, out, table, *extra))
    failed_cleanly(result, out, phrase)


def test_bad_objective_is_a_usage_error(inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out, "--objective", "best"))
    assert result.exit_code == 2
    assert "Invalid value for '--objective'" in result.output
    assert list(out.iterdir()) == []


# --------------------------------------------------------------------------- quality


def _quality_raster(tmp_path, value, shape=(40, 20)):
    p = tmp_path / "quality.tif"
    q = np.full(shape, 0.5)
    q[20, 15] = value
    write_raster(layer(q).rename("quality"), p)
    return p


def test_quality_raster_runs_and_is_recorded(inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    q = _quality_raster(tmp_path, 1.0)
    result = CliRunner().invoke(cli, args(inputs, out, "--quality", str(q)))
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "target.json").read_text())
    assert summary["quality"] == "raster" and summary["inputs"]["quality"] == str(q)


@pytest.mark.parametrize("case, phrase", [
    ("zero", "--quality must lie in (0, 1], got 0"),
    ("above", "--quality must lie in (0, 1], got 1.5"),
    ("no_file", "expected a number in (0, 1] or a quality raster"),
    ("raster_above", "outside (0, 1]"),
    ("raster_grid", "--quality"),
])
def test_bad_quality_exit_2(inputs, tmp_path, case, phrase):
    out = tmp_path / "out"
    out.mkdir()
    value = {"zero": "0", "above": "1.5", "no_file": "high"}.get(case)
    if case == "raster_above":
        value = str(_quality_raster(tmp_path, 1.2))
    elif case == "raster_grid":
        value = str(_other_grid(tmp_path))
    result = CliRunner().invoke(cli, args(inputs, out, "--quality", value))
    failed_cleanly(result, out, phrase)


# --------------------------------------------------------------------------- --study / --run-dir


@pytest.mark.parametrize("extra, phrase", [
    (["--study", "STUDY"], "--study and --run-dir go together"),
    (["--study", "STUDY", "--run-dir", "RUN", "--now", "NOW"], "--now: the reach model comes from the study run"),
    (["--study", "STUDY", "--run-dir", "RUN", "--rate", "2"], "--rate: the reach model comes from the study run"),
    (["--study", "STUDY", "--run-dir", "RUN"], "not found; expected a finished run"),
    ([], "--now is required (or give --study and --run-dir)"),
])
def test_study_option_errors(inputs, tmp_path, extra, phrase):
    from tests.study.test_runner import small_study

    out = tmp_path / "out"
    out.mkdir()
    run_dir = tmp_path / "empty-run"
    run_dir.mkdir()
    subs = {"STUDY": str(small_study(tmp_path)), "RUN": str(run_dir), "NOW": str(inputs["now"])}
    argv = ["target", *(subs.get(a, a) for a in extra), "--candidates", str(inputs["cand"]), "--budget-km2", "10",
            "--out", str(out / "p.tif"), "--table", str(out / "p.csv"), "--summary", str(out / "t.json")]
    result = CliRunner().invoke(cli, argv)
    failed_cleanly(result, out, phrase)


def _land_cover(tmp_path, cand_path):
    """Land cover on the test grid: code 4 where the candidates are, 1 elsewhere."""
    cand = open_layer(cand_path).values
    codes = np.where(cand > 0, 4, 1).astype("uint8")
    p = tmp_path / "cover.tif"
    write_raster(layer(codes.astype("float32")).rename("cover"), p, dtype="uint8", nodata=0)
    return p


def test_candidates_from_land_cover_classes_and_patch_cap(inputs, tmp_path):
    # Common practice, no source: restorable classes of a land-cover raster give the same
    # candidates as the 0/1 raster; a patch cap cuts them into more, smaller patches
    cover = _land_cover(tmp_path, inputs["cand"])
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    plain = CliRunner().invoke(cli, args(inputs, a, budget="2000"))
    by_class = CliRunner().invoke(cli, args(inputs, b, "--candidate-classes", "4", budget="2000", cand=cover))
    assert plain.exit_code == 0 and by_class.exit_code == 0, by_class.output
    sa, sb = (json.loads((d / "target.json").read_text()) for d in (a, b))
    assert sb["n_candidate_patches"] == sa["n_candidate_patches"]
    assert sb["reachable_gain_km2"] == pytest.approx(sa["reachable_gain_km2"], rel=1e-12)
    assert sb["inputs"]["candidate_classes"] == [4]
    c = tmp_path / "c"
    c.mkdir()
    capped = CliRunner().invoke(cli, args(inputs, c, "--candidate-classes", "4", "--max-patch-km2", "300",
                                          budget="2000", cand=cover))
    assert capped.exit_code == 0, capped.output
    sc = json.loads((c / "target.json").read_text())
    assert sc["n_candidate_patches"] > sa["n_candidate_patches"] and sc["max_patch_km2"] == 300
    assert (pd.read_csv(c / "priority.csv")["area_km2"] <= 300 + 1e-9).all()


@pytest.mark.parametrize("extra, phrase", [
    (["--candidate-classes", "9"], "no cell of class 9"),
    (["--max-patch-km2", "0.001"], "smaller than one candidate cell"),
])
def test_candidate_class_and_patch_cap_errors(inputs, tmp_path, extra, phrase):
    # Common practice, no source: bad input exits 2 with one line naming the option, nothing written
    cover = _land_cover(tmp_path, inputs["cand"])
    out = tmp_path / "out"
    out.mkdir()
    extra = extra if "--candidate-classes" in extra else ["--candidate-classes", "4", *extra]
    failed_cleanly(CliRunner().invoke(cli, args(inputs, out, *extra, cand=cover)), out, phrase)


def test_candidate_classes_must_be_codes(inputs, tmp_path):
    # Common practice, no source: click's usage error (exit 2) quoting the bad value
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, args(inputs, out, "--candidate-classes", "farmland"))
    assert result.exit_code == 2 and "expected comma-separated integer class codes" in result.output
    assert list(out.iterdir()) == []


def test_start_records_of_several_taxa_with_species(inputs, tmp_path):
    # The start raster's occupied cells as records of one taxon, beside another taxon's records:
    # with --species the ranking equals the raster start's (same cells occupied)
    occ = open_layer(inputs["start"])
    rows, cols = np.nonzero(occ.values > 0.5)
    recs = pd.DataFrame({"scientificName": "Aus bus", "decimalLongitude": occ["x"].values[cols],
                         "decimalLatitude": occ["y"].values[rows]})
    other = pd.DataFrame({"scientificName": ["Cus dus"], "decimalLongitude": [occ["x"].values[-1]],
                          "decimalLatitude": [occ["y"].values[0]]})
    pd.concat([recs, other]).to_csv(tmp_path / "two.csv", index=False)
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    assert CliRunner().invoke(cli, args(inputs, a)).exit_code == 0
    r = CliRunner().invoke(cli, args(dict(inputs, start=tmp_path / "two.csv"), b, "--species", "Aus bus"))
    assert r.exit_code == 0, r.output
    ta, tb = pd.read_csv(a / "priority.csv"), pd.read_csv(b / "priority.csv")
    pd.testing.assert_frame_equal(ta, tb)
