"""The study runner: every step of a study in order, each skipped when its inputs are unchanged."""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import time
from pathlib import Path

from envelope.errors import InputError
from envelope.io.atomic import atomic_output
from envelope.study.layout import MANIFEST_NAME, RunLayout, study_reach_inputs

log = logging.getLogger(__name__)

class StepCache:
    """Content-hash cache of finished steps, kept in ``RUN_DIR/manifest.json``.

    A step's key is the SHA-256 of its settings (JSON) and of the bytes of every input file.
    A step whose key matches the manifest and whose outputs all exist with the SHA-256 the
    manifest recorded for them is skipped, so an interrupted run resumes where it stopped
    and a deleted or altered output is rebuilt. Outputs are written atomically by the steps
    themselves, so a crash never leaves a half-written file behind.
    """

    def __init__(self, run_dir: Path, settings: dict):
        self.run_dir = Path(run_dir)
        self.path = self.run_dir / MANIFEST_NAME
        self.manifest = {"steps": {}}
        if self.path.exists():
            try:
                self.manifest = json.loads(self.path.read_text())
            except ValueError:
                log.warning("%s is damaged; every step will run again", self.path)
        self.manifest["settings"] = settings
        # A run killed hard (SIGKILL, power cut) cannot delete its temporary files; they are
        # hidden (".name.xxxx.part...") and never mistaken for results, and removed here.
        for stale in self.run_dir.rglob(".*.part*"):
            stale.unlink(missing_ok=True)
        self.ran, self.skipped = [], []
        self._hashes = {}

    def _file_hash(self, path) -> str:
        from envelope.provenance import file_sha256

        p = str(path)
        if p not in self._hashes:
            self._hashes[p] = file_sha256(path)
        return self._hashes[p]

    def key(self, settings: dict, inputs) -> str:
        h = hashlib.sha256(json.dumps(settings, sort_keys=True, default=str).encode())
        for p in sorted(str(i) for i in inputs):
            h.update(p.encode())
            h.update(self._file_hash(p).encode())
        return h.hexdigest()

    def _name(self, output: Path) -> str:
        return str(output.relative_to(self.run_dir)) if output.is_relative_to(self.run_dir) else str(output)

    def _intact(self, done: dict, outputs: list[Path]) -> bool:
        """True when every output exists with the checksum recorded when the step ran.

        Manifests written before checksums were recorded (a list of names) count as not
        intact, so such steps run once more and record them.
        """
        recorded = done.get("outputs")
        if not isinstance(recorded, dict) or set(recorded) != {self._name(o) for o in outputs}:
            return False
        for o in outputs:
            if not o.is_file():
                log.info("%s is missing; its step runs again", o)
                return False
            if self._file_hash(o) != recorded[self._name(o)]:
                log.info("%s differs from the file this run wrote; its step runs again", o)
                return False
        return True

    def run(self, name: str, settings: dict, inputs, outputs, fn):
        """Run ``fn()`` unless step ``name`` is up to date; returns True when it ran."""
        outputs = [Path(o) for o in outputs]
        key = self.key(settings, inputs)
        done = self.manifest["steps"].get(name)
        if done and done.get("key") == key and self._intact(done, outputs):
            self.skipped.append(name)
            return False
        start = time.perf_counter()
        fn()
        self._hashes = {k: v for k, v in self._hashes.items() if Path(k) not in outputs}
        missing = [o for o in outputs if not o.is_file()]
        if missing:
            raise InputError(f"step {name}: did not write {missing[0]}; expected every output of the step")
        self.manifest["steps"][name] = {
            "key": key, "seconds": round(time.perf_counter() - start, 3),
            "inputs": {str(i): self._file_hash(i) for i in inputs},
            "outputs": {self._name(o): self._file_hash(o) for o in outputs},
        }
        self.save()
        self.ran.append(name)
        return True

    def save(self):
        from envelope.provenance import software_versions

        self.manifest["software"] = software_versions()
        with atomic_output(self.path, overwrite=True) as tmp:
            tmp.write_text(json.dumps(self.manifest, indent=2, default=str))


def _scenario_table(study, layout: RunLayout) -> Path:
    """The study's scenarios as a CSV (absolute paths) inside the run folder."""
    import pandas as pd

    rows = []
    for s in study.scenarios:
        base = {"name": s.name, "pathway": s.pathway, "climate_model": s.climate_model, "horizon": s.horizon}
        if s.layers:  # one row per variable, as the scenario table gave them
            rows += [{**base, "path": str(lay.path), "variable": lay.name, "band": "" if lay.band is None else lay.band}
                     for lay in s.layers]
        else:
            rows.append({**base, "path": str(s.path)})
    target = layout.scenario_table
    text = pd.DataFrame(rows).to_csv(index=False)
    if not target.exists() or target.read_text() != text:
        with atomic_output(target, overwrite=True) as tmp:
            tmp.write_text(text)
    return target


def run_study(study, run_dir, *, progress=None, client=None) -> dict:
    """Run a validated study (:func:`envelope.study.schema.load_study`) into ``run_dir``.

    Steps: fit each method; project today's climate and every scenario (MESS, ensembles) with
    each method; range change per scenario; habitat-gated reach per pathway on every climate
    model's own suitability (each method, each dispersal distance, each replicate), combined
    into medians, 5-95 % intervals and a probability of reach, plus a counterfactual with the
    climate held at today's; the uncertainty partition; figures; the HTML report. Every file name comes from :class:`RunLayout`. Returns a
    dict of key results and paths.

    Before any work: the run folder must not be (or contain) a folder of the inputs, and
    every grid must fit the baseline (:mod:`envelope.study.preflight`); then the run
    holds the folder's lock, so a second run into the same folder is refused.

    A multi-species study (``records.species`` a list or ``"all"``) runs every species in its
    own folder (:func:`envelope.study.batch.run_species_study`), as tasks on the
    dask.distributed ``client`` when one is given; a single-species study ignores ``client``
    (its dask work goes to the default client, when one is set).
    """
    from envelope.study.preflight import check_run_folder, check_study_grids

    layout = RunLayout.of(study, run_dir)
    run_dir = layout.run_dir
    check_run_folder(study, run_dir)
    check_study_grids(study)
    names = None
    if study.multi_species:
        from envelope.study.batch import species_names

        names = species_names(study)  # every listed name checked against the records, before any work
    if run_dir.exists() and not run_dir.is_dir():
        raise InputError(f"--out {run_dir}: exists and is not a folder")
    run_dir.mkdir(parents=True, exist_ok=True)
    with run_folder_lock(layout):
        if study.multi_species:
            from envelope.study.batch import run_species_study

            return run_species_study(study, layout, run_species=run_species_folder, step_cache=StepCache,
                                     progress=progress, client=client, names=names)
        return _run_locked(study, layout, progress)


def run_species_folder(study, layout: RunLayout, *, progress=None) -> dict:
    """Run one species of a multi-species study into its own folder ``layout.run_dir``.

    ``study`` is the species' own study (one taxon); the study-wide checks have been made once
    by :func:`run_study`. The species folder has its own lock and step cache, so a species
    interrupted anywhere (a worker killed, say) resumes where it stopped.
    """
    layout.run_dir.mkdir(parents=True, exist_ok=True)
    with run_folder_lock(layout):
        return _run_locked(study, layout, progress)


def remove_failed_run_folder(run_dir) -> bool:
    """After a run that created ``run_dir`` failed before its first result: remove its lock file
    and the folder, if nothing else is in it (a full disk, say, must not leave an empty folder)."""
    from envelope.io.atomic import remove_empty_folder
    from envelope.study.layout import LOCK_NAME

    lock = Path(run_dir) / LOCK_NAME
    others = [p for p in Path(run_dir).rglob("*") if p.is_file() and p != lock] if Path(run_dir).is_dir() else []
    if others:
        return False
    with contextlib.suppress(OSError):
        lock.unlink()
    return remove_empty_folder(run_dir)


@contextlib.contextmanager
def run_folder_lock(layout: RunLayout):
    """Hold the run folder's lock for the whole run; InputError when another run holds it.

    The lock is an OS file lock (``filelock``), released by the system when the process
    ends, however it ends, so a run killed hard never leaves the folder locked.
    """
    from filelock import FileLock, Timeout

    lock = FileLock(layout.lock, timeout=0)
    try:
        lock.acquire()
    except Timeout:
        raise InputError(f"--out {layout.run_dir}: another `envelope run` is writing into this run folder "
                         f"(it holds {layout.lock.name}); wait for it to finish, or give another --out") from None
    try:
        yield
    finally:
        lock.release()


def _run_locked(study, layout: RunLayout, progress) -> dict:
    from envelope.io.rasters import open_climate, open_layer
    from envelope.io.tables import read_scenarios
    from envelope.pipelines.fit import fit_model, fit_options_from_study, write_fit_outputs

    run_dir = layout.run_dir
    settings = study.to_dict()
    cache = StepCache(run_dir, settings)
    say = progress or (lambda stage: None)
    baseline = list(study.climate.baseline)
    results = {"run_dir": str(run_dir), "methods": list(study.model.methods)}
    region = study.region.path if study.region else None
    clip = region if study.region and study.region.clip else None
    baseline_files = [Path(b) for b in baseline]

    # 1. fit every method ------------------------------------------------------------
    fit_inputs = [study.records.path, *baseline_files] + ([study.model.bias] if study.model.bias else []) \
        + ([region] if region else [])
    for m in study.model.methods:
        model_path, summary_path = layout.model(m), layout.fit_summary(m)

        def do_fit(m=m, model_path=model_path, summary_path=summary_path):
            say(f"fit {m}")
            model_path.parent.mkdir(exist_ok=True)
            stack = open_climate(baseline)
            bias = open_layer(study.model.bias) if study.model.bias else None
            mask = None
            if region:
                from envelope.io.vectors import region_mask

                mask = region_mask(region, stack, name="region.path")
            result = fit_model(study.records.path, stack, options=fit_options_from_study(study, m), bias=bias,
                               mask=mask, climate_paths=baseline, bias_path=study.model.bias or None)
            write_fit_outputs(result, model_path, summary_path, overwrite=True)

        cache.run(f"fit:{m}", {"records": settings["records"], "model": settings["model"], "method": m,
                               "climate": settings["climate"], "region": settings.get("region")}, fit_inputs,
                  [model_path, summary_path, layout.fit_folds(m)], do_fit)
    fit_summary = json.loads(layout.fit_summary().read_text())
    results["fit"] = fit_summary
    threshold = fit_summary["threshold"]["value"]
    model = layout.model()

    # 2. projection: today and every scenario -------------------------------------------
    from envelope.pipelines.project import project_file, project_scenarios

    now_path = layout.now

    def do_now():
        say("project today")
        now_path.parent.mkdir(exist_ok=True)
        project_file(model, baseline, now_path, overwrite=True, region=clip)

    cache.run("project:now", {"clamp": True, **({"region": str(clip)} if clip else {})},
              [model, *baseline_files] + ([clip] if clip else []), [now_path], do_now)
    table = _scenario_table(study, layout)
    suit_table = layout.suitability_table

    def do_scen():
        say("project scenarios")
        project_scenarios(model, table, layout.projections_dir, mess=study.outputs.mess,
                          agreement=study.scenario_set.agreement, overwrite=True, suffix=layout.ext, region=clip)

    batch = layout.projections(study.scenarios, mess=study.outputs.mess)
    batch_files = ([suit_table] + list(batch["suitability"].values()) + list(batch["mess"].values())
                   + list(batch["ensemble"].values()))
    cache.run("project:scenarios", {"mess": study.outputs.mess, "agreement": study.scenario_set.agreement,
                                    "format": layout.ext, **({"region": str(clip)} if clip else {})},
              [model, table] + [Path(p) for s in study.scenarios for p in s.climate] + ([clip] if clip else []),
              batch_files, do_scen)
    suitability = read_scenarios(suit_table, what="suitability raster")
    _project_more_methods(study, layout, cache, baseline, table, say)

    # 3. change per scenario -----------------------------------------------------------
    if study.outputs.change:
        from envelope.pipelines.change import range_change_batch

        def do_change():
            say("range change")
            layout.change_dir.mkdir(exist_ok=True)
            range_change_batch(now_path, suit_table, layout.change_dir, layout.change_table, overwrite=True)

        change_files = [layout.change_table] + [f for sc in suitability
                                                 for f in (layout.change_map(sc.name), layout.change_summary(sc.name))]
        cache.run("change", {"edge_percentile": 95.0}, [now_path, suit_table], change_files, do_change)
        results["change_table"] = str(layout.change_table)

    # 4. reach per pathway through the ensemble-mean suitability ------------------------
    reach_rows = []
    if study.outputs.reach and study.habitat is not None and study.dispersal is not None:
        reach_rows = _run_reach_sets(study, layout, cache, threshold, say)
        results["reach"] = reach_rows

    # 4b. what was observed between two recording periods ([margins]) -------------------
    if study.margins is not None:
        _run_observed(study, layout, cache, settings, say)

    # 5. figures and report ---------------------------------------------------------------
    if study.outputs.report:
        from envelope.study.report import build_report

        def do_report():
            say("figures and report")
            build_report(study, layout, fit_summary=fit_summary, suitability=suitability,
                         change=study.outputs.change, reach_rows=reach_rows)

        report_inputs = [p for p in [now_path, suit_table, layout.change_table, layout.fit_summary()]
                         if Path(p).exists()]
        report_inputs += [Path(r["summary"]) for r in reach_rows]
        report_inputs += [p for p in [layout.uncertainty_partition, layout.margins_summary,
                                      layout.hindcast_summary] if p.exists()]
        cache.run("report", {"study": settings["study"], "figures": study.outputs.figures}, report_inputs,
                  [layout.report], do_report)
        results["report"] = str(layout.report)
    cache.manifest["last_run"] = {"ran": cache.ran, "skipped": cache.skipped}
    cache.save()
    results["ran"], results["skipped"] = cache.ran, cache.skipped
    return results


def _project_more_methods(study, layout: RunLayout, cache, baseline, table, say):
    """Today's and the scenarios' suitability for every method after the first (each in its own folder)."""
    from envelope.pipelines.project import project_file, project_scenarios

    for m in study.model.methods[1:]:
        model, now_path = layout.model(m), layout.method_now(m)

        def do_now(model=model, now_path=now_path, m=m):
            say(f"project today ({m})")
            now_path.parent.mkdir(parents=True, exist_ok=True)
            project_file(model, baseline, now_path, overwrite=True)

        cache.run(f"project:now:{m}", {"clamp": True}, [model, *baseline], [now_path], do_now)

        def do_scen(model=model, m=m):
            say(f"project scenarios ({m})")
            project_scenarios(model, table, layout.method_projections_dir(m), mess=study.outputs.mess,
                              agreement=study.scenario_set.agreement, overwrite=True, suffix=layout.ext)

        cache.run(f"project:scenarios:{m}", {"mess": study.outputs.mess, "agreement": study.scenario_set.agreement,
                                             "format": layout.ext},
                  [model, table] + [s.path for s in study.scenarios], [layout.method_suitability_table(m)], do_scen)


def _reach_paths(study, layout: RunLayout) -> dict:
    """Climate paths of every reach run: {run: {method: {climate model: [(year, suitability map), ...]}}}.

    One run per pathway (its climate models' own maps, not their mean) and, when the study
    asks for it, the counterfactual with the climate held at today's.
    """
    from envelope.io.tables import read_scenarios

    methods = list(study.model.methods)
    rows = {m: read_scenarios(layout.method_suitability_table(m), what="suitability raster") for m in methods}
    first = rows[methods[0]]
    runs = {}
    for pathway in sorted({s.pathway for s in first}):
        runs[pathway] = {m: {cm: sorted((int(s.horizon), s.path) for s in rows[m]
                                        if s.pathway == pathway and s.climate_model == cm)
                             for cm in sorted({s.climate_model for s in rows[m] if s.pathway == pathway})}
                         for m in methods}
    if study.dispersal.counterfactual:
        horizons = sorted({int(s.horizon) for s in first})
        runs["held-climate"] = {m: {"held at today's": [(h, layout.method_now(m)) for h in horizons]}
                                for m in methods}
    return runs


def _run_reach_sets(study, layout: RunLayout, cache, threshold, say) -> list:
    """Reach per pathway over every method × climate model × dispersal distance (× replicate), combined.

    Each pathway's run set writes the reach files of :meth:`RunLayout.reach_set` (summary
    keys as medians over runs, with 5/50/95 % intervals; the probability of reach; one row
    per run); the uncertainty partition over all pathways' runs goes to
    :attr:`RunLayout.uncertainty_partition`.
    """
    from envelope.pipelines.reach import (PARTITION_FACTORS, PARTITION_QUANTITIES, run_reach_set,
                                          write_reach_outputs, write_uncertainty_partition)
    from envelope.reach_runs import distance_levels

    d = study.dispersal
    start_path = d.start or study.records.path
    distances = distance_levels(*d.mean_distance_range_km) if d.mean_distance_range_km else [d.mean_distance_km]
    methods = list(study.model.methods)
    settings = {"dispersal": study.to_dict()["dispersal"], "habitat": study.to_dict()["habitat"],
                "threshold": threshold, "now_year": study.climate.now_year, "methods": methods,
                "distances_km": distances, "design": "every climate path, combined",
                "fragmentation": {"habitat_threshold": 0.5, "band_deg": 1.0}}
    if study.region and study.region.clip:
        settings["region"] = str(study.region.path)
    rows = []
    for name, by_method in _reach_paths(study, layout).items():
        files = layout.reach_set(name)
        inputs = [layout.method_now(m) for m in methods] + [study.habitat.path, start_path]
        inputs += [p for paths in by_method.values() for horizons in paths.values() for _, p in horizons]
        inputs += [study.region.path] if study.region and study.region.clip else []
        if study.habitat.classes:
            inputs.append(study.habitat.classes)

        def do_reach(name=name, by_method=by_method, files=files):
            say(f"reach {name}")
            layout.reach_dir.mkdir(exist_ok=True)
            # records as the start: the same cleaning rules as the fit (a raster start ignores them)
            model = {m: study_reach_inputs(study, layout.method_now(m), by_method[m], stochastic=False)
                     for m in methods}
            result = run_reach_set(model, pathway=name, distances_km=distances, replicates=d.replicates,
                                   seed=study.model.seed)
            result.summary.update({"run": name,
                                   "climate": "held at today's" if name == "held-climate" else
                                   f"pathway {name}, each climate model's own suitability"})
            write_reach_outputs(result, files["classes"], files["summary"], front=files["front"],
                                arrival=files["arrival"], probability=files["probability"], runs=files["runs"],
                                overwrite=True, tags={"run": name})

        cache.run(f"reach:{name}", settings, sorted(set(map(str, inputs))), list(files.values()), do_reach)
        rows.append({"run": name, **{k: str(v) for k, v in files.items()}})

    pathway_runs = [r["runs"] for r in rows if r["run"] != "held-climate"]
    if pathway_runs:
        def do_partition():
            import pandas as pd

            say("uncertainty partition")
            write_uncertainty_partition([pd.read_csv(p) for p in pathway_runs], layout.uncertainty_partition,
                                        overwrite=True)

        cache.run("uncertainty", {"factors": list(PARTITION_FACTORS), "quantities": PARTITION_QUANTITIES},
                  pathway_runs, [layout.uncertainty_partition], do_partition)
    return rows


def _run_observed(study, layout: RunLayout, cache, settings, say) -> None:
    """Observed margin shifts between the ``[margins]`` periods and, with ``hindcast_climate``, the hindcast."""
    from envelope.pipelines.hindcast import HINDCAST_FILES, HindcastOptions, hindcast_files
    from envelope.pipelines.margins import MarginOptions, margins_files

    m = study.margins
    species = m.species or (None if study.multi_species else study.records.species)
    if not species:
        raise InputError(f"{study.path}: margins.species: no focal species; give margins.species or "
                         "records.species (the other taxa of the records measure recording effort)")
    baseline = list(study.climate.baseline)
    inputs = [study.records.path, *map(Path, baseline)] + [p for p in (m.effort, m.elevation) if p]
    key = {"margins": settings.get("margins"), "records": settings["records"]}

    def do_margins():
        say("observed margin shifts")
        layout.observed_dir.mkdir(exist_ok=True)
        margins_files(study.records.path, baseline, layout.margins_summary,
                      options=MarginOptions(periods=m.periods, species=species, n_cells=m.n_cells,
                                            min_records=m.min_records, bootstrap=m.bootstrap,
                                            effort_correction=m.effort_correction, seed=study.model.seed),
                      effort=m.effort, elevation=m.elevation, overwrite=True)

    cache.run("margins", key, inputs, [layout.margins_summary], do_margins)
    if m.hindcast_climate:
        first, second = m.hindcast_climate

        def do_hindcast():
            say("hindcast")
            layout.observed_dir.mkdir(exist_ok=True)
            hindcast_files(study.records.path, first, second, layout.hindcast_dir,
                           options=HindcastOptions(periods=m.periods, species=species,
                                                   method=study.model.methods[0], background=study.model.background,
                                                   folds=study.model.folds, n_cells=m.n_cells,
                                                   min_records=m.min_records, seed=study.model.seed),
                           overwrite=True)

        cache.run("hindcast", {**key, "model": settings["model"]}, [study.records.path, first, second],
                  [layout.hindcast_dir / name for name in HINDCAST_FILES.values()], do_hindcast)
