"""A study's run folder: the one definition of where `envelope run` keeps each result, and reading them back."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from envelope.errors import InputError

__all__ = ["LOCK_NAME", "MANIFEST_NAME", "REACH_SET_FILES", "RunLayout", "reach_inputs_from_run", "species_slug",
           "study_dispersal", "study_start_options"]

MANIFEST_NAME = "manifest.json"
#: The lock file a run holds in its folder (see envelope.study.runner.run_folder_lock).
LOCK_NAME = ".envelope-run.lock"
REACH_FILES = ("classes", "summary", "front", "arrival")
#: Extra files of a pathway's reach run set (all climate models, methods, distances and replicates)
REACH_SET_FILES = ("probability", "runs")
#: The folder of a multi-species run that holds one run folder per species
SPECIES_FOLDER = "species"


def species_slug(name: str) -> str:
    """The folder name of a species in a multi-species run: lower case, runs of anything but
    ASCII letters and digits made one ``-`` (``"Aus bus var. cus"`` -> ``"aus-bus-var-cus"``)."""
    import re
    import unicodedata

    ascii_name = unicodedata.normalize("NFKD", str(name)).encode("ascii", "ignore").decode()
    return re.sub(r"[^a-z0-9]+", "-", ascii_name.lower()).strip("-")


@dataclass(frozen=True)
class RunLayout:
    """Every file name of a run folder, for a study whose rasters are written with suffix ``ext``.

    ::

        RUN_DIR/
          manifest.json                      step cache and settings
          scenarios.csv                      the study's scenario table (absolute paths)
          models/<method>.envm               one model file per method
          models/<method>.fit.json           its fit summary (+ .fit.folds.csv)
          projection/now_suitability<ext>    today's suitability (first method)
          projection/scenarios/...           `envelope project --scenarios` outputs (scenario_outputs)
          projection/<method>/...            the same for each further method (now_suitability, scenarios/)
          change/<scenario>.tif|.json        range change per scenario, change/change_table.csv
          reach/<run>_reach<ext>             reach classes per pathway (+ _reach.json, _front.geojson, _arrival<ext>)
          reach/<pathway>_probability.tif    share of runs reaching each cell (+ _runs.csv, one row per run)
          uncertainty_partition.csv          variance shares of reachable gain and range change by source
          report.html
          .envelope-run.lock                 held by the run writing into the folder

    A multi-species study (``records.species`` a list or ``"all"``) keeps one such folder per
    species, and the cross-species results beside them::

        RUN_DIR/
          manifest.json, report.html, .envelope-run.lock   as above: the study's own
          species_summary.csv                one row per species (envelope.study.summary)
          shared/habitat<ext>                habitat on the climate grid, when it needs work (once)
          species/<slug>/...                 each species' run folder, laid out as above (:meth:`species`)
    """

    run_dir: Path
    ext: str = ".tif"
    methods: tuple = ("pointprocess",)

    @classmethod
    def of(cls, study, run_dir) -> "RunLayout":
        return cls(Path(run_dir), "." + study.outputs.format, tuple(study.model.methods))

    # ------------------------------------------------------------------ fit
    @property
    def models_dir(self) -> Path:
        return self.run_dir / "models"

    def model(self, method: str | None = None) -> Path:
        return self.models_dir / f"{method or self.methods[0]}.envm"

    def fit_summary(self, method: str | None = None) -> Path:
        return self.models_dir / f"{method or self.methods[0]}.fit.json"

    def fit_folds(self, method: str | None = None) -> Path:
        return self.models_dir / f"{method or self.methods[0]}.fit.folds.csv"

    # ------------------------------------------------------------------ projection
    @property
    def manifest(self) -> Path:
        return self.run_dir / MANIFEST_NAME

    @property
    def lock(self) -> Path:
        """The lock file a run holds while it writes into the folder (one run per folder)."""
        return self.run_dir / LOCK_NAME

    @property
    def scenario_table(self) -> Path:
        return self.run_dir / "scenarios.csv"

    @property
    def now(self) -> Path:
        return self.run_dir / "projection" / f"now_suitability{self.ext}"

    @property
    def projections_dir(self) -> Path:
        return self.run_dir / "projection" / "scenarios"

    def projections(self, scenarios, *, mess: bool) -> dict:
        """The projection batch's files (:func:`envelope.pipelines.project.scenario_outputs`)."""
        from envelope.pipelines.project import scenario_outputs

        return scenario_outputs(scenarios, self.projections_dir, mess=mess, suffix=self.ext)

    @property
    def suitability_table(self) -> Path:
        from envelope.io.tables import SUITABILITY_TABLE_NAME

        return self.projections_dir / SUITABILITY_TABLE_NAME

    def ensemble(self, pathway: str, horizon: int, statistic: str) -> Path:
        from envelope.pipelines.project import ensemble_file

        return ensemble_file(self.projections_dir, pathway, horizon, statistic, suffix=self.ext)

    def method_now(self, method: str) -> Path:
        """Today's suitability of ``method`` (the first method's is :attr:`now`)."""
        return self.now if method == self.methods[0] else self.run_dir / "projection" / method / f"now_suitability{self.ext}"

    def method_projections_dir(self, method: str) -> Path:
        """The scenario projections of ``method`` (the first method's are :attr:`projections_dir`)."""
        return (self.projections_dir if method == self.methods[0]
                else self.run_dir / "projection" / method / "scenarios")

    def method_suitability_table(self, method: str) -> Path:
        from envelope.io.tables import SUITABILITY_TABLE_NAME

        return self.method_projections_dir(method) / SUITABILITY_TABLE_NAME

    def pathway_futures(self, scenarios) -> dict:
        """Per pathway, its horizons' ensemble-mean suitability maps: {pathway: [(year, path), ...]}."""
        horizons = sorted({int(s.horizon) for s in scenarios})
        return {pathway: [(h, self.ensemble(pathway, h, "mean")) for h in horizons]
                for pathway in sorted({s.pathway for s in scenarios})}

    # ------------------------------------------------------------------ change, reach, report
    @property
    def change_dir(self) -> Path:
        return self.run_dir / "change"

    @property
    def change_table(self) -> Path:
        return self.change_dir / "change_table.csv"

    def change_map(self, scenario: str) -> Path:
        """The class raster ``range_change_batch`` writes for one scenario (always GeoTIFF)."""
        return self.change_dir / f"{scenario}.tif"

    def change_summary(self, scenario: str) -> Path:
        """The JSON summary ``range_change_batch`` writes beside each class raster."""
        return self.change_dir / f"{scenario}.json"

    @property
    def reach_dir(self) -> Path:
        return self.run_dir / "reach"

    def reach(self, run: str) -> dict:
        """The files of one reach run: ``classes``, ``summary``, ``front`` and ``arrival``."""
        d = self.reach_dir
        return {"classes": d / f"{run}_reach{self.ext}", "summary": d / f"{run}_reach.json",
                "front": d / f"{run}_front.geojson", "arrival": d / f"{run}_arrival{self.ext}"}

    def reach_set(self, pathway: str) -> dict:
        """The files of a pathway's run set: :meth:`reach` plus ``probability`` and ``runs``."""
        d = self.reach_dir
        return {**self.reach(pathway), "probability": d / f"{pathway}_probability.tif",
                "runs": d / f"{pathway}_runs.csv"}

    @property
    def uncertainty_partition(self) -> Path:
        return self.run_dir / "uncertainty_partition.csv"

    @property
    def observed_dir(self) -> Path:
        """What was observed between two recording periods (``[margins]``): margins and hindcast."""
        return self.run_dir / "observed"

    @property
    def margins_summary(self) -> Path:
        return self.observed_dir / "margins.json"

    @property
    def hindcast_dir(self) -> Path:
        return self.observed_dir / "hindcast"

    @property
    def hindcast_summary(self) -> Path:
        from envelope.pipelines.hindcast import HINDCAST_FILES

        return self.hindcast_dir / HINDCAST_FILES["summary"]

    @property
    def report(self) -> Path:
        return self.run_dir / "report.html"

    # ------------------------------------------------------------------ multi-species studies
    @property
    def species_dir(self) -> Path:
        return self.run_dir / SPECIES_FOLDER

    def species(self, name: str) -> "RunLayout":
        """The run folder of species ``name`` in a multi-species run (:func:`species_slug`)."""
        return RunLayout(self.species_dir / species_slug(name), self.ext, self.methods)

    @property
    def species_summary(self) -> Path:
        return self.run_dir / "species_summary.csv"

    @property
    def shared_habitat(self) -> Path:
        """Habitat on the climate grid, made once for every species when it needs work."""
        return self.run_dir / "shared" / f"habitat{self.ext}"


def study_dispersal(study, *, stochastic: bool = True):
    """The study's dispersal assumption; a distance range only when replicates are drawn."""
    from envelope.reach import DispersalSettings

    d = study.dispersal
    use_range = stochastic and d.replicates
    return DispersalSettings(kernel=d.kernel, mean_distance_km=d.mean_distance_km, shape=d.shape,
                             mean_distance_range_km=d.mean_distance_range_km if use_range else None)


def study_start_options(study) -> dict:
    """The record-cleaning options of the study, for a records start (a raster start ignores them)."""
    r = study.records
    return {"x_column": r.x_column, "y_column": r.y_column, "max_uncertainty_m": r.max_uncertainty_m,
            "record_years": r.years, "crs": r.crs, "species": r.species or None, "species_option": "records.species"}


def study_reach_inputs(study, now, paths: dict, *, stochastic: bool, now_name=None, now_layer=None):
    """The study's reach model on the climate paths ``paths`` ({name: [(year, map), ...]})."""
    from envelope.pipelines.inputs import build_reach_inputs

    d = study.dispersal
    return build_reach_inputs(now, paths, study.habitat.path, d.start or study.records.path,
                              settings=study_dispersal(study, stochastic=stochastic),
                              classes=study.habitat.classes, align_habitat=study.habitat.align,
                              now_year=study.climate.now_year, step_years=d.step_years, rate=d.rate,
                              persistence_years=d.persistence_years, start_options=study_start_options(study),
                              now_name=now_name, now_layer=now_layer,
                              path_names=lambda name, p: f"{name}: {p}",
                              region=study.region.path if study.region and study.region.clip else None)


def reach_inputs_from_run(study, run_dir):
    """Everything a deterministic reach run of a finished study needs, read from its run folder.

    Returns :class:`envelope.pipelines.inputs.ReachInputs` whose ``futures`` are the
    ensemble means of the climate models per pathway, with the fitted model's threshold.

    Raises
    ------
    InputError
        The study has no habitat or dispersal section, or the run folder lacks a result
        (the message names the file and says to run `envelope run` first).
    """
    if study.habitat is None or study.dispersal is None:
        missing = "[habitat]" if study.habitat is None else "[dispersal]"
        raise InputError(f"--study: the study file has no {missing} section; the reach model needs it")
    layout = RunLayout.of(study, run_dir)
    for path in (layout.now, layout.suitability_table, layout.fit_summary()):
        if not path.is_file():
            raise InputError(f"--run-dir {run_dir}: {path} not found; expected a finished run of this study "
                             f"(envelope run STUDY --out {run_dir})")
    from envelope.io.tables import read_scenarios

    futures = layout.pathway_futures(read_scenarios(layout.suitability_table, what="suitability raster"))
    for horizons in futures.values():
        for _, p in horizons:
            if not p.is_file():
                raise InputError(f"--run-dir {run_dir}: ensemble mean {p} not found; expected a finished run "
                                 f"with ensembles (outputs.ensemble = true)")
    threshold = json.loads(layout.fit_summary().read_text())["threshold"]["value"]
    model = study_reach_inputs(study, layout.now, futures, stochastic=False,
                               now_name=f"--run-dir {run_dir}: {layout.now}")
    if abs(model.threshold - float(threshold)) > 1e-12:
        raise InputError(f"--run-dir {run_dir}: the suitability rasters' threshold {model.threshold:g} differs "
                         f"from the fit summary's {threshold:g}; run the study again")
    model.inputs.update({"now": str(layout.now), "habitat": str(study.habitat.path),
                         "classes": study.habitat.classes and str(study.habitat.classes)})
    return model
