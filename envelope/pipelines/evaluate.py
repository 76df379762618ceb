"""The evaluation pipeline: a model file and independent records in, skill on those records (JSON, calibration PNG) out."""

from __future__ import annotations

import numpy as np

from envelope.errors import InputError
from envelope.io.atomic import atomic_output, check_distinct, check_writable
from envelope.provenance import file_sha256, json_text

__all__ = ["evaluate_model"]


def evaluate_model(model_file, records_path, climate, *, summary=None, calibration=None, species=None,
                   absences=True, background=10_000, seed=0, region=None, buffer_km=None, clean_options=None,
                   clamp=True, overwrite=False) -> dict:
    """Skill of a fitted model on independent records, at the model's threshold.

    The records are cleaned against ``climate`` as in fit (one taxon, one record per cell;
    ``clean_options`` holds the other cleaning rules). When they hold surveyed absences
    (``occurrenceStatus`` absent, kept unless ``absences`` is false) the model is scored on
    presences against absences; otherwise background cells are drawn as in fit
    (:func:`envelope.background.draw_background`: ``background`` cells per true area, from
    ``region`` and within ``buffer_km`` of a record when given) and the model is scored on
    presences against background. Suitability is predicted at each cell with the model's
    variables clamped to their training range (unless ``clamp`` is false), as projection does.

    Writes ``summary`` (JSON) with the keys ``auc``, ``tss``, ``kappa``, ``boyce``,
    ``omission``, ``threshold``, ``n_presences`` and ``n_absences`` or ``n_background``
    (plus ``sensitivity``, ``specificity``, ``data``, ``threshold_rule``, ``records``,
    ``calibration`` bins and provenance), and with ``calibration`` a PNG of observed
    against predicted by bins. Returns the summary dict.
    """
    import envelope.evaluation as evaluation
    from envelope.background import draw_background
    from envelope.calibration import calibration_bins, calibration_figure
    from envelope.io.records import read_occurrences
    from envelope.io.rasters import open_climate
    from envelope.pipelines.fit import split_absences
    from envelope.pipelines.project import load_projection_model
    from envelope.projection import training_range
    from envelope.records import clean_occurrences, values_at
    from envelope.grids import match_variables

    outputs = {"--summary": summary, "--calibration": calibration}
    check_distinct(outputs, {"MODEL": model_file, "--records": records_path, "--climate": climate,
                             "--region": region})
    for path in outputs.values():
        if path is not None:
            check_writable(path, overwrite)
    if calibration is not None and not str(calibration).lower().endswith(".png"):
        raise InputError(f"--calibration {calibration}: expected a .png file name")
    estimator, metadata, variables, method, sha = load_projection_model(model_file)
    threshold = float(metadata["threshold"]["value"])
    climate = [climate] if not isinstance(climate, (list, tuple)) else list(climate)
    stack = match_variables(open_climate(climate), variables, source=", ".join(map(str, climate)))

    options = dict(clean_options or {})
    x_column, y_column = options.pop("x_column", None), options.pop("y_column", None)
    table = read_occurrences(records_path, x_column=x_column, y_column=y_column, crs=options.get("crs"))
    records = clean_occurrences(table, stack, species=species, absences=absences, **options)
    presences, absent = split_absences(records)
    notes = []
    mask = None
    if region is not None:
        from envelope.io.vectors import region_mask

        mask = region_mask(region, stack)
    if absent is not None and len(absent):
        negatives, data = absent, "presence-absence"
    else:
        drawn = draw_background(stack, int(background), seed=seed, mask=mask, buffer_km=buffer_km,
                                records=presences)
        negatives, data = drawn.table, "presence-background"
        notes.append("no surveyed absences in the test records: scored against background cells drawn per "
                     "true area, so TSS, kappa and specificity treat background as if it were absence")
    if len(presences.table) == 0:
        raise InputError(f"{records_path}: no presence left after cleaning; expected presences to evaluate on")

    bounds = training_range(metadata) if clamp else None

    def predict(frame):
        X = values_at(stack, frame["row"].to_numpy(), frame["col"].to_numpy())
        if bounds is not None:
            lo = np.asarray([bounds[v][0] for v in variables])
            hi = np.asarray([bounds[v][1] for v in variables])
            X = np.clip(X, lo, hi)
        return np.asarray(estimator.predict_proba(X))[:, 1]

    p_scores, o_scores = predict(presences.table), predict(negatives)
    result = evaluation.independent_scores(p_scores, o_scores, threshold)
    bins = calibration_bins(np.r_[p_scores, o_scores], np.r_[np.ones(p_scores.size), np.zeros(o_scores.size)])
    count_key = "n_absences" if data == "presence-absence" else "n_background"
    out = {**{k: result[k] for k in ("auc", "tss", "kappa", "boyce", "omission", "threshold")},
           "n_presences": int(p_scores.size), count_key: int(o_scores.size),
           "sensitivity": result["sensitivity"], "specificity": result["specificity"],
           "threshold_rule": metadata["threshold"].get("rule"), "data": data, "method": method,
           "records": records.summary(), "calibration": bins, "notes": notes,
           "inputs": {"model": str(model_file), "model_sha256": sha, "records": str(records_path),
                      "records_sha256": file_sha256(records_path), "climate": [str(c) for c in climate]}}
    if calibration is not None:
        import matplotlib.pyplot as plt

        fig = calibration_figure(bins, title=f"Calibration on {len(p_scores)} presences",
                                 against="absences" if data == "presence-absence" else "background")
        try:
            with atomic_output(calibration, overwrite) as tmp:
                fig.savefig(tmp, format="png")
        finally:
            plt.close(fig)
        out["calibration_plot"] = str(calibration)
    if summary is not None:
        with atomic_output(summary, overwrite) as tmp:
            tmp.write_text(json_text(out) + "\n")
        out["summary"] = str(summary)
    return out
