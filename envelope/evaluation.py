"""Spatial block cross-validation of presence/background models: blocks, folds, block size and fold metrics."""

from __future__ import annotations

import math

import numpy as np

from envelope.errors import InputError
from envelope.kernels.metrics import auc, boyce_index, confusion, kappa, omission_rate, sensitivity, specificity, tss
from envelope.kernels.thresholds import choose_threshold, percentile_training_presence

__all__ = [
    "project_km",
    "spatial_blocks",
    "assign_block_folds",
    "random_folds",
    "default_block_km",
    "cross_validate",
    "independent_scores",
]


# --------------------------------------------------------------------------- coordinates


def _coords(x, y):
    x = np.asarray(x, dtype=np.float64).ravel()
    y = np.asarray(y, dtype=np.float64).ravel()
    if x.shape != y.shape:
        raise InputError(f"x, y: {x.size} and {y.size} coordinates; expected one x and one y per record")
    if x.size == 0:
        raise InputError("x, y: no records; expected at least one point")
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        raise InputError("x, y: non-finite coordinates (NaN or inf); expected finite point coordinates")
    return x, y


def project_km(x, y, *, crs):
    """Point coordinates in kilometres on the ground, ready for square blocks and distances.

    Geographic CRS: projected to a Lambert azimuthal equal-area projection centred on the
    data (the centre longitude is the circular mean, so data across ±180° work), which keeps
    areas exact and shapes nearly true near the data, so a km square is a km square on the
    ground. Projected CRS: the CRS's own axis unit converted to km.

    Returns
    -------
    xk, yk : ndarray of float64 (km)

    References
    ----------
    Snyder, J.P. (1987) Map projections — a working manual. USGS Prof. Paper 1395 (LAEA, ch. 24).
    """
    from pyproj import CRS, Transformer

    x, y = _coords(x, y)
    try:
        src = CRS.from_user_input(crs)
    except Exception as exc:  # pyproj raises CRSError with its own wording
        raise InputError(f"crs: {crs!r} is not a coordinate reference system ({exc})") from None
    if src.is_geographic:
        lam = np.deg2rad(x)
        lon0 = math.degrees(math.atan2(np.sin(lam).mean(), np.cos(lam).mean()))
        lat0 = float(np.clip((y.min() + y.max()) / 2.0, -90.0, 90.0))
        laea = CRS.from_proj4(f"+proj=laea +lat_0={lat0:.6f} +lon_0={lon0:.6f} +datum=WGS84 +units=m +no_defs")
        tr = Transformer.from_crs(src, laea, always_xy=True)
        xm, ym = tr.transform(x, y)
        return np.asarray(xm) / 1000.0, np.asarray(ym) / 1000.0
    if not src.is_projected:
        raise InputError(f"crs: {src.name!r} is neither geographic nor projected; expected a map CRS")
    factor = src.axis_info[0].unit_conversion_factor  # metres per CRS unit
    return x * factor / 1000.0, y * factor / 1000.0


# --------------------------------------------------------------------------- blocks and folds


def spatial_blocks(x, y, *, crs, block_km: float) -> np.ndarray:
    """Square block id (0, 1, 2, …) per point, blocks ``block_km`` on a side on the ground.

    The grid of blocks starts at the lower-left corner of the points' projected extent
    (see :func:`project_km`); ids are numbered consecutively in order of (row, column).

    References
    ----------
    Roberts, D.R. et al. (2017) Cross-validation strategies for data with temporal, spatial,
    hierarchical, or phylogenetic structure. Ecography 40: 913–929.
    """
    block_km = float(block_km)
    if not (math.isfinite(block_km) and block_km > 0):
        raise InputError(f"block_km: {block_km!r}; expected a block size > 0 km")
    xk, yk = project_km(x, y, crs=crs)
    col = np.floor((xk - xk.min()) / block_km).astype(np.int64)
    row = np.floor((yk - yk.min()) / block_km).astype(np.int64)
    _, ids = np.unique(row * (col.max() + 1) + col, return_inverse=True)
    return ids.astype(np.int64).ravel()


def assign_block_folds(block_ids, is_presence, n_folds: int, *, seed: int = 0) -> np.ndarray:
    """Fold (0 … n_folds−1) per record, whole blocks to folds, presences balanced.

    Greedy balancing (longest-processing-time rule): blocks holding presences, in descending
    presence count (equal counts in a seeded random order), each go to the fold with the
    fewest presences so far (ties: fewest background records, then a seeded random order
    of folds); then background-only blocks, in descending size, go to the fold with the
    fewest background records. Every record lands in exactly one fold, all records of a
    block share it, every fold gets presences, and the presence counts of any two folds
    differ by at most the largest presence count of a single block.

    Raises
    ------
    InputError
        Fewer blocks with presences than folds (suggests a smaller ``--blocks-km`` or fewer
        ``--folds``), or no presences at all.

    References
    ----------
    Roberts, D.R. et al. (2017) Ecography 40: 913–929 (blocked cross-validation).
    Graham, R.L. (1969) Bounds on multiprocessing timing anomalies. SIAM J. Appl. Math. 17: 416–429.
    """
    blocks = np.asarray(block_ids).ravel()
    pres = np.asarray(is_presence).ravel().astype(bool)
    if blocks.shape != pres.shape:
        raise InputError(f"block_ids, is_presence: {blocks.size} and {pres.size} values; expected one "
                         "of each per record")
    n_folds = int(n_folds)
    if n_folds < 2:
        raise InputError(f"n_folds: {n_folds}; expected at least 2 folds")
    if not pres.any():
        raise InputError("is_presence: no presences; expected at least one presence per fold")
    uniq, inv = np.unique(blocks, return_inverse=True)
    inv = inv.ravel()
    n_pres = np.bincount(inv, weights=pres, minlength=uniq.size).astype(np.int64)
    n_back = np.bincount(inv, weights=~pres, minlength=uniq.size).astype(np.int64)
    n_pres_blocks = int(np.count_nonzero(n_pres))
    if n_pres_blocks < n_folds:
        raise InputError(f"spatial blocks: only {n_pres_blocks} block(s) hold presences but {n_folds} "
                         "folds were asked for; use a smaller --blocks-km or fewer --folds")
    rng = np.random.default_rng(seed)
    jitter = rng.permutation(uniq.size)  # seeded tie-break among equal blocks
    fold_rank = rng.permutation(n_folds)  # seeded tie-break among equal folds
    fold_of_block = np.full(uniq.size, -1, dtype=np.int64)
    fold_p = np.zeros(n_folds, dtype=np.int64)
    fold_b = np.zeros(n_folds, dtype=np.int64)
    with_p = np.flatnonzero(n_pres > 0)
    for blk in with_p[np.lexsort((jitter[with_p], -n_pres[with_p]))]:
        k = int(np.lexsort((fold_rank, fold_b, fold_p))[0])
        fold_of_block[blk] = k
        fold_p[k] += n_pres[blk]
        fold_b[k] += n_back[blk]
    only_b = np.flatnonzero(n_pres == 0)
    for blk in only_b[np.lexsort((jitter[only_b], -n_back[only_b]))]:
        k = int(np.lexsort((fold_rank, fold_b))[0])
        fold_of_block[blk] = k
        fold_b[k] += n_back[blk]
    return fold_of_block[inv]


def random_folds(n: int, n_folds: int, *, seed: int = 0, stratify=None) -> np.ndarray:
    """Fold (0 … n_folds−1) per record at random, fold sizes differing by at most one.

    With ``stratify`` (labels per record, e.g. presence/background), each label is spread
    over the folds the same way, so every fold gets ⌊m/K⌋ or ⌈m/K⌉ of a label with m records.

    References
    ----------
    Hastie, T., Tibshirani, R. & Friedman, J. (2009) The Elements of Statistical Learning, 2nd
    ed., §7.10 (K-fold cross-validation).
    """
    n, n_folds = int(n), int(n_folds)
    if n_folds < 2:
        raise InputError(f"n_folds: {n_folds}; expected at least 2 folds")
    if n < n_folds:
        raise InputError(f"n: {n} records for {n_folds} folds; expected at least one record per fold")
    rng = np.random.default_rng(seed)
    folds = np.empty(n, dtype=np.int64)
    if stratify is None:
        folds[rng.permutation(n)] = np.arange(n) % n_folds
        return folds
    labels = np.asarray(stratify).ravel()
    if labels.size != n:
        raise InputError(f"stratify: {labels.size} labels for {n} records; expected one per record")
    offset = 0
    for lab in np.unique(labels):
        idx = np.flatnonzero(labels == lab)
        # continue the round-robin where the previous label stopped, so totals stay balanced
        folds[idx[rng.permutation(idx.size)]] = (offset + np.arange(idx.size)) % n_folds
        offset += idx.size
    return folds


# --------------------------------------------------------------------------- block size


# below this share of the sill in the spatially structured part c1/(c0 + c1), a predictor is
# treated as spatially independent (our choice; no published value)
_MIN_STRUCTURED_SHARE = 0.1


def _exponential_variogram(h, nugget, partial_sill, range_param):
    # gamma(h) = c0 + c1 (1 - exp(-h/a)); practical range (95 % of the sill) ~ 3a
    # Source: Cressie, N. (1993) Statistics for Spatial Data, §2.3.1.
    return nugget + partial_sill * (1.0 - np.exp(-h / range_param))


def default_block_km(x, y, values, *, crs, names=None, max_points: int = 1500, n_lags: int = 15,
                     seed: int = 0):
    """Block size from the range of spatial autocorrelation of the predictors.

    Rule (Valavi et al. 2019 principle; Roberts et al. 2017): for each predictor, standardise
    its background values, compute the empirical semivariogram (``n_lags`` equal lag bins up
    to half the largest distance between points, from at most ``max_points`` randomly chosen
    points), fit an exponential model γ(h) = c0 + c1 (1 − e^(−h/a)) by weighted least squares
    (``scipy.optimize.curve_fit``, weights = pair counts) and take the practical range 3a
    (0 km when the structured share c1/(c0 + c1) is below 0.1: a flat, pure-nugget
    variogram has no resolvable range).
    The block size is the median of those ranges over the predictors, clipped to
    [2 × the median nearest-neighbour distance between points, one fifth of the shorter
    side of the points' extent]: below the lower end a block holds about one record (no
    better than random folds), above the upper end too few blocks remain for K folds. If
    the interval is empty the upper end wins.

    Parameters
    ----------
    x, y : array_like
        Background point coordinates in ``crs``.
    values : array_like, shape (n_points, n_predictors)
        Predictor values at those points; rows with NaN are dropped.
    crs : anything ``pyproj.CRS.from_user_input`` accepts
    names : list of str, optional
        Predictor names for the details.

    Returns
    -------
    block_km : float
    details : dict
        ``method``, ``per_variable`` (name, practical range km, nugget, partial sill,
        structured share, fitted),
        ``median_range_km``, ``bounds_km`` (lower, upper), ``clipped`` ("lower", "upper" or
        None), ``n_points`` used.

    References
    ----------
    Valavi, R., Elith, J., Lahoz-Monfort, J.J. & Guillera-Arroita, G. (2019) blockCV: an R
    package for generating spatially or environmentally separated folds for k-fold
    cross-validation of species distribution models. Methods Ecol. Evol. 10: 225–232.
    Roberts, D.R. et al. (2017) Ecography 40: 913–929.
    Cressie, N. (1993) Statistics for Spatial Data, rev. ed. Wiley (variogram estimation).
    """
    from scipy.optimize import curve_fit
    from scipy.spatial import cKDTree
    from scipy.spatial.distance import pdist

    xk, yk = project_km(x, y, crs=crs)
    vals = np.asarray(values, dtype=np.float64)
    if vals.ndim == 1:
        vals = vals[:, None]
    if vals.shape[0] != xk.size:
        raise InputError(f"values: {vals.shape[0]} rows for {xk.size} points; expected one row per point")
    names = [f"variable_{i}" for i in range(vals.shape[1])] if names is None else [str(n) for n in names]
    if len(names) != vals.shape[1]:
        raise InputError(f"names: {len(names)} names for {vals.shape[1]} predictors")
    ok = ~np.isnan(vals).any(axis=1)
    xk, yk, vals = xk[ok], yk[ok], vals[ok]
    if xk.size < 10:
        raise InputError(f"values: {xk.size} complete background records; expected at least 10 to "
                         "estimate a variogram")
    rng = np.random.default_rng(seed)
    if xk.size > max_points:
        pick = rng.choice(xk.size, size=max_points, replace=False)
        xk, yk, vals = xk[pick], yk[pick], vals[pick]
    pts = np.column_stack([xk, yk])

    # a one-row or one-column study area has points on a line: its blocks cut the line
    extents = [float(e) for e in (np.ptp(xk), np.ptp(yk)) if e > 0]
    if not extents:
        raise InputError("background: every point lies in one place, so no spatial blocks can be formed "
                         "(expected a study area of more than one cell; give a block size or random folds)")
    side = min(extents)
    nn = cKDTree(pts).query(pts, k=2)[0][:, 1]
    upper = side / 5.0
    lower = 2.0 * float(np.median(nn))

    dist = pdist(pts)
    max_lag = dist.max() / 2.0
    edges = np.linspace(0.0, max_lag, n_lags + 1)
    lag = np.digitize(dist, edges) - 1
    in_range = lag < n_lags
    lag = lag[in_range]
    counts = np.bincount(lag, minlength=n_lags)
    h = np.bincount(lag, weights=dist[in_range], minlength=n_lags)
    used = counts > 0
    h = h[used] / counts[used]

    per_variable = []
    for j, name in enumerate(names):
        z = vals[:, j]
        sd = z.std()
        entry = {"name": name, "range_km": None, "nugget": None, "partial_sill": None, "fitted": False}
        if sd > 0:
            z = (z - z.mean()) / sd
            # Matheron's estimator: gamma(h) = mean of (z_i - z_j)^2 / 2 over pairs in the lag bin
            sq = pdist(z[:, None], metric="sqeuclidean")[in_range] / 2.0
            gamma = np.bincount(lag, weights=sq, minlength=n_lags)[used] / counts[used]
            try:
                popt, _ = curve_fit(
                    _exponential_variogram, h, gamma,
                    p0=(max(gamma[0] * 0.5, 1e-6), max(gamma.max() - gamma[0] * 0.5, 1e-6), max_lag / 6.0),
                    sigma=1.0 / np.sqrt(counts[used]),
                    bounds=([0.0, 0.0, max_lag * 1e-4], [np.inf, np.inf, max_lag * 10.0]),
                    maxfev=5000)
                share = popt[1] / (popt[0] + popt[1]) if popt[0] + popt[1] > 0 else 0.0
                # a variogram flat from the first lag has no resolvable range: count it as 0 km
                # (spatially independent at the sampled spacing) rather than the arbitrary fitted a
                range_km = float(3.0 * popt[2]) if share >= _MIN_STRUCTURED_SHARE else 0.0
                entry.update(range_km=range_km, nugget=float(popt[0]), partial_sill=float(popt[1]),
                             structured_share=float(share), fitted=True)
            except (RuntimeError, ValueError):
                pass  # left out of the median; recorded as not fitted
        per_variable.append(entry)

    ranges = [e["range_km"] for e in per_variable if e["fitted"]]
    median_range = float(np.median(ranges)) if ranges else float("nan")
    if lower > upper:
        lower = upper
    if not ranges:
        block, clipped = upper, "upper"
    elif median_range > upper:
        block, clipped = upper, "upper"
    elif median_range < lower:
        block, clipped = lower, "lower"
    else:
        block, clipped = median_range, None
    details = {
        "method": "median practical range of exponential variograms of the predictors",
        "per_variable": per_variable,
        "median_range_km": median_range,
        "bounds_km": [float(lower), float(upper)],
        "clipped": clipped,
        "n_points": int(xk.size),
        "block_km": float(block),
    }
    return float(block), details


# --------------------------------------------------------------------------- cross-validation


def _rows(X, idx):
    return X.iloc[idx] if hasattr(X, "iloc") else X[idx]


def _fold_fit_args(X, y, n, tr_idx, sample_weight, fit_params) -> tuple:
    """``(X rows, y rows, fit keyword arguments)`` of the fit on the training rows ``tr_idx``:
    per-record fit parameters (e.g. the spatial fold ids a model tunes its penalty on) are cut
    to the training rows, so inner tuning never sees the held-out fold."""
    kw = {key: (np.asarray(v)[tr_idx] if np.ndim(v) == 1 and len(v) == n else v)
          for key, v in (fit_params or {}).items()}
    if sample_weight is not None:
        kw["sample_weight"] = sample_weight[tr_idx]
    return _rows(X, tr_idx), y[tr_idx], kw


def cross_validate(make_estimator, X, y, folds, *, sample_weight=None, threshold_rule="max-sss",
                   fit_params=None, progress=None, n_jobs=1, final_fit=False, fit_progress=None):
    """Fit on K−1 folds, score on the held-out fold, for each fold; return the table and a summary.

    For each fold k a fresh estimator from ``make_estimator()`` is fitted on the other folds
    (``fit(X, y, sample_weight=...)``; ``sample_weight`` is passed only when given). Its
    suitability (``predict_proba(X)[:, 1]``) is then scored on the held-out presences
    against the held-out background only, never on training records:

    - ``auc``: Mann–Whitney AUC, ties ½;
    - ``threshold``: chosen by ``threshold_rule`` on the TRAINING predictions (so the
      held-out TSS/kappa are honest), with ``sensitivity``, ``specificity``, ``tss`` and
      ``kappa`` at it (predicted present: suitability >= threshold);
    - ``boyce``: continuous Boyce index (default window, repeats dropped); may be NaN;
    - ``omission_p10``: share of held-out presences below the 10th-percentile training
      presence threshold (order-statistic convention), reported as ``p10_threshold``.

    Parameters
    ----------
    make_estimator : callable returning an unfitted sklearn-style classifier
    X : array_like or DataFrame, shape (n_records, n_variables)
    y : array_like of 0 (background) / 1 (presence)
    folds : array_like of int, shape (n_records,)
        Fold label per record (e.g. from :func:`assign_block_folds`); at least 2 labels.
    sample_weight : array_like, optional
    threshold_rule : str or float, default="max-sss"
        See :func:`envelope.kernels.thresholds.choose_threshold`.
    fit_params : dict, optional
        Extra keyword arguments for ``fit``.
    progress : callable, optional
        Called as ``progress(k)`` after fold ``k`` is scored.
    n_jobs : int, default=1
        With 2 or more, the fold fits (and the final fit) run first, that many at a time in
        worker processes (:func:`envelope.models.memory.fit_in_parallel`); the scores are the same.
    final_fit : bool, default=False
        Also fit ``make_estimator()`` on every record (with ``fit_params`` and
        ``sample_weight``) and return it as a third value: the fit a pipeline makes after
        the cross-validation, here made together with the fold fits.
    fit_progress : callable(done, total), optional
        Called as the parallel fits finish.

    Returns
    -------
    per_fold : pandas.DataFrame
        One row per fold: ``fold``, ``n_train_presence``, ``n_train_background``,
        ``n_test_presence``, ``n_test_background``, ``threshold``, ``threshold_rule``,
        ``auc``, ``sensitivity``, ``specificity``, ``tss``, ``kappa``, ``boyce``,
        ``omission_p10``, ``p10_threshold``.
    summary : dict
        ``auc_mean``, ``auc_sd``, ``tss_mean``, ``tss_sd``, ``kappa_mean``, ``kappa_sd``,
        ``boyce_mean``, ``boyce_sd``, ``omission_p10_mean``, ``n_folds``, ``threshold_rule``.
        SDs are sample SDs (ddof = 1) across folds; Boyce statistics ignore NaN folds
        (NaN when all folds are NaN).
    estimator : fitted on every record; only with ``final_fit=True``.

    References
    ----------
    Roberts, D.R. et al. (2017) Ecography 40: 913–929.
    Allouche, O., Tsoar, A. & Kadmon, R. (2006) J. Appl. Ecol. 43: 1223–1232.
    Hirzel, A.H. et al. (2006) Ecol. Model. 199: 142–152.
    Liu, C., White, M. & Newell, G. (2013) J. Biogeogr. 40: 778–789.
    """
    import pandas as pd

    y = np.asarray(y).ravel()
    folds = np.asarray(folds).ravel()
    n = y.size
    if len(X) != n or folds.size != n:
        raise InputError(f"X, y, folds: {len(X)}, {n} and {folds.size} records; expected the same number")
    if not np.isin(y, (0, 1)).all():
        raise InputError(f"y: labels {np.unique(y)[:5].tolist()}; expected 1 = presence and 0 = background")
    y = y.astype(np.int64)
    if not (y == 1).any():
        raise InputError("y: no presences; expected presences (1) and background (0)")
    if sample_weight is not None:
        sample_weight = np.asarray(sample_weight, dtype=np.float64).ravel()
        if sample_weight.size != n:
            raise InputError(f"sample_weight: {sample_weight.size} weights for {n} records")
    labels = np.unique(folds)
    if labels.size < 2:
        raise InputError(f"folds: {labels.size} distinct fold label(s); expected at least 2")
    fit_params = dict(fit_params or {})

    splits = []
    for k in labels.tolist():
        test = folds == k
        train = ~test
        counts = {"n_train_presence": int((y[train] == 1).sum()), "n_train_background": int((y[train] == 0).sum()),
                  "n_test_presence": int((y[test] == 1).sum()), "n_test_background": int((y[test] == 0).sum())}
        empty = [name for name, c in counts.items() if c == 0]
        if empty:
            raise InputError(f"folds: fold {k} leaves {', '.join(empty)} = 0; expected presences and "
                             "background on both sides of every fold (use fewer folds or other blocks)")
        splits.append((k, counts, np.flatnonzero(train), np.flatnonzero(test)))
    jobs = [_fold_fit_args(X, y, n, tr_idx, sample_weight, fit_params) for _, _, tr_idx, _ in splits]
    if final_fit:
        jobs.append(_fold_fit_args(X, y, n, np.arange(n), sample_weight, fit_params))
    fitted = None
    if n_jobs >= 2:
        from envelope.models.memory import fit_in_parallel

        fitted = fit_in_parallel([(make_estimator(), Xt, yt, kw) for Xt, yt, kw in jobs], n_jobs=n_jobs,
                                 progress=fit_progress)

    rows = []
    for i, (k, counts, tr_idx, te_idx) in enumerate(splits):
        if fitted is not None:
            est = fitted[i]
        else:
            Xt, yt, kw = jobs[i]
            est = make_estimator()
            est.fit(Xt, yt, **kw)
        s_train = np.asarray(est.predict_proba(_rows(X, tr_idx)))[:, 1]
        s_test = np.asarray(est.predict_proba(_rows(X, te_idx)))[:, 1]
        tr_p, tr_b = s_train[y[tr_idx] == 1], s_train[y[tr_idx] == 0]
        te_p, te_b = s_test[y[te_idx] == 1], s_test[y[te_idx] == 0]

        t, rule_name = choose_threshold(threshold_rule, tr_p, tr_b)
        cm = confusion(te_p, te_b, t)
        p10 = percentile_training_presence(tr_p, 10, method="order")
        rows.append({"fold": k, **counts, "threshold": t, "threshold_rule": rule_name,
                     "auc": auc(te_p, te_b), "sensitivity": sensitivity(*cm), "specificity": specificity(*cm),
                     "tss": tss(*cm), "kappa": kappa(*cm), "boyce": boyce_index(te_p, te_b),
                     "omission_p10": omission_rate(te_p, p10), "p10_threshold": p10})
        if progress is not None:
            progress(k)

    per_fold = pd.DataFrame(rows)

    def _sd(col):
        v = per_fold[col].to_numpy(dtype=np.float64)
        v = v[~np.isnan(v)]
        return float(np.std(v, ddof=1)) if v.size > 1 else float("nan")

    def _mean(col):
        v = per_fold[col].to_numpy(dtype=np.float64)
        return float(np.nanmean(v)) if (~np.isnan(v)).any() else float("nan")

    summary = {"auc_mean": _mean("auc"), "auc_sd": _sd("auc"), "tss_mean": _mean("tss"), "tss_sd": _sd("tss"),
               "kappa_mean": _mean("kappa"), "kappa_sd": _sd("kappa"), "boyce_mean": _mean("boyce"),
               "boyce_sd": _sd("boyce"), "omission_p10_mean": _mean("omission_p10"), "omission_p10_sd": _sd("omission_p10"),
               "n_folds": int(labels.size), "threshold_rule": rows[0]["threshold_rule"]}
    if not final_fit:
        return per_fold, summary
    if fitted is not None:
        return per_fold, summary, fitted[-1]
    Xa, ya, kw = jobs[-1]
    return per_fold, summary, make_estimator().fit(Xa, ya, **kw)



# --------------------------------------------------------------------------- independent data


def independent_scores(presence_scores, other_scores, threshold: float) -> dict:
    """Skill of a fitted model on independent data, at the model's own threshold.

    ``other_scores`` are the suitabilities at surveyed absences (presence-absence data) or
    at background cells (presence-background data); the metrics are those of
    :func:`cross_validate`'s held-out folds, at the given ``threshold`` instead of one
    chosen on training data: ``auc`` (Mann-Whitney, ties 1/2), ``sensitivity``,
    ``specificity``, ``tss`` and ``kappa`` (predicted present: suitability >= threshold),
    ``boyce`` (continuous Boyce index, may be NaN) and ``omission`` (share of presences
    below the threshold).

    References
    ----------
    Allouche, O., Tsoar, A. & Kadmon, R. (2006) J. Appl. Ecol. 43: 1223-1232.
    Hirzel, A.H. et al. (2006) Ecol. Model. 199: 142-152.
    """
    p = np.asarray(presence_scores, dtype=np.float64)
    o = np.asarray(other_scores, dtype=np.float64)
    if p.size == 0 or o.size == 0:
        raise InputError(f"evaluation: {p.size} presences and {o.size} absences/background; expected both")
    cm = confusion(p, o, threshold)
    return {"auc": auc(p, o), "tss": tss(*cm), "kappa": kappa(*cm), "boyce": boyce_index(p, o),
            "omission": omission_rate(p, threshold), "sensitivity": sensitivity(*cm),
            "specificity": specificity(*cm), "threshold": float(threshold)}
