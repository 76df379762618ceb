"""The study runner end to end on a small study: outputs, no work on a re-run, resume after a kill."""

import hashlib
import json
import re
import subprocess
import sys
import time

import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.study.demo import demo_dir
from envelope.errors import InputError
from envelope.study.schema import load_study

DEMO = demo_dir()


def small_study(folder):
    """The demo study cut down: 1 method, 1500 background cells, 2 pathways x 1 model x 2 horizons."""
    scen = "\n".join(
        f'[[scenarios.grid]]\nname = "{p}_{h}"\npathway = "{p}"\nclimate_model = "model-a"\nhorizon = {h}\n'
        f'path = "{DEMO / "scenarios" / f"{p}_model-a_{h}.tif"}"\n'
        for p in ("low", "high") for h in (2050, 2080))
    text = f"""
[study]
name = "Small test study"
question = "Does the chain run?"

[records]
path = "{DEMO / 'presences.csv'}"
max_uncertainty_m = 2000

[climate]
baseline = "{DEMO / 'baseline.tif'}"
variables = ["bio5", "bio6", "bio12", "gdd5"]

[model]
methods = ["pointprocess"]
background = 1500
folds = 3
blocks_km = 60
threshold_rule = "p10"

[scenarios]
{scen.split('[[scenarios.grid]]', 1)[0]}agreement = 0.5
{'[[scenarios.grid]]' + scen.split('[[scenarios.grid]]', 1)[1]}
[habitat]
path = "{DEMO / 'habitat.tif'}"

[dispersal]
kernel = "exponential"
mean_distance_km = 5.0
step_years = 10
rate = 4.0

[outputs]
figures = false
"""
    path = folder / "study.toml"
    path.write_text(text)
    return path


_FLOAT = re.compile(r"-?\d+\.\d+(?:[eE][-+]?\d+)?")


def digests(run_dir):
    """SHA-256 of every result except the manifest and report (timestamps): raster pixels and
    tags, text files with the run folder's own path replaced (it differs between runs)."""
    import rasterio

    out = {}
    for p in sorted(run_dir.rglob("*")):
        if not p.is_file() or p.name in ("manifest.json", "report.html"):
            continue
        h = hashlib.sha256()
        if p.suffix == ".tif":
            with rasterio.open(p) as src:
                h.update(src.read().tobytes())
                # the model file's checksum covers its creation time, so it differs between runs
                tags = {k: v for k, v in src.tags().items() if k != "model_sha256"}
                h.update(json.dumps(tags, sort_keys=True).replace(str(run_dir), "RUN").encode())
        elif p.suffix == ".envm":
            import numpy as np

            from envelope.io.modelfile import load_model

            # the file holds creation times; compare what the model predicts instead
            estimator, meta = load_model(p)
            X = np.random.default_rng(0).normal(size=(50, len(meta["variables"]))) * 5 + 10
            h.update(np.round(estimator.predict_proba(X)[:, 1], 12).tobytes())
        else:
            # numbers to 10 significant digits: the fit's BLAS sums may differ in the last bit
            # between processes (thread count), which a threshold carries into every summary
            text = p.read_text().replace(str(run_dir), "RUN")
            h.update(_FLOAT.sub(lambda m: format(float(m.group(0)), ".10g"), text).encode())
        out[str(p.relative_to(run_dir))] = h.hexdigest()
    return out


@pytest.fixture(scope="module")
def full_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("study")
    study_path = small_study(folder)
    run_dir = folder / "run"
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(run_dir)])
    assert result.exit_code == 0, result.output
    return study_path, run_dir, result


def test_run_writes_every_output(full_run):
    _, run_dir, result = full_run
    for rel in ("models/pointprocess.envm", "models/pointprocess.fit.json", "projection/now_suitability.tif",
                "projection/scenarios/suitability_table.csv", "change/change_table.csv",
                "reach/high_reach.tif", "reach/held-climate_reach.json", "report.html", "manifest.json"):
        assert (run_dir / rel).exists(), rel
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert {"fit:pointprocess", "project:now", "project:scenarios", "change", "report"} <= set(manifest["steps"])
    assert all(len(step["key"]) == 64 for step in manifest["steps"].values())
    assert "software" in manifest and manifest["settings"]["model"]["background"] == 1500
    assert "report:" in result.output


def test_second_run_does_no_work(full_run):
    study_path, run_dir, _ = full_run
    before = digests(run_dir)
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(run_dir)])
    assert result.exit_code == 0
    assert "steps run: 0" in result.output
    assert digests(run_dir) == before


def test_killed_run_resumes_with_identical_outputs(full_run, tmp_path):
    study_path, run_dir, _ = full_run
    resumed = tmp_path / "resumed"
    cmd = [sys.executable, "-m", "envelope.cli.main", "run", str(study_path), "--out", str(resumed)]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 120
    while time.time() < deadline and not (resumed / "models" / "pointprocess.envm").exists():
        time.sleep(0.2)
    proc.kill()  # mid-way: after the fit, before the run is complete
    proc.wait()
    # a hard kill can leave only hidden temporary files, never a half-written result
    assert all(p.name.startswith(".") for p in resumed.rglob("*.part*"))
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(resumed)])
    assert result.exit_code == 0, result.output
    assert not list(resumed.rglob("*.part*"))
    assert digests(resumed) == digests(run_dir)


def test_study_errors_name_the_key(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[study]\nname = "x"\nnmae = "y"\n')
    result = CliRunner().invoke(cli, ["run", str(bad), "--out", str(tmp_path / "r")])
    assert result.exit_code == 2
    assert "nmae" in result.output
    with pytest.raises(InputError):
        load_study(bad)


def test_reach_summaries_hold_fragmentation_by_latitude(full_run):
    # Source: sample_grids/README.md: the demo's open-ground habitat grows fewer and smaller
    # patches poleward, so the poleward half of the bands is the more fragmented.
    _, run_dir, _ = full_run
    summary = json.loads((run_dir / "reach" / "high_reach.json").read_text())
    frag = summary["fragmentation_by_latitude"]
    lats = [b["lat_min"] for b in frag["bands"]]
    assert lats == sorted(lats) and frag["band_deg"] == 1.0
    assert frag["poleward_half_more_fragmented"] is True
    assert "more fragmented" in frag["statement"]


def test_target_reads_the_study_run(full_run, tmp_path):
    # Consistency: with nothing restored, each pathway's reachable area in targeting equals
    # the run's own deterministic reach step for that pathway (same maps, settings, start).
    import numpy as np

    from envelope.io.rasters import open_layer
    from envelope.io.writing import write_raster

    study_path, run_dir, _ = full_run
    now = open_layer(run_dir / "projection" / "now_suitability.tif")
    hab = open_layer(DEMO / "habitat.tif").values
    cand = np.zeros(now.shape, "float32")
    window = (slice(60, 72), slice(110, 122))
    cand[window] = (np.isfinite(now.values) & (hab < 0.2))[window]
    cand_path = tmp_path / "restorable.tif"
    write_raster(now.copy(data=cand).rename("candidates"), cand_path)
    out = tmp_path / "out"
    out.mkdir()
    result = CliRunner().invoke(cli, ["target", "--study", str(study_path), "--run-dir", str(run_dir),
                                      "--candidates", str(cand_path), "--budget-km2", "200", "--random-draws", "2",
                                      "--out", str(out / "p.tif"), "--table", str(out / "p.csv"),
                                      "--summary", str(out / "t.json")])
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "t.json").read_text())
    paths = {p["name"]: p for p in summary["climate_paths"]}
    assert set(paths) == {"high", "low"}
    for name, p in paths.items():
        reach = json.loads((run_dir / "reach" / f"{name}_reach.json").read_text())
        assert p["baseline_gained_reached_km2"] == pytest.approx(reach["area_km2"]["gained_reached"], rel=1e-9)
        assert p["horizon_years"] == [2050.0, 2080.0]
    fit = json.loads((run_dir / "models" / "pointprocess.fit.json").read_text())
    assert summary["threshold"] == fit["threshold"]["value"]
    assert summary["mean_distance_km"] == 5.0 and summary["inputs"]["study"] == str(study_path)


def test_netcdf_run_equals_the_geotiff_run_in_numbers(full_run, tmp_path):
    # Reference: the GeoTIFF run of the same study; only the raster container differs
    # (CF-NetCDF written through xarray), so every raster and table must agree in numbers.
    import numpy as np
    import pandas as pd
    import xarray as xr

    study_path, run_dir, _ = full_run
    nc_study = tmp_path / "study_nc.toml"
    nc_study.write_text(study_path.read_text().replace("[outputs]\n", '[outputs]\nformat = "nc"\n'))
    nc_dir = tmp_path / "run_nc"
    result = CliRunner().invoke(cli, ["run", str(nc_study), "--out", str(nc_dir)])
    assert result.exit_code == 0, result.output
    assert list(nc_dir.rglob("projection/**/*.nc")), "the projections must be NetCDF"

    def layer(path):
        """Every band or data variable, in file order, as float64 (read by rasterio / xarray)."""
        if path.suffix == ".tif":
            import rasterio

            with rasterio.open(path) as src:
                data = src.read(masked=True).astype(np.float64)
                return np.ma.filled(data, np.nan)
        with xr.open_dataset(path) as ds:
            bands = [ds[v] for v in ds.data_vars if ds[v].ndim >= 2]
            return np.stack([np.asarray(b.squeeze(drop=True).values, dtype=np.float64) for b in bands])

    compared = 0
    for tif in sorted(run_dir.rglob("*.tif")):
        rel = tif.relative_to(run_dir)
        twin = nc_dir / rel.with_suffix(".nc")
        twin = twin if twin.exists() else nc_dir / rel  # maps kept as GeoTIFF in both runs
        assert twin.exists(), rel
        a, b = layer(tif), layer(twin)
        assert a.shape == b.shape, rel
        np.testing.assert_allclose(b, a, rtol=1e-6, atol=1e-9, equal_nan=True, err_msg=str(rel))
        compared += 1
    assert compared >= 10
    for csv in sorted(run_dir.rglob("*.csv")):
        rel = csv.relative_to(run_dir)
        a, b = pd.read_csv(csv), pd.read_csv(nc_dir / rel)
        assert list(a.columns) == list(b.columns), rel
        num = a.select_dtypes("number").columns
        np.testing.assert_allclose(b[num].to_numpy(float), a[num].to_numpy(float), rtol=1e-9, atol=1e-9,
                                   equal_nan=True, err_msg=str(rel))
    for js in sorted((run_dir / "reach").glob("*.json")):
        a = json.loads(js.read_text())
        b = json.loads((nc_dir / js.relative_to(run_dir)).read_text())
        for key, value in a.items():
            if isinstance(value, float):
                assert b[key] == pytest.approx(value, rel=1e-9, abs=1e-9), (js.name, key)
def test_reach_runs_every_method_and_distance_and_partitions_them(tmp_path):
    # Analytic: a balanced design of 2 methods x 1 climate model x 3 distances per pathway
    # gives 6 runs each, and the partition's shares sum to 1 per quantity (ANOVA identity).
    import pandas as pd

    from envelope.study.runner import run_study

    p = small_study(tmp_path)
    p.write_text(p.read_text().replace('methods = ["pointprocess"]', 'methods = ["pointprocess", "envelope"]')
                 .replace("mean_distance_km = 5.0", "mean_distance_km = [3.0, 6.0]"))
    results = run_study(load_study(p), tmp_path / "run")
    assert "project:scenarios:envelope" in results["ran"]
    s = json.loads((tmp_path / "run" / "reach" / "high_reach.json").read_text())
    assert s["n_runs"] == 6 and s["runs_by"]["method"] == ["envelope", "pointprocess"]
    assert s["runs_by"]["distance_km"] == [3.0, 4.5, 6.0]
    part = pd.read_csv(tmp_path / "run" / "uncertainty_partition.csv")
    assert "method" in set(part["source"])
    for _, g in part.groupby("quantity"):
        assert g["share"].sum() == pytest.approx(1.0, abs=1e-5)


# --------------------------------------------------------------------------- run folders


def test_second_concurrent_run_is_refused_and_touches_nothing(full_run, tmp_path):
    # Common practice, no source: an OS file lock held by one process (here a child that
    # holds the run folder's lock, as a running `envelope run` does) refuses a second one
    from envelope.study.layout import RunLayout

    study_path, _, _ = full_run
    run_dir = tmp_path / "busy"
    run_dir.mkdir()
    stray = run_dir / ".now_suitability.tif.abc123.part.tif"  # the first run's temporary file
    stray.write_bytes(b"partial")
    lock = RunLayout.of(load_study(study_path), run_dir).lock
    holder = subprocess.Popen([sys.executable, "-c", "import sys, time; from filelock import FileLock; "
                               f"held = FileLock({str(lock)!r}); held.acquire(); print('held', flush=True); time.sleep(60)"],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(run_dir)])
    finally:
        holder.kill()
        holder.wait()
    assert result.exit_code == 2
    assert "another `envelope run` is writing into this run folder" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert stray.exists()  # the running run's temporary files are left alone
    assert not (run_dir / "manifest.json").exists()


def test_deleted_or_altered_outputs_are_rebuilt(full_run, tmp_path):
    # Common practice, no source: a cached step is skipped only when its outputs match the
    # SHA-256 recorded in the manifest; otherwise it runs again and restores them
    # (in the shared run folder itself: step keys hold the run folder's paths, so a copy
    # of the folder would rebuild everything; a working cache restores it as it was)
    study_path, copy, _ = full_run
    expected = digests(copy)
    (copy / "projection" / "scenarios" / "low_2050_suitability.tif").unlink()
    (copy / "change" / "high_2080.json").write_text("{}")
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(copy)])
    assert result.exit_code == 0, result.output
    last = json.loads((copy / "manifest.json").read_text())["last_run"]
    assert {"project:scenarios", "change"} <= set(last["ran"])
    assert "fit:pointprocess" in last["skipped"] and "project:now" in last["skipped"]
    assert digests(copy) == expected


def test_out_in_the_input_folder_is_refused(tmp_path):
    # Common practice, no source: a run cleans and replaces files in its folder, so it must
    # not share one with its inputs (the study file's folder here, or a folder around it)
    folder = tmp_path / "inputs"
    folder.mkdir()
    study_path = small_study(folder)
    for out in (folder, tmp_path):
        result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(out)])
        assert result.exit_code == 2, result.output
        assert "a run folder must not hold the study's inputs" in result.output
        assert "study file" in result.output
    assert sorted(p.name for p in tmp_path.rglob("*")) == ["inputs", "study.toml"]


def test_grids_are_checked_before_any_work(tmp_path):
    # Common practice, no source: a bias layer off the baseline grid, or a scenario without
    # a variable the model uses, is refused before the run folder exists, naming key and file
    import numpy as np

    from envelope.io.rasters import open_climate, open_layer
    from envelope.io.writing import write_raster

    folder = tmp_path / "inputs"
    folder.mkdir()
    effort = open_layer(DEMO / "effort.tif")
    write_raster(effort.isel(y=slice(0, -1)), folder / "effort_cut.tif")
    scen = open_climate(DEMO / "scenarios" / "low_model-a_2050.tif")
    write_raster(scen.sel(variable=["bio5", "bio6", "gdd5"]), folder / "no_bio12.tif")
    base = small_study(folder).read_text()
    cases = {
        "bias": (base.replace("[model]\n", f'[model]\nbias = "{folder / "effort_cut.tif"}"\n'),
                 ["model.bias", "effort_cut.tif", "shape"]),
        "scenario": (base.replace(str(DEMO / "scenarios" / "high_model-a_2080.tif"), str(folder / "no_bio12.tif")),
                     ["scenarios.grid[4]", "no_bio12.tif", "'bio12'"]),
        "variables": (base.replace('"gdd5"]', '"gdd5", "bio99"]'), ["climate.variables", "'bio99'"]),
    }
    for name, (text, phrases) in cases.items():
        study_path = folder / f"{name}.toml"
        study_path.write_text(text)
        out = tmp_path / f"run_{name}"
        result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(out)])
        assert result.exit_code == 2, (name, result.output)
        for phrase in phrases:
            assert phrase in result.output, (name, phrase, result.output)
        assert not out.exists(), name
    assert np.isfinite(effort.values).any()  # the premise: the uncut layer is a real grid


def test_runs_killed_at_random_moments_resume_to_the_clean_result(full_run, tmp_path):
    # Common practice, no source: every output is written atomically and every step is
    # cached by content, so a run killed (SIGKILL) at any moment and run again ends with
    # exactly the outputs of an uninterrupted run. The moments are drawn from a seeded
    # generator, so a failure can be replayed.
    import numpy as np

    study_path, run_dir, _ = full_run
    resumed = tmp_path / "killed"
    cmd = [sys.executable, "-m", "envelope.cli.main", "run", str(study_path), "--out", str(resumed)]
    rng = np.random.default_rng(19)
    # seconds after start, ascending so that each resumed run gets further (an uninterrupted
    # run of this study takes about 15-20 s here: start-up and fit, then projection, change, reach)
    moments = np.sort(rng.uniform(5.0, 15.0, size=3))
    for delay in moments:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            proc.wait(timeout=delay)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        # a hard kill leaves at most hidden temporary files, never a visible partial result
        assert all(p.name.startswith(".") for p in resumed.rglob("*.part*"))
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(resumed)])
    assert result.exit_code == 0, result.output
    assert not list(resumed.rglob("*.part*"))
    assert digests(resumed) == digests(run_dir)


def test_margins_table_runs_observed_shifts_into_the_run_and_report(tmp_path):
    # Common practice, no source: a study with [margins] measures the observed shift as
    # `envelope margins` does (the same summary, number for number) and the report shows it
    from envelope.pipelines.margins import MarginOptions, margins_files
    from envelope.study.runner import run_study

    p = small_study(tmp_path)
    text = p.read_text().replace("[outputs]\nfigures = false\n", "") + (
        '\n[margins]\nperiods = "1975-2005,2006-2024"\nspecies = "Fictocarabus demonstratus"\n'
        'n_cells = 5\nmin_records = 1\nbootstrap = 20\n\n[outputs]\nfigures = false\n')
    p.write_text(text)
    run_dir = tmp_path / "run"
    results = run_study(load_study(p), run_dir)
    assert "margins" in results["ran"]
    got = json.loads((run_dir / "observed" / "margins.json").read_text())
    direct = margins_files(DEMO / "presences.csv", [DEMO / "baseline.tif"], tmp_path / "direct.json",
                           options=MarginOptions(periods="1975-2005,2006-2024", species="Fictocarabus demonstratus",
                                                 n_cells=5, min_records=1, bootstrap=20, seed=0))
    assert got["poleward_margin_shift_km"] == pytest.approx(direct["poleward_margin_shift_km"], rel=1e-12)
    report = (run_dir / "report.html").read_text()
    assert "Observed so far" in report
