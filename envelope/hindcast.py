"""Hindcast validation: a model of one recording period tested on the other, and its figures.

A model fitted on one period's records and climate is projected onto the other period's
climate and compared with that period's records: AUC and continuous Boyce index of the
projected suitability at the other period's record cells against all cells of the study area,
and the margin shift its thresholded maps predict against the shift observed in the records
(both measured on the same well-recorded cells, see :mod:`envelope.margins`).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from envelope.errors import InputError
from envelope.kernels.metrics import auc, boyce_index
from envelope.margins import margins_of_cells

__all__ = ["MAX_BACKGROUND_CELLS", "period_skill", "predicted_margins", "plot_margin_shifts", "map_hindcast"]

#: At most this many cells of the study area serve as background for AUC and Boyce (a random draw).
MAX_BACKGROUND_CELLS = 200_000


def period_skill(suitability, presence_cells, *, seed: int = 0) -> dict:
    """AUC and continuous Boyce index of ``suitability`` (y, x) at ``presence_cells`` (flat indices).

    The background is every cell with a suitability value (at most
    :data:`MAX_BACKGROUND_CELLS`, drawn at random), unweighted (common practice, no source).

    References
    ----------
    Hanley, J.A. & McNeil, B.J. (1982) Radiology 143: 29-36 (AUC).
    Hirzel, A.H. et al. (2006) Ecological Modelling 199: 142-152 (continuous Boyce index).
    """
    values = np.asarray(suitability, dtype=np.float64).ravel()
    presence = values[np.asarray(presence_cells, dtype=np.intp)]
    presence = presence[np.isfinite(presence)]
    background = values[np.isfinite(values)]
    if presence.size == 0 or background.size == 0:
        raise InputError("hindcast: no record of the projected period falls on a cell with a suitability value")
    if background.size > MAX_BACKGROUND_CELLS:
        background = np.random.default_rng(seed).choice(background, MAX_BACKGROUND_CELLS, replace=False)
    return {"auc": auc(presence, background), "boyce": boyce_index(presence, background),
            "n_presence_cells": int(presence.size), "n_background_cells": int(background.size)}


def predicted_margins(grid: xr.DataArray, suitable_from, suitable_to, use, *, n_cells: int, labels) -> dict:
    """Margins of the cells predicted suitable in two periods, among the cells ``use`` (flat bool).

    Measured exactly as the observed margins (:func:`envelope.margins.margins_of_cells`), so
    predicted and observed shifts are comparable.
    """
    sets = [np.flatnonzero(np.asarray(s, dtype=bool).ravel() & use) for s in (suitable_from, suitable_to)]
    return margins_of_cells(grid, sets, n_cells=n_cells, labels=labels, where="--n-cells")


def plot_margin_shifts(summary: dict, *, title: str = "Margin shifts: observed and hindcast"):
    """Bar chart of the observed and predicted poleward and equatorward margin shifts (km), both directions."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 3.8), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    sides = ("poleward", "equatorward")
    groups = [("observed", summary["observed"]), ("forward", summary["forward"]), ("backward", summary["backward"])]
    width = 0.25
    for i, (name, block) in enumerate(groups):
        if name == "observed":
            vals = [block[f"{s}_margin_shift_km"] for s in sides]
        elif name == "forward":
            vals = [block[f"predicted_{s}_margin_shift_km"] for s in sides]
        else:  # the backward model predicts the shift from period 2 to period 1: flip it to compare
            vals = [-block[f"predicted_{s}_margin_shift_km"] for s in sides]
        ax.bar(np.arange(2) + (i - 1) * width, vals, width, label=name)
    ax.axhline(0, color="black", linewidth=0.8)
    ax.set_xticks(np.arange(2), ["poleward margin", "equatorward margin"])
    ax.set_ylabel("shift from first to second period (km, + = poleward)")
    ax.set_title(title)
    ax.legend(fontsize=8)
    return fig


def map_hindcast(suitability: xr.DataArray, records_xy, *, threshold: float, title: str):
    """Projected suitability with the projected period's record cells on top."""
    from envelope.figures import map_continuous

    fig = map_continuous(suitability, title=title, label="suitability", threshold_contour=threshold)
    x, y = records_xy
    fig.axes[0].scatter(x, y, s=4, c="black", marker=".", zorder=12, label="records")
    return fig
