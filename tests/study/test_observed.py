"""The study file's [margins] table and the report's "Observed so far" section."""

import pytest

from envelope.errors import InputError
from envelope.study.observed import observed_so_far_html
from envelope.study.schema import load_study
from tests.study.test_schema import MINIMAL, folder, write  # noqa: F401  (fixture)


def test_margins_table_and_autocovariate_key(folder):  # noqa: F811
    text = MINIMAL + '\n[margins]\nperiods = "1970-1989,2000-2019"\nspecies = "Fictus marginalis"\nn_cells = 8\n'
    text = text.replace("[records]", "[model]\nautocovariate_km = 20\n\n[records]")
    study = load_study(write(folder, text))
    assert study.margins.periods == ((1970, 1989), (2000, 2019))
    assert study.margins.n_cells == 8 and study.margins.bootstrap == 1000
    assert study.model.autocovariate_km == 20.0
    assert load_study(write(folder, MINIMAL)).margins is None


@pytest.mark.parametrize("body, match", [
    ('periods = "1970-1995,1990-2010"', "margins.periods: periods 1970-1995 and 1990-2010 overlap"),
    ('species = "x"', "margins.periods: missing"),
    ('periods = [[1970, 1989], [2000, 2019]]\nn_cells = 0', "margins.n_cells"),
    ('periods = [[1970, 1989], [2000, 2019]]\nperiod = 3', "unknown key 'margins.period'"),
])
def test_bad_margins_keys_name_the_key(folder, body, match):  # noqa: F811
    with pytest.raises(InputError, match=match):
        load_study(write(folder, MINIMAL + "\n[margins]\n" + body + "\n"))


def test_observed_section_only_when_two_periods_were_measured():
    assert observed_so_far_html(None) == ""
    margins = {"periods": ["1970-1989", "2000-2019"], "n_cells": 10, "poleward_margin_shift_km": 120.4,
               "poleward_margin_shift_interval_km": [90.0, 150.0], "equatorward_margin_shift_km": 30.0,
               "equatorward_margin_shift_interval_km": None, "n_cells_used": {"1970-1989": 40, "2000-2019": 44},
               "effort_correction": {"applied": True}}
    text = observed_so_far_html(margins)
    assert "<h2>Observed so far</h2>" in text and "+120 km (+90 to +150)" in text
    assert "local expertise" in text
