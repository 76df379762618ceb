"""Study-file keys for one's own data: [climate.layers], records.species/absences, model.background_buffer_km, [region]."""

import pytest

from envelope.errors import InputError
from envelope.io.layers import ClimateLayer
from envelope.study.schema import load_study
from tests.study.test_schema import MINIMAL, edited, folder, write  # noqa: F401 (fixture)


def test_own_data_keys_load(folder):  # noqa: F811
    for name in ("bio1.tif", "stack.tif", "region.gpkg"):
        (folder / name).write_text("")
    text = edited('[climate]\nbaseline = "now.tif"\n', '[climate]\n[climate.layers]\nbio1 = "bio1.tif"\n'
                  'bio12 = "stack.tif:12"\nbio5 = { path = "stack.tif", band = 5 }\n')
    text = edited('[records]\npath = "records.csv"\n', '[records]\npath = "records.csv"\nspecies = "Aus bus"\n'
                  'absences = true\n', text)
    text += '\n[model]\nbackground_buffer_km = 150\n\n[region]\npath = "region.gpkg"\nclip = true\n'
    study = load_study(write(folder, text))
    # Common practice, no source: the keys as the schema defines them
    assert study.climate.baseline == (ClimateLayer("bio1", folder / "bio1.tif"),
                                      ClimateLayer("bio12", folder / "stack.tif", 12),
                                      ClimateLayer("bio5", folder / "stack.tif", 5))
    assert study.records.species == "Aus bus" and study.records.absences is True
    assert study.model.background_buffer_km == 150.0
    assert study.region.path == folder / "region.gpkg" and study.region.clip is True
    layers = study.to_dict(relative=True)["climate"]["baseline"]
    assert layers[1] == {"name": "bio12", "path": "stack.tif", "band": 12}


@pytest.mark.parametrize("old, new, pattern", [
    ('baseline = "now.tif"\n', '[climate.layers]\nbio1 = "missing.tif"\n', r"climate.layers.bio1: file not found"),
    ('baseline = "now.tif"\n', '[climate.layers]\n"1bio" = "now.tif"\n', r"layer name '1bio'"),
    ('baseline = "now.tif"\n', 'variables = ["a"]\n', r"climate.baseline: missing"),
    ('path = "records.csv"\n', 'path = "records.csv"\nabsences = "yes"\n', r"records.absences: expected true or false"),
])
def test_bad_own_data_keys(folder, old, new, pattern):  # noqa: F811
    with pytest.raises(InputError, match=pattern):
        load_study(write(folder, edited(old, new)))


def test_region_needs_an_existing_file(folder):  # noqa: F811
    with pytest.raises(InputError, match=r"region.path: file not found"):
        load_study(write(folder, MINIMAL + '\n[region]\npath = "nowhere.gpkg"\n'))
