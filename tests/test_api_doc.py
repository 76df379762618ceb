"""docs/api.md: its example runs as written, and its results agree with independent checks."""

import re
from pathlib import Path

import numpy as np
import xarray as xr

DOC = Path(__file__).resolve().parents[1] / "docs" / "api.md"


def test_api_doc_example_runs_and_returns_xarray(capsys):
    blocks = re.findall(r"```python\n(.*?)```", DOC.read_text(), flags=re.S)
    assert len(blocks) == 1, "docs/api.md holds one executable example"
    names: dict = {}
    exec(compile(blocks[0], str(DOC), "exec"), names)
    printed = capsys.readouterr().out
    assert "CV AUC" in printed and "gained and reached" in printed

    now, future, classes, climate = names["now"], names["future"], names["classes"], names["climate"]
    for da in (now, future, classes, names["habitat"], names["start"], names["reach"].classes):
        assert isinstance(da, xr.DataArray) and da.dims == ("y", "x")
    assert now.rio.crs == climate.rio.crs and now.rio.transform() == climate.rio.transform()

    # Source: pyproj.Geod(ellps="WGS84").polygon_area_perimeter on each gained cell's corners:
    # the gained area of the summary is the sum of true cell areas (geographic demo grid).
    from pyproj import Geod

    geod = Geod(ellps="WGS84")
    rows, _ = np.nonzero(classes.values == 3)
    res_x, res_y = abs(float(climate.x[1] - climate.x[0])), abs(float(climate.y[1] - climate.y[0]))
    x0 = float(classes.x[0])
    per_row = {}
    for r in np.unique(rows):  # on a geographic grid a cell's area depends on its row only
        y = float(classes.y[r])
        lons = [x0 - res_x / 2, x0 + res_x / 2, x0 + res_x / 2, x0 - res_x / 2]
        lats = [y - res_y / 2, y - res_y / 2, y + res_y / 2, y + res_y / 2]
        per_row[r] = abs(geod.polygon_area_perimeter(lons, lats)[0]) / 1e6
    expected = sum(per_row[r] for r in rows)
    # the geodesic polygon's edges along parallels differ slightly from the exact band area
    assert abs(names["change"]["area_km2"]["gained"] - expected) / expected < 1e-3

    # Analytic: with no restoration the targeting baseline is the reach run of the same inputs
    target, reach = names["result"], names["reach"]
    assert abs(target.summary["baseline_gained_reached_km2"] - reach.summary["area_km2"]["gained_reached"]) < 1e-6
    assert target.summary["chosen_area_km2"] <= 300.0  # Common practice, no source: the budget is a hard cap
