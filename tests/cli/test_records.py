"""``envelope records``: the summary table, JSON, the cleaned CSV, and one-line errors with exit 2."""

import json

import numpy as np
import pandas as pd
import pytest
import rasterio
from click.testing import CliRunner

from tests.conftest import make_stack
from envelope.cli.main import cli

HEADER = "occurrenceID,decimalLongitude,decimalLatitude,coordinateUncertaintyInMeters,year,occurrenceStatus\n"
# make_stack(): 20 x 15 cells of 0.1 deg, west edge -150, north edge 45 (open ocean, fictional records).
GOOD = ("r1,-149.95,44.95,10,2000,present\n"
        "r2,-149.94,44.94,10,2001,present\n"     # same cell as r1
        "r3,-149.45,44.45,10,2002,present\n"
        "r4,-149.45,44.35,5000,2002,present\n"   # imprecise
        "r5,-149.25,44.25,10,1950,present\n"     # outside 1990-2020
        "r6,-149.25,44.25,10,2003,absent\n"      # absent
        "r7,east,44.25,10,2003,present\n"        # malformed
        "r8,-10.0,10.0,10,2003,present\n")       # outside the grid


@pytest.fixture
def grid_tif(tmp_path):
    """The in-memory test stack written as a 2-band GeoTIFF whose band descriptions name the variables."""
    stack = make_stack()
    path = tmp_path / "baseline.tif"
    profile = dict(driver="GTiff", width=stack.sizes["x"], height=stack.sizes["y"], count=2, dtype="float32",
                   crs="EPSG:4326", transform=stack.rio.transform(), nodata=np.nan)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(stack.values)
        for band, name in enumerate(stack["variable"].values, start=1):
            dst.set_band_description(band, str(name))
    return path


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def test_summary_table(tmp_path, grid_tif):
    # Source: constructed file; counts follow from the construction (common practice, no source).
    result = run("records", write(tmp_path, "r.csv", HEADER + GOOD), "--climate", grid_tif,
                 "--max-uncertainty-m", 100, "--record-years", "1990-2020")
    assert result.exit_code == 0, result.output
    assert "dropped: duplicate cell" in result.output
    assert "kept" in result.output and "read" in result.output


def test_json_counts_and_cleaned_csv(tmp_path, grid_tif):
    # Source: constructed file; counts follow from the construction (common practice, no source).
    out = tmp_path / "clean.csv"
    result = run("records", write(tmp_path, "r.csv", HEADER + GOOD), "--climate", grid_tif,
                 "--max-uncertainty-m", 100, "--record-years", "1990-2020", "--out", out, "--json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.output)
    assert summary["read"] == 8 and summary["kept"] == 2
    assert summary["dropped"] == {"other_taxon": 0, "absent": 1, "malformed": 1, "imprecise": 1, "outside_years": 1,
                                  "outside_grid": 1, "no_climate": 0, "duplicate_cell": 1, "thinned": 0}
    clean = pd.read_csv(out)
    assert clean["occurrenceID"].tolist() == ["r1", "r3"]
    assert clean[["row", "col"]].values.tolist() == [[0, 0], [5, 5]]


def test_refuses_to_overwrite(tmp_path, grid_tif):
    # Common practice, no source: outputs are replaced only with --overwrite.
    out = write(tmp_path, "clean.csv", "keep me\n")
    records = write(tmp_path, "r.csv", HEADER + GOOD)
    result = run("records", records, "--climate", grid_tif, "--out", out)
    assert result.exit_code == 2 and "add --overwrite" in result.output
    assert out.read_text() == "keep me\n"
    assert run("records", records, "--climate", grid_tif, "--out", out, "--overwrite").exit_code == 0
    assert out.read_text().startswith("x,y,row,col")


@pytest.mark.parametrize("text, phrase", [
    ("id,xcoord,ycoord\n1,-149.5,44.5\n", "columns found: id, xcoord, ycoord"),
    ("decimalLongitude,decimalLatitude\neast,north\nwest,south\n", "none of the 2 records has usable coordinates"),
    ("", "file is empty"),
    (HEADER, "holds a header but no records"),
    (HEADER + "r1,149.5,44.5,10,2000,present\nr2,149.6,44.5,10,2000,present\n",
     "0 of 2 records fall inside the grid; are the coordinates in EPSG:4326?"),
])
def test_bad_input_exit_2_one_line_no_output(tmp_path, grid_tif, text, phrase):
    # Common practice, no source: bad input is one line on stderr, exit status 2, and nothing written.
    out = tmp_path / "clean.csv"
    result = run("records", write(tmp_path, "bad.csv", text), "--climate", grid_tif, "--out", out)
    assert result.exit_code == 2
    assert phrase in result.output
    assert len([line for line in result.output.splitlines() if line.startswith("Error:")]) == 1
    assert not out.exists()
    assert not list(tmp_path.glob(".clean.csv.*"))


def test_nonsense_crs_and_bad_options(tmp_path, grid_tif):
    # Source: pyproj rejects "EPSG:999999"; click reports bad option values with exit status 2.
    records = write(tmp_path, "plots.csv", "easting,northing\n405000,4980000\n")
    result = run("records", records, "--climate", grid_tif, "--x-column", "easting", "--y-column", "northing",
                 "--crs", "EPSG:999999")
    assert result.exit_code == 2 and "not understood by pyproj" in result.output
    result = run("records", records, "--climate", grid_tif, "--x-column", "easting", "--y-column", "northing")
    assert result.exit_code == 2 and "state their CRS" in result.output
    result = run("records", records, "--climate", grid_tif, "--record-years", "recent")
    assert result.exit_code == 2 and "expected FIRST-LAST" in result.output
    result = run("records", records, "--climate", grid_tif, "--thin-km", "-3")
    assert result.exit_code == 2 and "must be a positive number" in result.output


def test_help_has_examples():
    # Common practice, no source: every command's help shows `$ envelope ...` examples.
    result = run("records", "--help")
    assert result.exit_code == 0 and "$ envelope records" in result.output


def test_old_years_spelling_still_filters_with_a_warning(tmp_path, grid_tif):
    # Common practice, no source: a renamed option keeps working for a while and says so.
    records = write(tmp_path, "r.csv", HEADER + GOOD)
    new = run("records", records, "--climate", grid_tif, "--record-years", "1990-2020", "--json")
    old = run("records", records, "--climate", grid_tif, "--years", "1990-2020", "--json")
    assert new.exit_code == 0 and old.exit_code == 0, old.output
    assert json.loads(old.stdout) == json.loads(new.stdout)
    assert json.loads(new.stdout)["dropped"]["outside_years"] == 1
    assert "--years is deprecated" in old.stderr and "--record-years" in old.stderr
