"""One taxon at a time and surveyed absences in the record cleaning (envelope.records)."""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score, roc_auc_score

from envelope.errors import InputError
from envelope.evaluation import independent_scores
from envelope.records import PRESENCE_COLUMN, canonical_name, clean_occurrences, select_taxon
from tests.conftest import make_stack


def _centre(row, col, lon0=-150.0, lat0=45.0, res=0.1):
    return lon0 + res * (col + 0.5), lat0 - res * (row + 0.5)


def _table(rows, columns=("decimalLongitude", "decimalLatitude", "scientificName", "occurrenceStatus")):
    return pd.DataFrame(rows, columns=list(columns), dtype=object)


@pytest.mark.parametrize("name, expected", [
    # From memory: ICZN (1999) Art. 51 and ICN (2018) Art. 46 -- the author citation follows the name
    # and is not part of it; zoological subspecies are trinomials, botanical infraspecific names carry a rank.
    ("Aus bus (Linnaeus, 1758)", "aus bus"),
    ("Aus bus L.", "aus bus"),
    ("Aus  bus", "aus bus"),
    ("Aus bus cus Smith, 1900", "aus bus cus"),
    ("Aus bus var. cus Sm.", "aus bus var. cus"),
    ("AUS BUS", "aus bus"),          # no Genus-epithet pattern: compared whole, lower-cased
    ("", ""),
])
def test_canonical_name(name, expected):
    assert canonical_name(name) == expected


def test_several_taxa_refused_with_each_count():
    rows = [[*_centre(1, 1), "Aus bus", "present"]] * 3 + [[*_centre(2, 2), "Aus cus Smith", "present"]] * 2
    with pytest.raises(InputError, match=r"2 taxa: Aus bus \(3\), Aus cus Smith \(2\); choose one with --species"):
        select_taxon(_table(rows))


def test_species_matched_ignoring_case_and_authorship_on_any_name_column():
    table = pd.DataFrame({
        "decimalLongitude": [_centre(1, k)[0] for k in range(4)],
        "decimalLatitude": [_centre(1, k)[1] for k in range(4)],
        "scientificName": ["Aus bus (Linnaeus, 1758)", "Aus bus cus", "Aus dus", "Xus yus"],
        "species": ["Aus bus", "Aus bus", "Aus dus", None],
    }, dtype=object)
    records = clean_occurrences(table, make_stack(), species="aus bus")
    # constructed: the first two are of Aus bus (the subspecies through its species column)
    assert records.n_kept == 2 and records.dropped["other_taxon"] == 2
    assert records.taxa["counts"] == {"Aus bus": 2, "Aus dus": 1, "Xus yus": 1}


def test_species_without_match_lists_the_nearest_names():
    rows = [[*_centre(1, 1), "Aus bus", "present"], [*_centre(1, 2), "Aus buss", "present"],
            [*_centre(1, 3), "Zzz qqq", "present"]]
    with pytest.raises(InputError, match=r"'Aus bis' matches no record.*nearest names: Aus bus \(1\), Aus buss \(1\)"):
        select_taxon(_table(rows), "Aus bis")


def test_absences_kept_as_absences_and_never_displace_a_presence():
    rows = [[*_centre(1, 1), "Aus bus", "absent"],     # same cell as the presence below: dropped
            [*_centre(1, 1), "Aus bus", "present"],
            [*_centre(3, 3), "Aus bus", "absent"],
            [*_centre(3, 3), "Aus bus", "0"],          # second absence of a cell: dropped
            [*_centre(5, 5), "Aus bus", "present"]]
    default = clean_occurrences(_table(rows), make_stack())
    assert default.n_kept == 2 and default.dropped["absent"] == 3 and PRESENCE_COLUMN not in default.table
    kept = clean_occurrences(_table(rows), make_stack(), absences=True)
    assert kept.dropped["absent"] == 0 and kept.dropped["duplicate_cell"] == 2
    # kept rows stay in file order
    assert kept.table[["row", "col", PRESENCE_COLUMN]].values.tolist() == [[1, 1, 1], [3, 3, 0], [5, 5, 1]]
    assert kept.summary()["presences"] == 2 and kept.summary()["absences"] == 1


def test_independent_scores_match_scikit_learn():
    # Source: scikit-learn roc_auc_score (AUC) and cohen_kappa_score (Cohen's kappa) on the same
    # predictions; TSS = sensitivity + specificity - 1 (Allouche et al. 2006, J. Appl. Ecol. 43: 1223).
    rng = np.random.default_rng(4)
    pres, absn = rng.beta(4, 2, 150), rng.beta(2, 4, 400)
    threshold = 0.5
    got = independent_scores(pres, absn, threshold)
    y = np.r_[np.ones(pres.size), np.zeros(absn.size)]
    s = np.r_[pres, absn]
    assert got["auc"] == pytest.approx(roc_auc_score(y, s), abs=1e-12)
    assert got["kappa"] == pytest.approx(cohen_kappa_score(y, (s >= threshold).astype(int)), abs=1e-12)
    sens, spec = np.mean(pres >= threshold), np.mean(absn < threshold)
    assert got["tss"] == pytest.approx(sens + spec - 1, abs=1e-12)
    assert got["omission"] == pytest.approx(1 - sens, abs=1e-12)
