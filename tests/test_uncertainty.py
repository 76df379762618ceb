"""The ANOVA partition of ensemble-forecast variance, checked against statsmodels' anova_lm."""

import itertools

import numpy as np
import pandas as pd
import pytest

from envelope.errors import InputError
from envelope.uncertainty import RESIDUAL_SOURCE, partition_table, variance_partition

statsmodels = pytest.importorskip("statsmodels")


def design(replicates, seed=0):
    rng = np.random.default_rng(seed)
    levels = {"method": ["a", "b"], "climate_model": ["m1", "m2", "m3"], "pathway": ["low", "high"],
              "distance_km": [2.5, 5.0, 7.5]}
    rows = []
    effect = {k: {v: rng.normal(scale=s) for v in vals}
              for (k, vals), s in zip(levels.items(), (1.0, 3.0, 2.0, 0.5))}
    for combo in itertools.product(*levels.values()):
        cell = dict(zip(levels, combo))
        base = sum(effect[k][v] for k, v in cell.items()) + (1.5 if cell["pathway"] == "high"
                                                              and cell["climate_model"] == "m3" else 0.0)
        for r in range(max(replicates, 1)):
            rows.append({**cell, "replicate": r, "y": base + rng.normal(scale=0.7) + (rng.normal(scale=0.2)
                                                                                      if not replicates else 0)})
    return pd.DataFrame(rows), list(levels)


@pytest.mark.parametrize("replicates", [4, 0])
def test_sums_of_squares_equal_statsmodels_anova_lm(replicates):
    # Source: statsmodels.stats.anova.anova_lm (type I sums of squares of an OLS fit of the full
    # factorial model; on a balanced design every type agrees). The partition follows
    # Diniz-Filho et al. (2009) and Buisson et al. (2010).
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    table, factors = design(replicates)
    got = variance_partition(table, "y", factors).set_index("source")
    terms = []
    for k in range(1, len(factors) + 1):
        terms += [":".join(f"C({f})" for f in sub) for sub in itertools.combinations(factors, k)]
    if replicates:
        ref = anova_lm(smf.ols("y ~ " + " + ".join(terms), data=table).fit(), typ=1)
        for source, ss in ref["sum_sq"].items():
            name = RESIDUAL_SOURCE if source == "Residual" else source.replace("C(", "").replace(")", "")
            assert got.loc[name, "sum_sq"] == pytest.approx(ss, rel=1e-9, abs=1e-9)
    else:
        # one run per cell: the saturated model leaves no residual, so fit without the
        # four-way term and compare the rest; the four-way term holds the residual
        ref = anova_lm(smf.ols("y ~ " + " + ".join(terms[:-1]), data=table).fit(), typ=1)
        for source, ss in ref["sum_sq"].items():
            name = ":".join(factors) if source == "Residual" else source.replace("C(", "").replace(")", "")
            assert got.loc[name, "sum_sq"] == pytest.approx(ss, rel=1e-9, abs=1e-9)
        assert RESIDUAL_SOURCE not in got.index
    total = float(((table["y"] - table["y"].mean()) ** 2).sum())
    # Analytic: on a balanced design the terms add up to the total sum of squares
    assert got["sum_sq"].sum() == pytest.approx(total, rel=1e-12)
    assert got["share"].sum() == pytest.approx(1.0, abs=1e-12)


def test_single_level_factor_drops_out_and_constant_response_gives_nothing():
    # Analytic: a factor with one level has no effect; a constant response has no variance.
    table, factors = design(2)
    one = table[table["method"] == "a"]
    got = variance_partition(one, "y", factors)
    assert not any("method" in s for s in got["source"])
    assert got["share"].sum() == pytest.approx(1.0)
    assert variance_partition(one.assign(y=5.0), "y", factors).empty
    rows = partition_table(one.assign(z=1.0), {"gain": "y", "flat": "z"}, factors)
    assert list(rows.columns) == ["quantity", "source", "share"] and set(rows["quantity"]) == {"gain"}


def test_unbalanced_design_is_refused():
    table, factors = design(2)
    with pytest.raises(InputError, match="unbalanced design"):
        variance_partition(table.iloc[1:], "y", factors)
    with pytest.raises(InputError, match="not a full factorial"):
        variance_partition(table[~((table["method"] == "a") & (table["pathway"] == "low"))], "y", factors)
