"""The TOML study file: the demo study loads, every bad key gives one error naming it, to_dict is stable."""

import json
import re
import shutil

import pytest

from envelope.study.demo import demo_dir
from envelope.errors import InputError
from envelope.io.tables import Scenario
from envelope.io.tables import read_scenarios
from envelope.study.schema import load_study

DEMO = demo_dir()
STUDY = DEMO.parent / "study.toml"  # the demo study file sits beside the demo folder

# A minimal valid study on files made in tmp_path; tests change one thing at a time.
MINIMAL = """\
[study]
name = "Tiny"

[records]
path = "records.csv"

[climate]
baseline = "now.tif"

[scenarios]
table = "scenarios.csv"

[habitat]
path = "habitat.tif"

[dispersal]
kernel = "exponential"
mean_distance_km = 2.0
"""


@pytest.fixture
def folder(tmp_path):
    """Empty placeholder files: the loader checks that files exist, it does not open grids."""
    for name in ("records.csv", "now.tif", "habitat.tif", "f2050.tif", "f2080.tif"):
        (tmp_path / name).write_text("")
    (tmp_path / "scenarios.csv").write_text(
        "name,pathway,climate_model,horizon,path\n"
        "a2050,p1,m1,2050,f2050.tif\n"
        "a2080,p1,m1,2080,f2080.tif\n")
    return tmp_path


def write(folder, text, name="study.toml"):
    path = folder / name
    path.write_text(text)
    return path


def edited(old, new, text=MINIMAL):
    assert old in text  # guard: the edit must change something
    return text.replace(old, new, 1)


# --------------------------------------------------------------------------- the demo
def test_demo_study_loads_from_another_working_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # relative paths must follow the study file, not the cwd
    study = load_study(STUDY)
    # Source: sample_grids/README.md (files of the demo; 2 pathways x 3 models x 2 horizons).
    assert study.records.path == (DEMO / "presences.csv").resolve()
    assert study.climate.baseline == ((DEMO / "baseline.tif").resolve(),)
    assert study.habitat.path == (DEMO / "habitat.tif").resolve()
    assert study.dispersal.start == study.records.path  # default start: the records
    assert len(study.scenarios) == 12
    assert {(s.pathway, s.horizon) for s in study.scenarios} == {
        (p, h) for p in ("low", "high") for h in (2050, 2080)}
    assert all(isinstance(s, Scenario) and s.path.is_absolute() and s.path.is_file()
               for s in study.scenarios)
    # Source: sample_grids/README.md, the demo's climate bands.
    assert set(study.climate.variables) <= {"bio1", "bio5", "bio6", "bio12", "bio17", "gdd5"}


def test_demo_study_loads_through_a_relative_path(monkeypatch):
    monkeypatch.chdir(DEMO.parent)
    study = load_study("study.toml")
    assert study.path == STUDY.resolve()
    assert study.records.path == (DEMO / "presences.csv").resolve()


def test_minimal_study_fills_defaults(folder):
    study = load_study(write(folder, MINIMAL))
    # Common practice, no source: the defaults documented in docs/study-file.md.
    assert study.model.methods == ("pointprocess",) and study.model.folds == 5
    assert study.model.threshold_rule == "max-sss" and study.model.features == "cv"
    assert study.model.bias is None and study.model.bias_method == "auto"
    assert study.scenario_set.agreement == pytest.approx(2 / 3)
    assert study.outputs.format == "tif" and study.outputs.reach is True
    assert study.compute.scheduler is None
    assert [s.name for s in study.scenarios] == ["a2050", "a2080"]
    assert study.scenarios[0].path == folder / "f2050.tif"


def test_inline_scenario_grid_and_range_of_distances(folder):
    text = edited('[scenarios]\ntable = "scenarios.csv"\n',
                  '[[scenarios.grid]]\nname = "x"\npathway = "p"\nclimate_model = "m"\n'
                  'horizon = 2050\npath = "f2050.tif"\n')
    text = edited("mean_distance_km = 2.0", "mean_distance_km = [1, 4]\nreplicates = 10", text)
    study = load_study(write(folder, text))
    assert study.scenarios == [Scenario("x", "p", "m", 2050, folder / "f2050.tif")]
    assert study.scenario_set.table is None
    assert study.dispersal.mean_distance_range_km == (1.0, 4.0)
    assert study.dispersal.mean_distance_km == 2.5  # the range's midpoint


def test_reach_off_makes_habitat_and_dispersal_optional(folder):
    text = MINIMAL.split("[habitat]")[0] + "[outputs]\nreach = false\n"
    study = load_study(write(folder, text))
    assert study.habitat is None and study.dispersal is None
    with pytest.raises(InputError, match=r"habitat: missing table \[habitat\].*outputs.reach"):
        load_study(write(folder, MINIMAL.split("[habitat]")[0]))


# --------------------------------------------------------------------------- errors
@pytest.mark.parametrize("old, new, pattern", [
    # unknown keys, with the closest allowed one suggested
    ("mean_distance_km = 2.0", "mean_distance = 2.0",
     r"unknown key 'dispersal.mean_distance' \(did you mean 'mean_distance_km'\?\); allowed in \[dispersal\]: "
     r"kernel, mean_distance_km"),
    ("[habitat]", "[habitta]", r"unknown key 'habitta' \(did you mean 'habitat'\?\)"),
    # wrong type, bool as a number, out of range
    ("mean_distance_km = 2.0", "mean_distance_km = 2.0\nrate = 'fast'",
     r"dispersal.rate: expected a number > 0, got 'fast' \(str\)"),
    ("mean_distance_km = 2.0", "mean_distance_km = true",
     r"dispersal.mean_distance_km: expected a number > 0, got true \(bool\)"),
    ("mean_distance_km = 2.0", "mean_distance_km = -1",
     r"dispersal.mean_distance_km: expected a number > 0, got -1 \(int\)"),
    ("mean_distance_km = 2.0", "mean_distance_km = nan",
     r"dispersal.mean_distance_km: expected a number > 0, got nan \(float\)"),
    ("mean_distance_km = 2.0", "mean_distance_km = [4, 1]\nreplicates = 3",
     r"dispersal.mean_distance_km: expected \[low, high\] with low <= high"),
    ("[habitat]", "[model]\nfolds = 1\n\n[habitat]", r"model.folds: expected an integer >= 2 and <= 20, got 1"),
    ("[habitat]", "[model]\nbackground = 5000.0\n\n[habitat]",
     r"model.background: expected an integer >= 100, got 5000.0 \(float\)"),
    ("[habitat]", "[model]\nmethods = ['unknownmethod']\n\n[habitat]", r"model.methods\[1\]: expected one of 'pointprocess'"),
    ("[habitat]", "[model]\nthreshold_rule = 1.5\n\n[habitat]", r"model.threshold_rule: .*number in \[0, 1\], got 1.5"),
    ("[habitat]", "[model]\nthreshold_rule = 'max-ss'\n\n[habitat]",
     r"model.threshold_rule: .*got 'max-ss' \(did you mean 'max-sss'\?\)"),
    ("[habitat]", "[model]\nbias_method = 'weighted'\n\n[habitat]",
     r"model.bias_method: 'weighted' given without model.bias"),
    ("[habitat]", "[model]\nbias = 'now.tif'\nbias_method = 'covariates'\n\n[habitat]",
     r"model.bias_method: expected one of 'auto', 'covariate', 'weighted', got 'covariates' \(did you mean 'covariate'\?\)"),
    ("[habitat]", "[model]\nmethods = ['pointprocess', 'brt']\nbias = 'now.tif'\nbias_method = 'covariate'\n\n[habitat]",
     r"model.bias_method: 'covariate' works with the point-process model only, but methods include 'brt'"),
    ("[habitat]", "[model]\nfeatures = 'lqh'\n\n[habitat]", r"model.features: expected one of 'cv', got 'lqh'"),
    ("[habitat]", "[model]\nfeatures = ['linear', 'cubic']\n\n[habitat]",
     r"model.features\[2\]: expected one of 'linear', 'quadratic', 'product', 'hinge'"),
    ("[habitat]", "[outputs]\nformat = 'png'\n\n[habitat]", r"outputs.format: expected one of 'tif', 'nc', got 'png'"),
    ("[habitat]", "[outputs]\nmess = 1\n\n[habitat]", r"outputs.mess: expected true or false, got 1 \(int\)"),
    ('baseline = "now.tif"', 'baseline = "now.tif"\nnow_year = 2060',
     r"scenarios.table: scenario 'a2050' has horizon 2050; expected a year after climate.now_year = 2060"),
    ('path = "records.csv"', 'path = "records.csv"\nyears = [2024, 1990]',
     r"records.years: expected \[first, last\] with first <= last"),
    ('path = "records.csv"', 'path = "records.csv"\nyears = [1990]', r"records.years: expected two integer years"),
    ('path = "records.csv"', 'path = "records.csv"\nx_column = "east"',
     r"records.y_column: missing; records.x_column is given"),
    # missing required key
    ('name = "Tiny"', 'question = "?"', r"study.name: missing; expected the study's name"),
    ("kernel = \"exponential\"\nmean_distance_km = 2.0", 'kernel = "gaussian"',
     r"dispersal.mean_distance_km: missing"),
    # 2dt needs a shape; other kernels refuse one
    ('kernel = "exponential"', 'kernel = "2dt"', r"dispersal.shape: missing; the 2dt kernel needs a shape > 1.5"),
    ('kernel = "exponential"', 'kernel = "2dt"\nshape = 1.5', r"dispersal.shape: expected a number > 1.5, got 1.5"),
    ('kernel = "exponential"', 'kernel = "exponential"\nshape = 3',
     r"dispersal.shape: applies only to kernel = '2dt', got shape = 3 with kernel = 'exponential'"),
    # scheduler address
    ("[habitat]", "[compute]\nscheduler = '127.0.0.1:8786'\n\n[habitat]",
     r"compute.scheduler: expected a dask scheduler address scheme://host:port.*got '127.0.0.1:8786' \(str\)"),
    ("[habitat]", "[compute]\nscheduler = 'tcp://host:99999'\n\n[habitat]", r"compute.scheduler: expected"),
    # scenarios: one source, not both or neither
    ('table = "scenarios.csv"', 'table = "scenarios.csv"\n[[scenarios.grid]]\nname = "x"',
     r"scenarios: expected exactly one of scenarios.table .* got both"),
])
def test_each_bad_value_is_one_error_naming_its_key(folder, old, new, pattern):
    path = write(folder, edited(old, new))
    with pytest.raises(InputError, match=pattern) as info:
        load_study(path)
    assert str(info.value).startswith(str(path))  # the file is named too
    assert "\n" not in str(info.value)


def test_missing_file_names_key_and_resolved_path(folder, tmp_path, monkeypatch):
    path = write(folder, edited('path = "habitat.tif"', 'path = "maps/../nowhere.tif"'))
    monkeypatch.chdir(tmp_path.parent)
    expected = folder / "nowhere.tif"  # resolved against the study folder and normalised
    with pytest.raises(InputError, match=rf"habitat.path: file not found: {re.escape(str(expected))}$"):
        load_study(path)


def test_missing_file_in_a_baseline_list_names_its_position(folder):
    path = write(folder, edited('baseline = "now.tif"', 'baseline = ["now.tif", "gone.tif"]'))
    with pytest.raises(InputError, match=r"climate.baseline\[2\]: file not found: .*gone.tif"):
        load_study(path)


def test_invalid_toml_names_file_and_line(folder):
    path = write(folder, MINIMAL + "\n[outputs\nmess = true\n")
    line = MINIMAL.count("\n") + 2  # the broken header's line (1-based)
    with pytest.raises(InputError, match=rf"study.toml: not valid TOML \(line {line}: "):
        load_study(path)


def test_missing_study_file(tmp_path):
    with pytest.raises(InputError, match=r"nothing.toml: study file not found"):
        load_study(tmp_path / "nothing.toml")


# --------------------------------------------------------------------------- scenario CSV
@pytest.mark.parametrize("csv, pattern", [
    ("name,pathway,climate_model,path\na,p,m,f2050.tif\n", r"scenarios.csv: column 'horizon' missing"),
    ("name,pathway,climate_model,horizon,path\na,p,m,2050,f2050.tif\na,p,m,2080,f2080.tif\n",
     r"scenario name 'a' appears twice"),
    ("name,pathway,climate_model,horizon,path\na,p,m,soon,f2050.tif\n", r"horizon 'soon'; expected a year"),
    ("name,pathway,climate_model,horizon,path\na,p,m,2050,missing.tif\n", r"climate grid .*missing.tif not found"),
])
def test_bad_scenario_csv_names_key_and_csv(folder, csv, pattern):
    (folder / "scenarios.csv").write_text(csv)
    with pytest.raises(InputError, match=r"study.toml: scenarios.table: .*" + pattern):
        load_study(write(folder, MINIMAL))
    with pytest.raises(InputError, match=pattern):  # the shared reader says the same on its own
        read_scenarios(folder / "scenarios.csv")


def test_duplicate_inline_scenario_names(folder):
    entry = '[[scenarios.grid]]\nname = "x"\npathway = "p"\nclimate_model = "m"\nhorizon = 2050\npath = "f2050.tif"\n'
    text = edited('[scenarios]\ntable = "scenarios.csv"\n', entry + entry)
    with pytest.raises(InputError, match=r"scenarios.grid: scenario name 'x' appears twice"):
        load_study(write(folder, text))
    text = edited('[scenarios]\ntable = "scenarios.csv"\n', entry.replace("horizon = 2050", "horizon = '2050'"))
    with pytest.raises(InputError, match=r"scenarios.grid\[1\].horizon: expected an integer, got '2050' \(str\)"):
        load_study(write(folder, text))


# --------------------------------------------------------------------------- to_dict
def test_to_dict_is_json_ready_and_stable(tmp_path):
    copy = tmp_path / "sample"
    shutil.copytree(DEMO, copy / "demo")
    shutil.copy(STUDY, copy / "study.toml")
    first = load_study(copy / "study.toml").to_dict()
    text = json.dumps(first, sort_keys=True)  # raises if anything is not JSON-ready
    assert json.dumps(load_study(copy / "study.toml").to_dict(), sort_keys=True) == text
    # Relative paths: the same dict for the bundled folder and its copy elsewhere.
    assert load_study(copy / "study.toml").to_dict(relative=True) == load_study(STUDY).to_dict(relative=True)
    toml = (copy / "study.toml").read_text()
    (copy / "study.toml").write_text(toml.replace("step_years = 5", "step_years = 4", 1))
    changed = load_study(copy / "study.toml").to_dict()
    assert changed != first
    assert changed["dispersal"]["step_years"] == 4 and first["dispersal"]["step_years"] == 5
    assert {k for k in first if first[k] != changed[k]} == {"dispersal"}


def test_method_names_come_from_the_model_registry():
    import subprocess
    import sys

    from envelope.cli.fit import fit
    from envelope.models import METHOD_NAMES, METHODS

    # Common practice, no source: one list of names, the registry's, feeds the CLI choices and
    # the study validator; reading it imports no estimator (no scikit-learn on `--help`).
    assert METHOD_NAMES == tuple(METHODS)
    method = next(p for p in fit.params if p.name == "method")
    assert tuple(method.type.choices) == METHOD_NAMES
    code = "import sys, envelope.models as m; m.METHOD_NAMES; print('sklearn' in sys.modules)"
    assert subprocess.run([sys.executable, "-c", code], capture_output=True, text=True).stdout.strip() == "False"


def test_bias_method_key_is_read(folder):
    text = edited("[habitat]", "[model]\nbias = 'now.tif'\nbias_method = 'weighted'\n\n[habitat]")
    study = load_study(write(folder, text))
    assert study.model.bias == folder / "now.tif" and study.model.bias_method == "weighted"
    assert study.to_dict()["model"]["bias_method"] == "weighted"


def test_model_features_key(folder):
    # Common practice, no source: fixed classes are read in the canonical column order
    study = load_study(write(folder, edited("[habitat]", "[model]\nfeatures = ['hinge', 'linear']\n\n[habitat]")))
    assert study.model.features == ("linear", "hinge")
    assert study.to_dict()["model"]["features"] == ["linear", "hinge"]

