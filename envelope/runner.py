"""The study runner: every step of a study in order, each skipped when its inputs are unchanged."""

from __future__ import annotations

import hashlib
import json
import logging
import time
from pathlib import Path

from envelope.errors import InputError
from envelope.io.atomic import atomic_output
from envelope.study_run import run_paths

log = logging.getLogger(__name__)

MANIFEST = "manifest.json"


class StepCache:
    """Content-hash cache of finished steps, kept in ``RUN_DIR/manifest.json``.

    A step's key is the SHA-256 of its settings (JSON) and of the bytes of every input file.
    A step whose key matches the manifest and whose outputs all exist is skipped, so an
    interrupted run resumes where it stopped. Outputs are written atomically by the steps
    themselves, so a crash never leaves a half-written file behind.
    """

    def __init__(self, run_dir: Path, settings: dict):
        self.run_dir = Path(run_dir)
        self.path = self.run_dir / MANIFEST
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
        from envelope.fitting import file_sha256

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

    def run(self, name: str, settings: dict, inputs, outputs, fn):
        """Run ``fn()`` unless step ``name`` is up to date; returns True when it ran."""
        outputs = [Path(o) for o in outputs]
        key = self.key(settings, inputs)
        done = self.manifest["steps"].get(name)
        if done and done.get("key") == key and all(o.exists() for o in outputs):
            self.skipped.append(name)
            return False
        start = time.perf_counter()
        fn()
        self.manifest["steps"][name] = {
            "key": key, "seconds": round(time.perf_counter() - start, 3),
            "inputs": {str(i): self._file_hash(i) for i in inputs},
            "outputs": [str(o.relative_to(self.run_dir)) if o.is_relative_to(self.run_dir) else str(o)
                        for o in outputs],
        }
        self._hashes = {k: v for k, v in self._hashes.items() if Path(k) not in outputs}
        self.save()
        self.ran.append(name)
        return True

    def save(self):
        from envelope.fitting import software_versions

        self.manifest["software"] = software_versions()
        with atomic_output(self.path, overwrite=True) as tmp:
            tmp.write_text(json.dumps(self.manifest, indent=2, default=str))


def _scenario_table(study, run_dir: Path) -> Path:
    """The study's scenarios as a CSV (absolute paths) inside the run folder."""
    import pandas as pd

    rows = [{"name": s.name, "pathway": s.pathway, "climate_model": s.climate_model, "horizon": s.horizon,
             "path": str(s.path)} for s in study.scenarios]
    target = run_dir / "scenarios.csv"
    text = pd.DataFrame(rows).to_csv(index=False)
    if not target.exists() or target.read_text() != text:
        with atomic_output(target, overwrite=True) as tmp:
            tmp.write_text(text)
    return target


def run_study(study, run_dir, *, progress=None) -> dict:
    """Run a validated study (:func:`envelope.study.load_study`) into ``run_dir``.

    Steps: fit each method; project today's climate and every scenario (MESS, ensembles);
    range change per scenario; habitat-gated reach per pathway through the ensemble-mean
    suitability at each horizon, plus a counterfactual with the climate held at today's;
    figures; the HTML report. Returns a dict of key results and paths.
    """
    import pandas as pd

    from envelope.fitting import FitOptions, fit_model, write_fit_outputs
    from envelope.io.rasters import open_climate, open_layer

    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    settings = study.to_dict()
    cache = StepCache(run_dir, settings)
    say = progress or (lambda stage: None)
    paths = run_paths(study, run_dir)
    ext = paths["ext"]
    baseline = list(study.climate.baseline)
    method = study.model.methods[0]
    results = {"run_dir": str(run_dir), "methods": list(study.model.methods)}

    # 1. fit every method ------------------------------------------------------------
    fit_inputs = [study.records.path, *baseline] + ([study.model.bias] if study.model.bias else [])
    models = {}
    for m in study.model.methods:
        model_path = run_dir / "models" / f"{m}.envm"
        summary_path = run_dir / "models" / f"{m}.fit.json"
        models[m] = model_path

        def do_fit(m=m, model_path=model_path, summary_path=summary_path):
            say(f"fit {m}")
            model_path.parent.mkdir(exist_ok=True)
            stack = open_climate(baseline)
            bias = open_layer(study.model.bias) if study.model.bias else None
            r = study.records
            opts = FitOptions(method=m, n_background=study.model.background,
                              variables=list(study.climate.variables) if study.climate.variables else None,
                              block_km=study.model.blocks_km, n_folds=study.model.folds, cv_scheme=study.model.cv,
                              threshold_rule=study.model.threshold_rule, seed=study.model.seed,
                              features=study.model.features,
                              max_uncertainty_m=r.max_uncertainty_m, years=r.years, thin_km=r.thin_km or None,
                              x_column=r.x_column, y_column=r.y_column, records_crs=r.crs)
            result = fit_model(r.path, stack, options=opts, bias=bias, climate_paths=baseline,
                               bias_path=study.model.bias or None)
            write_fit_outputs(result, model_path, summary_path, overwrite=True)

        cache.run(f"fit:{m}", {"records": settings["records"], "model": settings["model"], "method": m,
                               "climate": settings["climate"]}, fit_inputs,
                  [model_path, summary_path], do_fit)
    fit_summary = json.loads(paths["fit_summary"].read_text())
    results["fit"] = fit_summary
    threshold = fit_summary["threshold"]["value"]
    model = models[method]

    # 2. projection: today and every scenario -------------------------------------------
    from envelope.projection import project_file
    from envelope.scenarios import project_scenarios

    now_path = paths["now"]

    def do_now():
        say("project today")
        now_path.parent.mkdir(exist_ok=True)
        project_file(model, baseline, now_path, overwrite=True)

    cache.run("project:now", {"clamp": True}, [model, *baseline], [now_path], do_now)
    table = _scenario_table(study, run_dir)
    proj_dir, suit_table = paths["proj_dir"], paths["suit_table"]

    def do_scen():
        say("project scenarios")
        project_scenarios(model, table, proj_dir, mess=study.outputs.mess, agreement=study.scenario_set.agreement,
                          overwrite=True)

    cache.run("project:scenarios", {"mess": study.outputs.mess, "agreement": study.scenario_set.agreement},
              [model, table] + [s.path for s in study.scenarios], [suit_table], do_scen)
    suit_rows = pd.read_csv(suit_table)

    # 3. change per scenario -----------------------------------------------------------
    change_table_path = run_dir / "change" / "change_table.csv"
    if study.outputs.change:
        from envelope.change import range_change_batch

        def do_change():
            say("range change")
            change_table_path.parent.mkdir(exist_ok=True)
            range_change_batch(now_path, suit_table, run_dir / "change", change_table_path, overwrite=True)

        cache.run("change", {"edge_percentile": 95.0}, [now_path, suit_table], [change_table_path], do_change)
        results["change_table"] = str(change_table_path)

    # 4. reach per pathway through the ensemble-mean suitability ------------------------
    reach_rows = []
    if study.outputs.reach and study.habitat is not None and study.dispersal is not None:
        reach_rows = _run_reach(study, run_dir, cache, now_path, proj_dir, suit_rows, threshold, ext, say)
        results["reach"] = reach_rows

    # 5. figures and report ---------------------------------------------------------------
    if study.outputs.report:
        from envelope.study_report import build_report

        report_path = run_dir / "report.html"

        def do_report():
            say("figures and report")
            build_report(study, run_dir, report_path, fit_summary=fit_summary, now_path=now_path,
                         suit_table=suit_table, proj_dir=proj_dir,
                         change_table=change_table_path if study.outputs.change else None,
                         reach_rows=reach_rows)

        report_inputs = [p for p in [now_path, suit_table, change_table_path,
                                     run_dir / "models" / f"{method}.fit.json"] if Path(p).exists()]
        report_inputs += [Path(r["summary"]) for r in reach_rows]
        cache.run("report", {"study": settings["study"], "figures": study.outputs.figures}, report_inputs,
                  [report_path], do_report)
        results["report"] = str(report_path)
    cache.manifest["last_run"] = {"ran": cache.ran, "skipped": cache.skipped}
    cache.save()
    results["ran"], results["skipped"] = cache.ran, cache.skipped
    return results


def _run_reach(study, run_dir, cache, now_path, proj_dir, suit_rows, threshold, ext, say) -> list:
    """Reach per pathway (ensemble-mean maps by horizon) and the held-climate counterfactual."""
    from envelope.io.rasters import open_layer
    from envelope.reach import simulate_reach, write_reach_outputs
    from envelope.study_run import pathway_futures, study_dispersal, study_habitat, study_start

    d = study.dispersal
    start_path = d.start or study.records.path
    reach_dir = run_dir / "reach"
    runs = pathway_futures(suit_rows, proj_dir, ext)
    if d.counterfactual:
        runs["held-climate"] = [(h, now_path) for h, _ in next(iter(runs.values()))]
    # the fragmentation table is part of the reach summary; its settings are in the key so
    # run folders made before it existed get it on the next run
    settings = {"dispersal": study.to_dict()["dispersal"], "habitat": study.to_dict()["habitat"],
                "threshold": threshold, "now_year": study.climate.now_year,
                "fragmentation": {"habitat_threshold": 0.5, "band_deg": 1.0}}
    rows = []
    for name, futures in runs.items():
        out = reach_dir / f"{name}_reach{ext}"
        summary = reach_dir / f"{name}_reach.json"
        front = reach_dir / f"{name}_front.geojson"
        arrival = reach_dir / f"{name}_arrival{ext}"
        inputs = [now_path, study.habitat.path, start_path] + [p for _, p in futures]
        if study.habitat.classes:
            inputs.append(study.habitat.classes)

        def do_reach(name=name, futures=futures, out=out, summary=summary, front=front, arrival=arrival):
            say(f"reach {name}")
            reach_dir.mkdir(exist_ok=True)
            now_layer = open_layer(now_path)
            future_layers = [(h, open_layer(p)) for h, p in futures]
            hab = study_habitat(study, now_layer)
            # records as the start: the same cleaning rules as the fit (a raster start ignores them)
            start, info = study_start(study, now_layer)
            result = simulate_reach(now_layer, future_layers, hab, start, threshold=threshold,
                                    settings=study_dispersal(study), now_year=study.climate.now_year,
                                    step_years=d.step_years, rate=d.rate, persistence_years=d.persistence_years,
                                    replicates=d.replicates, seed=study.model.seed)
            result.summary.update({"run": name, "start": info,
                                   "climate": "held at today's" if name == "held-climate" else
                                   f"pathway {name}, ensemble mean of climate models"})
            write_reach_outputs(result, out, summary, front=front, arrival=arrival, overwrite=True,
                                tags={"run": name})

        cache.run(f"reach:{name}", settings, inputs, [out, summary, front, arrival], do_reach)
        rows.append({"run": name, "classes": str(out), "summary": str(summary), "front": str(front),
                     "arrival": str(arrival)})
    return rows
