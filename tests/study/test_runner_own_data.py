"""A study on one's own data end to end: named layers, a scenario table with a file per variable, a clipping region."""

import json

import numpy as np
import pyogrio
import shapely

from envelope.io.rasters import open_climate, open_layer
from envelope.study.demo import demo_dir
from envelope.study.runner import run_study
from envelope.study.schema import load_study

DEMO = demo_dir()


def test_layers_variable_table_and_region(tmp_path):
    base = open_climate(DEMO / "baseline.tif")
    left, bottom, right, top = base.rio.bounds()
    west = shapely.box(left, bottom, (left + right) / 2, top)
    pyogrio.raw.write(tmp_path / "west.geojson", np.asarray([shapely.to_wkb(west)], dtype=object), [np.arange(1)],
                      ["id"], geometry_type="Polygon", crs="EPSG:4326")
    rows = ["name,pathway,climate_model,horizon,path,variable,band"]
    for p in ("low", "high"):
        f = DEMO / "scenarios" / f"{p}_model-a_2080.tif"
        rows += [f"{p}_2080,{p},model-a,2080,{f},bio5,bio5", f"{p}_2080,{p},model-a,2080,{f},bio12,bio12"]
    (tmp_path / "scenarios.csv").write_text("\n".join(rows) + "\n")
    (tmp_path / "study.toml").write_text(f"""
[study]
name = "Own data"

[records]
path = "{DEMO / 'presences.csv'}"
species = "fictocarabus demonstratus"

[climate]
[climate.layers]
bio5 = "{DEMO / 'baseline.tif'}:2"
bio12 = {{ path = "{DEMO / 'baseline.tif'}", band = 4 }}

[model]
background = 1000
folds = 3
blocks_km = 60
features = ["linear", "quadratic"]
background_buffer_km = 300

[region]
path = "west.geojson"
clip = true

[scenarios]
table = "scenarios.csv"

[outputs]
reach = false
change = false
figures = false
report = false
""")
    study = load_study(tmp_path / "study.toml")
    result = run_study(study, tmp_path / "run")
    fit = result["fit"]
    assert fit["variables"] == ["bio5", "bio12"] and fit["records"]["taxa"]["asked"] == "fictocarabus demonstratus"
    # Analytic: cells east of the region's edge are nodata in every projection (clip = true)
    east = base["x"].values > (left + right) / 2
    for name in ("now_suitability.tif",):
        found = list((tmp_path / "run").rglob(name))
        assert found, name
        now = open_layer(found[0]).values
        assert np.isnan(now[:, east]).all() and np.isfinite(now[:, ~east]).any()
    table = (tmp_path / "run").rglob("suitability_table.csv")
    lines = next(table).read_text().splitlines()
    assert len(lines) == 3  # two scenarios, each from its two variable rows
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert "region" in manifest["settings"]
