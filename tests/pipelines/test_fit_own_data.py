"""Fitting on one's own data: a study region, a background buffer, survey absences (presence-absence fits)."""

import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from envelope.errors import InputError
from envelope.io.rasters import open_climate
from envelope.pipelines.fit import FitOptions, fit_files, fit_model
from envelope.records import cells_of, values_at
from envelope.study.demo import demo_dir

DEMO = demo_dir()
FAST = dict(background=1500, folds=3, seed=2, permutation_repeats=1, features=("linear", "quadratic"))


@pytest.fixture(scope="module")
def stack():
    return open_climate(DEMO / "baseline.tif", variables=["bio1", "bio12"])


def _region(path, polygon):
    pyogrio.raw.write(path, np.asarray([shapely.to_wkb(polygon)], dtype=object), [np.arange(1)], ["id"],
                      geometry_type="Polygon", crs="EPSG:4326")
    return path


def test_region_limits_the_drawable_background(tmp_path, stack):
    left, bottom, right, top = stack.rio.bounds()
    west_half = shapely.box(left, bottom, (left + right) / 2, top)
    region = _region(tmp_path / "west.geojson", west_half)
    result = fit_files(DEMO / "presences.csv", [DEMO / "baseline.tif"], region=region,
                       options=FitOptions(variables=["bio1", "bio12"], **FAST))
    # Source: shapely.contains_xy on the cell centres, and the cells with climate (independent count)
    lon, lat = np.meshgrid(stack["x"].values, stack["y"].values)
    inside = shapely.contains_xy(west_half, lon, lat) & np.isfinite(stack.values).all(axis=0)
    assert result.summary["background"]["n_drawable_cells"] == int(inside.sum())


def test_background_buffer_shrinks_the_drawable_area(stack):
    near = fit_model(DEMO / "presences.csv", stack, options=FitOptions(background_buffer_km=30, **FAST))
    everywhere = fit_model(DEMO / "presences.csv", stack, options=FitOptions(**FAST))
    # Analytic: a 30 km buffer around the records is a strict part of the study area
    assert 0 < near.summary["background"]["n_drawable_cells"] < everywhere.summary["background"]["n_drawable_cells"]


def _survey(tmp_path):
    truth = pd.read_csv(DEMO / "truth_sample.csv").sample(600, random_state=5)
    table = pd.DataFrame({"decimalLongitude": truth["lon"], "decimalLatitude": truth["lat"],
                          "scientificName": "Fictocarabus demonstratus",
                          "occurrenceStatus": np.where(truth["present"] == 1, "present", "absent")})
    path = tmp_path / "survey.csv"
    table.to_csv(path, index=False)
    return path


def test_presence_absence_fit_for_methods_that_suit_it(tmp_path, stack):
    survey = _survey(tmp_path)
    pa = fit_model(survey, stack, options=FitOptions(method="forest", absences=True, **FAST))
    assert pa.summary["training"] == "presence-absence"
    # constructed: the absences used are the survey's absent records, one per cell with climate,
    # none in a cell that holds a presence (counted here from the file, independently)
    survey_table = pd.read_csv(survey)
    rows, cols, inside = cells_of(stack, survey_table["decimalLongitude"], survey_table["decimalLatitude"])
    with_climate = inside & np.isfinite(values_at(stack, np.where(inside, rows, 0), np.where(inside, cols, 0))).all(1)
    cell = rows * stack.sizes["x"] + cols
    present = survey_table["occurrenceStatus"].eq("present").to_numpy()
    absent_cells = set(cell[~present & with_climate]) - set(cell[present & with_climate])
    assert pa.summary["n_absences"] == len(absent_cells)
    assert pa.summary["n_presences"] == len(set(cell[present & with_climate]))
    pp = fit_model(survey, stack, options=FitOptions(method="pointprocess", absences=True, **FAST))
    assert pp.summary["training"] == "presence-background"
    assert any("absences were kept but not used" in n for n in pp.summary["notes"])


def test_several_taxa_stop_the_fit(tmp_path, stack):
    table = pd.read_csv(DEMO / "presences.csv")
    table.loc[table.index[:20], "scientificName"] = "Fictocarabus alter"
    path = tmp_path / "two.csv"
    table.to_csv(path, index=False)
    with pytest.raises(InputError, match=r"2 taxa: Fictocarabus demonstratus \(438\), Fictocarabus alter \(20\)"):
        fit_model(path, stack, options=FitOptions(**FAST))
    one = fit_model(path, stack, options=FitOptions(species="fictocarabus DEMONSTRATUS", **FAST))
    assert one.summary["records"]["dropped"]["other_taxon"] == 20
