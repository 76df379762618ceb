"""The fit pipeline: records + baseline climate -> cleaned data, CV, final model, diagnostics."""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from envelope.errors import InputError
from envelope.provenance import file_sha256, json_ready, json_text, table_sha256

log = logging.getLogger(__name__)

MIN_RECORDS = 5       # below this no model is fitted
FEW_RECORDS = 15      # below this a warning: CV metrics are very noisy
COLLINEAR_R = 0.7     # Dormann et al. (2013) rule of thumb for |r| between predictors
#: Methods that can be trained on presences and surveyed absences (classifiers of presence against
#: absence); the point-process model and the climatic envelope are presence-only by construction.
PRESENCE_ABSENCE_METHODS = ("brt", "forest")


@dataclass
class FitResult:
    """Everything `envelope fit` writes: the estimator, the model-file metadata, the summary."""

    estimator: object
    metadata: dict
    summary: dict
    per_fold: pd.DataFrame
    warnings: list = field(default_factory=list)
    autocovariate: object = None        # the (y, x) autocovariate layer of the fit, with --autocovariate




def check_variables(values: np.ndarray, names) -> None:
    """Refuse all-NaN or constant predictors: they carry no information and break scaling."""
    for j, name in enumerate(names):
        col = values[:, j]
        finite = col[np.isfinite(col)]
        if finite.size == 0:
            raise InputError(f"climate variable {name!r} is NaN at every sampled cell")
        if np.ptp(finite) == 0:
            raise InputError(f"climate variable {name!r} is constant ({finite[0]:g}) over the study area; drop it with --variables")


def collinear_pairs(values: np.ndarray, names, threshold: float = COLLINEAR_R) -> list[dict]:
    """Pairs of predictors with |Pearson r| above ``threshold`` on the background sample.

    Source: Dormann et al. (2013) Ecography 36: 27–46, |r| > 0.7 as a rule of thumb.
    """
    r = np.corrcoef(values, rowvar=False)
    out = []
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            if abs(r[i, j]) > threshold:
                out.append({"a": names[i], "b": names[j], "r": round(float(r[i, j]), 4)})
    return out


#: How a records table passed as a DataFrame is named in messages and provenance.
IN_MEMORY_RECORDS = "records table (in memory)"


@dataclass
class FitOptions:
    """Settings of one fit; each field is named as its `envelope fit` option (``--blocks-km`` -> ``blocks_km``)
    and, where the study file has it, as its study-file key (``model.blocks_km``)."""

    method: str = "pointprocess"
    background: int = 10_000
    variables: list | None = None
    blocks_km: float | None = None
    folds: int = 5
    cv: str = "block"                   # "block" (spatial) or "random" (for comparison only)
    threshold_rule: object = "max-sss"
    seed: int = 0
    max_uncertainty_m: float | None = None
    record_years: tuple | None = None
    thin_km: float | None = None
    x_column: str | None = None
    y_column: str | None = None
    crs: str | None = None
    background_buffer_km: float | None = None
    permutation_repeats: int = 3
    bias_method: str = "auto"           # with a bias layer: "covariate", "weighted" or "auto" (see background.py)
    features: object = "cv"             # "cv" or a tuple of feature classes (point-process model)
    species: str | None = None          # taxon to keep (records.species)
    absences: bool = False              # keep surveyed absences (records.absences)
    species_option: str = "--species"   # how messages name the species setting
    autocovariate_km: float | None = None  # neighbourhood radius of the spatial autocovariate term


def fit_model(records_path, climate, *, options: FitOptions = None, bias=None, mask=None,
              climate_paths=(), bias_path=None, progress=None) -> FitResult:
    """Clean records, draw background, cross-validate, fit the final model and describe it.

    Parameters
    ----------
    records_path : path-like or pandas.DataFrame
        Occurrence table (Darwin Core CSV/TSV or named x/y columns), or such a table already
        read (:func:`envelope.io.records.read_occurrences`, or built in a notebook).
    climate : DataArray (variable, y, x)
        Baseline climate stack (opened with :func:`envelope.io.rasters.open_climate`).
    options : FitOptions
    bias, mask : DataArray (y, x), optional
        Recording-effort raster, used as ``options.bias_method`` says
        (:func:`envelope.background.resolve_bias_method`); area the background may come from.
    climate_paths : sequence of path-like
        The files behind ``climate``, for provenance checksums.
    bias_path : path-like, optional
        The file behind ``bias``, for the provenance checksums.
    progress : callable(stage: str, done: int, total: int), optional

    Returns
    -------
    FitResult

    References
    ----------
    Fithian & Hastie (2013); Roberts et al. (2017); Liu et al. (2005, 2013); see docs/methods.md.
    """
    import envelope.evaluation as evaluation
    from envelope.background import draw_background, drop_unrecorded, resolve_bias_method
    from envelope.io.records import read_occurrences
    from envelope.kernels.mess import reference_from_training
    from envelope.kernels.thresholds import choose_threshold
    from envelope.models import feature_classes_report, response_curves
    from envelope.records import clean_occurrences, values_at

    opt = options or FitOptions()
    from envelope.models.features import parse_feature_classes

    features = parse_feature_classes(opt.features, where="--features")
    notes: list[str] = []
    report = progress or (lambda stage, done, total: None)
    if opt.variables:
        from envelope.grids import match_variables

        climate = match_variables(climate, opt.variables, source="--climate")
    names = [str(v) for v in climate["variable"].values]
    units = ([str(u) for u in climate["units"].values] if "units" in climate.coords else [""] * len(names))

    if isinstance(records_path, pd.DataFrame):
        table, records_path = records_path, IN_MEMORY_RECORDS
    else:
        table = read_occurrences(records_path, x_column=opt.x_column, y_column=opt.y_column, crs=opt.crs)
    records = clean_occurrences(table, climate, crs=opt.crs, max_uncertainty_m=opt.max_uncertainty_m,
                                record_years=opt.record_years, thin_km=opt.thin_km, species=opt.species,
                                absences=opt.absences, species_option=opt.species_option)
    records, absences = split_absences(records)
    presence_absence = absences is not None and len(absences) > 0 and opt.method in PRESENCE_ABSENCE_METHODS
    if absences is not None and len(absences) and not presence_absence:
        notes.append(f"{len(absences)} surveyed absences were kept but not used: method {opt.method!r} is fitted "
                     f"to presences and background; {', '.join(PRESENCE_ABSENCE_METHODS)} use absences "
                     "(or use them to test the model with envelope evaluate)")
    autocov_layer = None
    if opt.autocovariate_km:
        from envelope.autocovariate import autocovariate_layer, with_autocovariate

        autocov_layer = autocovariate_layer(records.occupancy(climate), opt.autocovariate_km, grid=climate)
        climate = with_autocovariate(climate, autocov_layer)
        names, units = names + [str(autocov_layer.name)], units + ["1"]
    bias_method = resolve_bias_method(opt.bias_method, opt.method, bias is not None)
    if bias_method == "covariate":
        records, unrecorded = drop_unrecorded(records, bias, climate)
        if unrecorded:
            notes.append(f"{unrecorded} records lie in cells without recording effort (bias 0 or NaN) "
                         "and were left out of the covariate bias correction")
    n_pres = len(records.table)
    if n_pres < MIN_RECORDS:
        raise InputError(f"{records_path}: only {n_pres} usable records after cleaning "
                         f"(at least {MIN_RECORDS} are needed to fit a model)")
    if n_pres < FEW_RECORDS:
        msg = (f"only {n_pres} usable records: cross-validated skill will be very uncertain "
               f"(fewer than {FEW_RECORDS})")
        log.warning(msg)
        notes.append(msg)
    report("records", 1, 1)

    X_pres = values_at(climate, records.table["row"].to_numpy(), records.table["col"].to_numpy())
    drawn = draw_background(climate, opt.background, seed=opt.seed, bias=bias, bias_method=bias_method, mask=mask,
                            buffer_km=opt.background_buffer_km, records=records)
    background = drawn.table
    X_bg = values_at(climate, background["row"].to_numpy(), background["col"].to_numpy())
    if drawn.info["n_draws"] is None:
        notes.append(f"only {len(background)} background cells available (asked for {opt.background}); "
                     f"every one is used once, weighted by {drawn.info['probability']}")
    check_variables(np.vstack([X_pres, X_bg]), names)
    report("background", 1, 1)

    if presence_absence:
        # presences against surveyed absences: the background only describes the study area
        negatives = absences.assign(weight=1.0)
        X_neg = values_at(climate, negatives["row"].to_numpy(), negatives["col"].to_numpy())
        check_variables(np.vstack([X_pres, X_neg]), names)
        effort = None
        if bias is not None:
            notes.append("presence-absence fit: the bias layer is not used (absences come from surveys)")
    else:
        negatives, X_neg = background, X_bg
        effort = None if drawn.effort is None else np.r_[drawn.effort_at(records.table["row"], records.table["col"]),
                                                        drawn.effort]
    X = np.vstack([X_pres, X_neg])
    y = np.r_[np.ones(len(X_pres), dtype=int), np.zeros(len(X_neg), dtype=int)]
    # quadrature weights of the background (draw counts), or 1 per absence; effort as a covariate when chosen
    sample_weight = np.r_[np.ones(len(X_pres)), negatives["weight"].to_numpy()]
    px = np.r_[records.table["x"].to_numpy(), negatives["x"].to_numpy()]
    py = np.r_[records.table["y"].to_numpy(), negatives["y"].to_numpy()]
    crs = climate.rio.crs

    block_info = {}
    if opt.cv == "random":
        folds = evaluation.random_folds(len(y), opt.folds, seed=opt.seed, stratify=y)
        block_km = None
    elif opt.cv == "block":
        if opt.blocks_km is None:
            block_km, block_info = evaluation.default_block_km(px[y == 0], py[y == 0], X_neg, crs=crs, names=names,
                                                               seed=opt.seed)
            block_info = dict(block_info, rule="default (from the predictors' spatial autocorrelation)")
        else:
            block_km = float(opt.blocks_km)
            block_info = {"rule": "given (--blocks-km)"}
        blocks = evaluation.spatial_blocks(px, py, crs=crs, block_km=block_km)
        folds = evaluation.assign_block_folds(blocks, y == 1, opt.folds, seed=opt.seed)
    else:
        raise InputError(f"cv scheme {opt.cv!r} is not known; expected 'block' or 'random'")

    def make():
        return build_estimator(opt.method, opt.seed, features=features)

    inner = folds
    if opt.folds == 2 and _group_params(opt.method, folds):
        # With two folds each training half holds a single fold id, so the model's own CV (penalty
        # and feature classes) cannot split it by fold: it splits by the spatial blocks instead
        # (by five random folds under --cv random). Common practice, no source.
        inner = blocks if opt.cv == "block" else evaluation.random_folds(len(y), 5, seed=opt.seed, stratify=y)
        notes.append("--folds 2: the model's own penalty and feature-class CV splits each training half by "
                     + ("spatial block" if opt.cv == "block" else "five random folds"))
    fit_params = {**_group_params(opt.method, inner), **({} if effort is None else {"effort": effort})}
    from envelope.models.memory import usable_cores

    n_jobs = 1 if _in_dask_worker() else usable_cores()
    if opt.method == "ensemble" and n_jobs > 1:
        # the ensemble's nested CV: every member fit it will need, made in parallel first
        # (the outer fits then find them remembered, so they stay in this process)
        from envelope.models.ensemble import prefit_members

        prefit_members(make(), X, y, folds, sample_weight=sample_weight, groups=inner, n_jobs=n_jobs,
                       progress=lambda done, total: report("ensemble member fits", done, total))
        n_jobs = 1
    # the fold fits and the final fit are independent: with several cores they run side by side
    per_fold, cv, estimator = evaluation.cross_validate(
        make, X, y, folds, sample_weight=sample_weight, threshold_rule=opt.threshold_rule,
        fit_params=fit_params, progress=lambda k: report("cross-validation", k + 1, opt.folds),
        n_jobs=n_jobs, final_fit=True, fit_progress=lambda done, total: report("model fits", done, total))
    report("final fit", 1, 1)
    scores = estimator.predict_proba(X)[:, 1]
    threshold, rule = choose_threshold(opt.threshold_rule, scores[y == 1], scores[y == 0])

    # MESS compares against the training sample (presences + background), the same rows whose
    # range bounds the clamping (Elith, Kearney & Phillips 2010), each grid cell counted once
    cells = np.r_[records.table["row"].to_numpy() * climate.sizes["x"] + records.table["col"].to_numpy(),
                  negatives["row"].to_numpy() * climate.sizes["x"] + negatives["col"].to_numpy()]
    reference = reference_from_training(X, cells=cells)
    ranges = {n: (float(np.nanmin(X[:, j])), float(np.nanmax(X[:, j]))) for j, n in enumerate(names)}
    pct = np.nanpercentile(X_bg, reference.percentile_levels, axis=0)
    variables_meta = [{"name": n, "units": u, "min": ranges[n][0], "max": ranges[n][1],
                       "percentiles": dict(zip([f"p{lv:g}" for lv in reference.percentile_levels],
                                               [float(v) for v in pct[:, j]]))}
                      for j, (n, u) in enumerate(zip(names, units))]
    importance = permutation_importance_auc(estimator, X, y, names, repeats=opt.permutation_repeats,
                                            seed=opt.seed)
    curves = response_curves(estimator, X_bg, names, n_points=50)
    from envelope.autocovariate import residual_correlogram

    residual_ac = residual_correlogram(px, py, y - scores, grid=climate, seed=opt.seed)
    curves_json = {k: {"value": np.asarray(v["value"]).tolist(), "suitability": np.asarray(v["suitability"]).tolist()}
                   for k, v in curves.items()}
    report("diagnostics", 1, 1)

    inputs = {str(records_path): (table_sha256(table) if records_path == IN_MEMORY_RECORDS
                                  else file_sha256(records_path))}
    for p in climate_paths:
        inputs[str(p)] = file_sha256(p)
    if bias_path is not None:
        inputs[str(bias_path)] = file_sha256(bias_path)
    cv_block = {"scheme": opt.cv, "n_folds": opt.folds, "block_km": block_km,
                "block_size_rule": block_info, **json_ready(cv)}
    background_info, background_notes = drawn.describe(estimator, X_bg, names, collinear_r=COLLINEAR_R)
    notes.extend(background_notes)
    transform = climate.rio.transform()
    autocov_info = None if autocov_layer is None else {
        "variable": str(autocov_layer.name), "radius_km": float(opt.autocovariate_km),
        "weights": "inverse distance, share of occupied neighbour cells (Augustin et al. 1996)",
        "projection": "held at today's neighbourhood: project with the layer written beside the model "
                      "(envelope.autocovariate.autocovariate_for_projection)"}
    metadata = {
        "bias_correction": drawn.bias_correction,
        "background": background_info,
        "variables": variables_meta,
        "threshold": {"value": float(threshold), "rule": rule},
        "cv": cv_block,
        "mess_reference": reference.to_dict(),
        "feature_classes": feature_classes_report(estimator),
        "autocovariate": autocov_info,
        "grid": {"crs": crs.to_string() if crs is not None else None,
                 "resolution": [abs(transform.a), abs(transform.e)],
                 "shape": [climate.sizes["y"], climate.sizes["x"]]},
        "training": "presence-absence" if presence_absence else "presence-background",
        "species": None if records.taxa is None else (records.taxa["asked"] or next(iter(records.taxa["counts"]), None)),
        "provenance": {"inputs": inputs, "seed": opt.seed,
                       "records_dropped": dict(records.dropped)},
    }
    summary = {
        "n_presences": int(n_pres),
        "n_background": int(len(X_bg)),
        "training": "presence-absence" if presence_absence else "presence-background",
        **({} if absences is None else {"n_absences": int(len(absences))}),
        "bias_correction": drawn.bias_correction,
        "background": background_info,
        "method": opt.method,
        "variables": names,
        "threshold": {"value": float(threshold), "rule": rule},
        "cv": cv_block,
        "feature_classes": feature_classes_report(estimator),
        "records": {"read": int(records.n_read), "kept": int(n_pres), "dropped": dict(records.dropped),
                    **({} if records.taxa is None else {"taxa": records.taxa}),
                    "input": dict(table.attrs.get("read", {}))},
        "collinear_pairs": collinear_pairs(X_bg, names),
        "permutation_importance": importance,
        "response_curves": curves_json,
        "training_range": {n: list(r) for n, r in ranges.items()},
        "residual_autocorrelation": residual_ac,
        "autocovariate": autocov_info,
        "notes": notes,
        "seed": opt.seed,
    }
    return FitResult(estimator=estimator, metadata=metadata, summary=summary, per_fold=per_fold, warnings=notes,
                     autocovariate=autocov_layer)



def split_absences(records):
    """``(presence records, absence table or None)`` of cleaned records that may hold kept absences."""
    import dataclasses

    from envelope.records import PRESENCE_COLUMN

    if PRESENCE_COLUMN not in records.table.columns:
        return records, None
    is_presence = records.table[PRESENCE_COLUMN].to_numpy() == 1
    presences = records.table.loc[is_presence].reset_index(drop=True)
    presences.attrs = dict(records.table.attrs)
    return (dataclasses.replace(records, table=presences),
            records.table.loc[~is_presence].reset_index(drop=True))


def _in_dask_worker() -> bool:
    """True inside a dask.distributed worker, whose cores the cluster already shares out."""
    try:
        from distributed import get_worker

        get_worker()
        return True
    except (ImportError, ValueError):
        return False


def build_estimator(method: str, seed: int = 0, features="cv"):
    """The estimator behind each ``--method`` name, with the pipeline's defaults.

    The point-process model chooses its L1 penalty and, unless ``features`` names the
    classes, its feature classes by cross-validation over the spatial folds it is given
    (``C="cv"``, ``classes="cv"``); the ensemble weights the point-process model, boosted
    trees and the down-sampled forest by their spatially cross-validated AUC.
    """
    from envelope.models import make_estimator

    if method == "pointprocess":
        return make_estimator("pointprocess", C="cv", classes=features, random_state=seed)
    if method == "envelope":
        return make_estimator("envelope")
    if method in ("brt", "forest"):
        return make_estimator(method, random_state=seed)
    if method == "ensemble":
        members = [("pointprocess", build_estimator("pointprocess", seed, features)),
                   ("brt", build_estimator("brt", seed)),
                   ("forest", build_estimator("forest", seed))]
        return make_estimator("ensemble", members=members)
    from envelope.models import METHOD_NAMES

    raise InputError(f"--method: got {method!r}; expected one of {', '.join(METHOD_NAMES)}")


def _group_params(method: str, folds) -> dict:
    """The point-process model chooses its penalty by CV over the same spatial folds."""
    return {"groups": folds} if method in ("pointprocess", "ensemble") else {}


def permutation_importance_auc(estimator, X, y, names, *, repeats=3, seed=0) -> dict:
    """Drop in training AUC when one variable's values are permuted (Breiman 2001 idea).

    Uses :func:`sklearn.inspection.permutation_importance` with the ROC-AUC scorer; values
    are mean drops over ``repeats`` permutations.
    """
    from sklearn.inspection import permutation_importance

    res = permutation_importance(estimator, X, y, scoring="roc_auc", n_repeats=repeats, random_state=seed)
    return {n: round(float(m), 5) for n, m in zip(names, res.importances_mean)}


def fit_output_paths(model_path, summary_path=None) -> dict:
    """The files a fit writes, keyed by how the user names them: ``--out`` (the model), ``--summary``
    (default ``<model stem>.fit.json`` beside it) and the per-fold table ``<summary stem>.folds.csv``."""
    model_path = Path(model_path)
    summary_path = Path(summary_path) if summary_path else model_path.with_name(model_path.stem + ".fit.json")
    folds_path = summary_path.with_name(summary_path.name.removesuffix(".json") + ".folds.csv")
    return {"--out": model_path, "--summary": summary_path, "per-fold table": folds_path}


def write_fit_outputs(result: FitResult, model_path, summary_path=None, *, overwrite=False) -> dict:
    """Write the model file, the summary JSON and the per-fold CSV, all or nothing.

    The summary defaults to ``<model stem>.fit.json`` beside the model; the per-fold table is
    ``<summary stem>.folds.csv`` beside the summary. A fit with the autocovariate term also
    writes its layer as ``<model stem>.autocovariate.tif`` (:func:`autocovariate_path`), the
    layer a projection holds at today's neighbourhood.
    """
    from envelope.io.atomic import atomic_outputs, check_writable
    from envelope.io.modelfile import save_model

    model_path, summary_path, folds_path = fit_output_paths(model_path, summary_path).values()
    extra = [] if result.autocovariate is None else [autocovariate_path(model_path)]
    for p in (model_path, summary_path, folds_path, *extra):
        check_writable(p, overwrite)
    with atomic_outputs([summary_path, folds_path, *extra], overwrite=overwrite) as (tmp_summary, tmp_folds, *tmp_extra):
        tmp_summary.write_text(json_text(result.summary))
        result.per_fold.to_csv(tmp_folds, index=False)
        if extra:
            from envelope.io.writing import write_raster

            write_raster(result.autocovariate, tmp_extra[0], overwrite=True)
        # the model is written last inside the block: if it fails, summary and folds vanish too
        save_model(model_path, result.estimator, result.metadata, overwrite=overwrite)
    paths = {"model": str(model_path), "summary": str(summary_path), "folds": str(folds_path)}
    if extra:
        paths["autocovariate"] = str(extra[0])
    return paths


def autocovariate_path(model_path) -> Path:
    """Where a model's autocovariate layer is kept: ``<model stem>.autocovariate.tif`` beside it."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.stem + ".autocovariate.tif")


def fit_options_from_study(study, method: str) -> FitOptions:
    """The fit settings of one method of a study file."""
    r, m = study.records, study.model
    return FitOptions(method=method, background=m.background,
                      variables=list(study.climate.variables) if study.climate.variables else None,
                      blocks_km=m.blocks_km, folds=m.folds, cv=m.cv, threshold_rule=m.threshold_rule, seed=m.seed,
                      bias_method=m.bias_method, features=m.features,
                      autocovariate_km=m.autocovariate_km,
                      max_uncertainty_m=r.max_uncertainty_m, record_years=r.years, thin_km=r.thin_km or None,
                      x_column=r.x_column, y_column=r.y_column, crs=r.crs, species=r.species or None,
                      absences=r.absences, species_option="records.species",
                      background_buffer_km=m.background_buffer_km)


def fit_files(records_path, climate, *, options: FitOptions | None = None, bias=None, region=None,
              progress=None) -> FitResult:
    """:func:`fit_model` on files: the records, the climate grid file(s), an optional bias raster and region.

    The bias raster must be on the climate grid (the message names ``--bias`` and the first
    difference); the region (a vector file, :func:`envelope.io.vectors.region_mask`) limits
    where background is drawn.
    """
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_climate, open_layer

    climate = list(climate) if isinstance(climate, (list, tuple)) else [climate]
    stack = open_climate(climate)
    bias_layer = None
    if bias:
        bias_layer = check_same_grid(stack, open_layer(bias), ref_name="climate", other_name=f"--bias {bias}")
    mask = None
    if region:
        from envelope.io.vectors import region_mask

        mask = region_mask(region, stack)
    return fit_model(records_path, stack, options=options, bias=bias_layer, mask=mask, climate_paths=climate,
                     bias_path=bias, progress=progress)
