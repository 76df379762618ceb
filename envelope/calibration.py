"""Calibration of suitability against observed presence: binned shares and their plot."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError

__all__ = ["calibration_bins", "calibration_figure"]


def calibration_bins(scores, observed, *, n_bins: int = 10) -> list[dict]:
    """Observed share of presences against mean predicted suitability, in equal-width bins of 0-1.

    Bin k holds scores in [k/n, (k+1)/n) (the last bin includes 1). Empty bins are left
    out. With presence-background data the observed share depends on how many background
    cells were drawn, so only the ordering of the bins, not their level, is meaningful.

    Returns
    -------
    list of dict
        ``{"lower", "upper", "n", "mean_predicted", "observed"}`` per non-empty bin.

    References
    ----------
    Pearce, J. & Ferrier, S. (2000) Evaluating the predictive performance of habitat models
    developed using logistic regression. Ecol. Model. 133: 225-245.
    """
    s = np.asarray(scores, dtype=np.float64).ravel()
    y = np.asarray(observed, dtype=np.float64).ravel()
    if s.size != y.size:
        raise InputError(f"calibration: {s.size} scores but {y.size} observations")
    keep = np.isfinite(s) & np.isfinite(y)
    s, y = s[keep], y[keep]
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    index = np.clip(np.floor(np.clip(s, 0.0, 1.0) * n_bins).astype(int), 0, n_bins - 1)
    out = []
    for k in range(n_bins):
        inside = index == k
        if inside.any():
            out.append({"lower": float(edges[k]), "upper": float(edges[k + 1]), "n": int(inside.sum()),
                        "mean_predicted": float(s[inside].mean()), "observed": float(y[inside].mean())})
    return out


def calibration_figure(bins: list[dict], *, title: str = "Calibration", against: str = "absences"):
    """A matplotlib figure: observed share of presences against mean predicted suitability per bin.

    Point areas grow with the records in each bin; the diagonal marks perfect calibration.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(4.5, 4.5), dpi=120)
    ax.plot([0, 1], [0, 1], color="0.6", lw=1, ls="--", label="perfect calibration")
    if bins:
        x = [b["mean_predicted"] for b in bins]
        y = [b["observed"] for b in bins]
        n = np.asarray([b["n"] for b in bins], dtype=float)
        ax.plot(x, y, color="#1f5f8b", lw=1.2)
        ax.scatter(x, y, s=20 + 180 * n / n.max(), color="#1f5f8b", zorder=3, label="bins (area ~ records)")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_xlabel("mean predicted suitability")
    ax.set_ylabel(f"observed share of presences (vs {against})")
    ax.set_title(title)
    ax.legend(loc="upper left", fontsize=8, frameon=False)
    fig.tight_layout()
    return fig
