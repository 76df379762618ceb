"""The hindcast pipeline: records of two periods and their climates in, both-way validation JSON and figures out."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


from envelope.errors import InputError
from envelope.io.atomic import atomic_outputs, check_out_dir, check_writable, remove_empty_folder
from envelope.provenance import file_sha256, json_text

__all__ = ["HindcastOptions", "HINDCAST_FILES", "hindcast_files"]

#: The files `envelope hindcast` writes into its output folder.
HINDCAST_FILES = {"summary": "hindcast.json", "forward_map": "forward_suitability.png",
                  "backward_map": "backward_suitability.png", "shifts": "margin_shifts.png"}

CAUTION = ("A hindcast tests a model against one past change; agreement does not guarantee skill under "
           "future climates, and records of two periods differ in effort and method. Read with local "
           "expertise and statutory guidance.")


@dataclass
class HindcastOptions:
    """Settings of `envelope hindcast`, named as its options (``--n-cells`` -> ``n_cells``)."""

    periods: object = None
    species: str | None = None
    method: str = "pointprocess"
    background: int = 10_000
    folds: int = 5
    cv: str = "block"
    features: object = "cv"
    n_cells: int = 10
    min_records: float = 5
    seed: int = 0


def _fit_period(table, stack, options, paths):
    from envelope.pipelines.fit import FitOptions, fit_model

    fit_opts = FitOptions(method=options.method, background=options.background, folds=options.folds, cv=options.cv,
                          features=options.features, seed=options.seed, permutation_repeats=1)
    return fit_model(table, stack, options=fit_opts, climate_paths=paths)


def _project(result, stack):
    from envelope.projection import project_suitability

    names = result.summary["variables"]
    suit = project_suitability(result.estimator, stack, names, result.summary["training_range"])
    return suit.compute() if hasattr(suit.data, "compute") else suit


def hindcast_files(records_path, climate_1, climate_2, out_dir, *, options: HindcastOptions,
                   overwrite=False) -> dict:
    """Fit on each period, project onto the other, compare with its records; write JSON and figures.

    Parameters
    ----------
    records_path : path
        Darwin Core records of the focal species and the other taxa (the other taxa measure
        effort for the margin comparison), with years.
    climate_1, climate_2 : path or list of paths
        The climate of the first and the second period, on one grid.
    out_dir : path
        Folder for :data:`HINDCAST_FILES` (created if missing).

    Returns
    -------
    dict, the summary written to ``hindcast.json``.
    """
    out_dir = Path(out_dir)
    targets = {key: out_dir / name for key, name in HINDCAST_FILES.items()}
    check_out_dir(out_dir, "--out")
    created = not out_dir.exists()
    out_dir.mkdir(parents=True, exist_ok=True)
    try:
        return _hindcast_into(records_path, climate_1, climate_2, out_dir, targets, options=options,
                              overwrite=overwrite)
    except BaseException:
        if created:  # a hindcast that failed leaves no empty folder behind
            remove_empty_folder(out_dir)
        raise


def _hindcast_into(records_path, climate_1, climate_2, out_dir, targets, *, options, overwrite):
    """The work of :func:`hindcast_files` once its output folder exists."""
    from envelope.figures import figure_to_png_bytes
    from envelope.grids import check_same_grid
    from envelope.hindcast import map_hindcast, period_skill, plot_margin_shifts, predicted_margins
    from envelope.io.rasters import open_climate
    from envelope.io.records import read_occurrences
    from envelope.margins import cells_used, margins_of_cells, parse_periods, period_cells, select_species
    from envelope.records import clean_occurrences, years_of_records
    from envelope.margins import period_index

    for p in targets.values():
        check_writable(p, overwrite)
    periods = parse_periods(options.periods)
    if not options.species:
        raise InputError("--species: no focal species given; expected the scientific name of the taxon")
    paths = [list(c) if isinstance(c, (list, tuple)) else [c] for c in (climate_1, climate_2)]
    stacks = [open_climate(p) for p in paths]
    check_same_grid(stacks[0], stacks[1], ref_name="--climate-1", other_name="--climate-2")
    grid = stacks[0]
    labels = [p.label for p in periods]

    table = read_occurrences(records_path)
    records = clean_occurrences(table, grid, one_per_cell=False, all_taxa=True)
    cells = period_cells(records, grid, species=options.species, periods=periods)
    use, correction = cells_used(cells["counts"], options.min_records)
    observed = margins_of_cells(grid, [occ[use[occ]] for occ in cells["occupied"]], n_cells=options.n_cells,
                                labels=labels)
    focal = select_species(table, options.species)
    k = period_index(years_of_records(table), periods)

    results, suit = [], {}
    for j in (0, 1):
        result = _fit_period(table.loc[focal & (k == j)].reset_index(drop=True), stacks[j], options, paths[j])
        results.append(result)
        for i in (0, 1):
            suit[(j, i)] = _project(result, stacks[i])
    summary = {"species": options.species, "periods": labels, "method": options.method,
               "observed": {**observed, "effort_correction": correction}, "cautions": CAUTION}
    figures = {}
    nx = grid.sizes["x"]
    for j, key in ((0, "forward"), (1, "backward")):
        other = 1 - j
        threshold = float(results[j].summary["threshold"]["value"])
        skill = period_skill(suit[(j, other)].values, cells["occupied"][other], seed=options.seed)
        predicted = predicted_margins(grid, suit[(j, j)].values >= threshold, suit[(j, other)].values >= threshold,
                                      use, n_cells=options.n_cells, labels=[labels[j], labels[other]])
        sign = 1.0 if j == 0 else -1.0  # observed shift from the fit period to the projected period
        summary[key] = {
            "fit_period": labels[j], "projected_period": labels[other], **skill, "threshold": threshold,
            "cv_auc_mean": results[j].summary["cv"].get("auc_mean"),
            "n_presences_fitted": results[j].summary["n_presences"],
            "predicted_poleward_margin_shift_km": predicted["poleward_margin_shift_km"],
            "predicted_equatorward_margin_shift_km": predicted["equatorward_margin_shift_km"],
            "observed_poleward_margin_shift_km": sign * observed["poleward_margin_shift_km"],
            "observed_equatorward_margin_shift_km": sign * observed["equatorward_margin_shift_km"],
            "n_cells_predicted": predicted["n_cells_used"]}
        occ = cells["occupied"][other]
        xy = (grid["x"].values[occ % nx], grid["y"].values[occ // nx])
        figures[f"{key}_map"] = map_hindcast(
            suit[(j, other)], xy, threshold=threshold,
            title=f"Fitted {labels[j]}, projected onto {labels[other]}, with {labels[other]} records")
    figures["shifts"] = plot_margin_shifts(summary)
    inputs = {str(records_path): file_sha256(records_path), **{str(p): file_sha256(p) for ps in paths for p in ps}}
    summary["provenance"] = {"inputs": inputs, "seed": options.seed}
    summary["files"] = {key: str(p) for key, p in targets.items()}
    with atomic_outputs(list(targets.values()), overwrite=overwrite) as tmps:
        tmp = dict(zip(targets, tmps))
        tmp["summary"].write_text(json_text(summary))
        for key, fig in figures.items():
            tmp[key].write_bytes(figure_to_png_bytes(fig))
    return summary
