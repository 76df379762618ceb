"""Uncertainty partition: the ANOVA split of an ensemble forecast's variance into its sources and their interactions."""

from __future__ import annotations

from itertools import combinations

import numpy as np
import pandas as pd

from envelope.errors import InputError

__all__ = ["PARTITION_COLUMNS", "RESIDUAL_SOURCE", "partition_table", "variance_partition"]

#: Columns of ``uncertainty_partition.csv``.
PARTITION_COLUMNS = ("quantity", "source", "share")
#: Name of the within-cell source: the spread between replicates of the same setting.
RESIDUAL_SOURCE = "replicates"


def _balanced(table: pd.DataFrame, factors: list, response: str) -> int:
    """Observations per cell of the full factorial; an error naming the first unbalanced cell."""
    counts = table.groupby(factors, dropna=False).size()
    full = int(np.prod([table[f].nunique(dropna=False) for f in factors]))
    if len(counts) != full:
        raise InputError(f"uncertainty partition of {response}: the design is not a full factorial "
                         f"({len(counts)} of {full} combinations of {', '.join(factors)} present); "
                         "expected every combination")
    if counts.nunique() != 1:
        cell = counts.idxmin()
        raise InputError(f"uncertainty partition of {response}: unbalanced design, combination {cell} has "
                         f"{counts.min()} runs and others {counts.max()}; expected the same number in each")
    return int(counts.iloc[0])


def variance_partition(table: pd.DataFrame, response: str, factors) -> pd.DataFrame:
    """Sums of squares and shares of the variance of ``response`` due to each factor and interaction.

    The ANOVA partition used for ensemble forecasts of species ranges (Diniz-Filho et al.
    2009; Buisson et al. 2010): on a balanced full-factorial design, the total sum of
    squares about the grand mean splits exactly into one term per main effect and per
    interaction, each the sum over runs of the squared effect (the inclusion-exclusion of
    marginal means), plus the spread between runs of the same setting (``replicates``).
    Factors with a single level carry no variance and are left out. Without replicates the
    highest-order interaction holds what is left.

    Parameters
    ----------
    table : DataFrame
        One row per run: the factor columns and the ``response`` column.
    response : str
    factors : list of str
        Factor columns (e.g. ``method``, ``climate_model``, ``pathway``, ``distance_km``).

    Returns
    -------
    DataFrame with columns ``source`` (factor names joined by ``:`` for interactions, or
    ``replicates``), ``sum_sq`` and ``share`` (``sum_sq`` / total; the shares sum to 1). Empty
    when the response does not vary.

    References
    ----------
    Diniz-Filho, J.A.F. et al. (2009) Partitioning and mapping uncertainties in ensembles of
    forecasts of species turnover under climate change. Ecography 32: 897-906.
    Buisson, L. et al. (2010) Uncertainty in ensemble forecasting of species distribution.
    Global Change Biology 16: 1145-1157.
    """
    missing = [c for c in [response, *factors] if c not in table.columns]
    if missing:
        raise InputError(f"uncertainty partition: column {missing[0]!r} missing; found {list(table.columns)}")
    y = pd.to_numeric(table[response], errors="coerce")
    if y.isna().any():
        raise InputError(f"uncertainty partition of {response}: {int(y.isna().sum())} run(s) have no value; "
                         "expected a number in every run")
    data = table[list(factors)].astype(str).assign(_y=y.to_numpy(dtype=np.float64))
    active = [f for f in factors if data[f].nunique() > 1]
    per_cell = _balanced(data, active, response) if active else len(data)
    grand = float(data["_y"].mean())
    total = float(((data["_y"] - grand) ** 2).sum())
    scale = max(abs(grand), float(data["_y"].abs().max()), 1.0)
    if total <= (1e-12 * scale) ** 2 * len(data):
        return pd.DataFrame(columns=["source", "sum_sq", "share"])
    means = {(): pd.Series(grand, index=data.index)}
    for k in range(1, len(active) + 1):
        for subset in combinations(active, k):
            means[subset] = data.groupby(list(subset))["_y"].transform("mean")
    rows = []
    explained = 0.0
    for k in range(1, len(active) + 1):
        for subset in combinations(active, k):
            effect = sum((-1) ** (len(subset) - len(sub)) * means[sub]
                         for j in range(len(subset) + 1) for sub in combinations(subset, j))
            ss = float((effect ** 2).sum())
            explained += ss
            rows.append({"source": ":".join(subset), "sum_sq": ss})
    if per_cell > 1 or not active:
        rows.append({"source": RESIDUAL_SOURCE, "sum_sq": max(total - explained, 0.0)})
    out = pd.DataFrame(rows)
    # rounding leaves terms of ~1e-30 of the total where a factor has no effect: they are zero
    out.loc[out["sum_sq"] < 1e-12 * total, "sum_sq"] = 0.0
    out["share"] = out["sum_sq"] / out["sum_sq"].sum()
    return out


def partition_table(table: pd.DataFrame, quantities: dict, factors) -> pd.DataFrame:
    """``uncertainty_partition.csv`` rows: per quantity (``{name: column}``) its sources and shares."""
    parts = []
    for name, column in quantities.items():
        split = variance_partition(table, column, factors)
        if len(split):
            parts.append(split.assign(quantity=name)[list(PARTITION_COLUMNS)])
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=list(PARTITION_COLUMNS))
