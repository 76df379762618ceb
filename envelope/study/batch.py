"""Multi-species studies: one run folder per species, study-wide work once, species as dask.distributed tasks."""

from __future__ import annotations

import logging
import time
from dataclasses import replace
from pathlib import Path

from envelope.errors import EnvelopeError, InputError
from envelope.study.layout import RunLayout, species_slug

__all__ = ["TASK_RETRIES", "run_species_study", "shared_habitat", "species_names", "species_study"]

log = logging.getLogger(__name__)

#: How often the cluster runs a species' task again after it raised an unexpected error (an
#: error of the study's inputs is not retried). A task whose worker died is rescheduled by
#: dask.distributed itself, up to its ``distributed.scheduler.allowed-failures`` (default 3).
TASK_RETRIES = 2

_RECORD_SUFFIXES = (".csv", ".tsv", ".txt", ".tab", ".zip")


def species_names(study) -> list[str]:
    """The species of a multi-species study, in run order, each checked against the records.

    ``records.species = "all"`` gives every taxon the records name, sorted by name; a list
    keeps its order. InputError (naming ``records.species``) when a listed name matches no
    record, when two names are the same taxon or share a folder name, or when "all" meets
    records without a taxon column.
    """
    from envelope.pipelines.records import records_taxa
    from envelope.records import canonical_name
    from envelope.study.schema import ALL_SPECIES

    r = study.records
    where = f"{study.path}: records.species"
    listed = () if r.species == ALL_SPECIES else tuple(r.species)
    taxa = records_taxa(r.path, x_column=r.x_column, y_column=r.y_column, crs=r.crs, species=listed,
                        option="records.species")
    if listed:
        names = list(listed)
    else:
        if not taxa:
            from envelope.terms import DWC_TAXON_TERMS

            raise InputError(f"{where} = {ALL_SPECIES!r}: {r.path} has no {', '.join(DWC_TAXON_TERMS)} column; "
                             "expected a column naming each record's taxon")
        names = sorted(taxa, key=canonical_name)
    seen, folders = {}, {}
    for name in names:
        key, slug = canonical_name(name), species_slug(name)
        if key in seen:
            raise InputError(f"{where}: {seen[key]!r} and {name!r} are the same taxon; expected each species once")
        if not slug:
            raise InputError(f"{where}: {name!r} has no letter or digit to name its run folder")
        if slug in folders:
            raise InputError(f"{where}: {folders[slug]!r} and {name!r} would share the run folder species/{slug}; "
                             "expected names that differ in their letters or digits")
        seen[key], folders[slug] = name, name
    if study.dispersal is not None and study.dispersal.start is not None \
            and Path(study.dispersal.start).suffix.lower() not in _RECORD_SUFFIXES:
        raise InputError(f"{study.path}: dispersal.start: {study.dispersal.start} is a raster, which would start "
                         "every species from the same cells; a multi-species study starts each species from its "
                         "own records (remove dispersal.start, or give a records table)")
    return names


def species_study(study, name: str, habitat=None):
    """The study of one species: ``records.species`` (and the report's species) set to ``name``;
    ``habitat`` (a :class:`envelope.study.schema.HabitatSection`) replaces the study's when given."""
    out = replace(study, records=replace(study.records, species=name), study=replace(study.study, species=name))
    return replace(out, habitat=habitat) if habitat is not None else out


def shared_habitat(study, layout: RunLayout, cache, say=lambda stage: None):
    """Habitat on the climate grid, made once for every species when it needs work.

    A habitat raster already on the baseline grid (no class table, no alignment) is used as it
    is (returns None). Land cover with a class table, a finer grid or an aligned one is turned
    into habitat on the grid once (:func:`envelope.pipelines.inputs.load_habitat`), written to
    :attr:`RunLayout.shared_habitat` in its own data type (so every species reads the values
    the species-by-species computation would give), and returned as the species' habitat
    section. ``cache`` is the study's :class:`envelope.study.runner.StepCache`.
    """
    if study.habitat is None or not study.outputs.reach or study.dispersal is None:
        return None
    from envelope.errors import GridMismatchError
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_climate, open_layer
    from envelope.study.schema import HabitatSection

    h = study.habitat
    if not h.classes and not h.align:
        try:
            check_same_grid(open_climate(list(study.climate.baseline)), open_layer(h.path))
            return None
        except GridMismatchError:
            pass  # a finer habitat grid: aggregated once below
    target = layout.shared_habitat

    def do_habitat():
        from envelope.io.writing import write_raster
        from envelope.pipelines.inputs import load_habitat

        say("habitat on the climate grid (shared by every species)")
        target.parent.mkdir(parents=True, exist_ok=True)
        hab = load_habitat(h.path, open_climate(list(study.climate.baseline)), classes=h.classes, align=h.align)
        write_raster(hab.rename("habitat"), target, overwrite=True, dtype=hab.dtype,
                     tags={"source": str(h.path), "classes": str(h.classes or ""), "aligned": str(h.align)})

    inputs = [h.path, *[Path(b.path) if hasattr(b, "path") else Path(b) for b in study.climate.baseline]]
    inputs += [h.classes] if h.classes else []
    cache.run("habitat:shared", {"habitat": study.to_dict()["habitat"]}, sorted(set(map(str, inputs))), [target],
              do_habitat)
    return HabitatSection(target, None, False)


def run_species_study(study, layout: RunLayout, *, run_species, step_cache, progress=None, client=None,
                      names=None) -> dict:
    """Run every species of a multi-species study (called by :func:`envelope.study.runner.run_study`,
    which has checked the run folder and every grid once and holds the run folder's lock).

    Each species runs the full chain in its own folder (:meth:`RunLayout.species`), with its own
    step cache, so it resumes as a single-species run does. With ``client`` (a
    ``distributed.Client``) each species is a task on the cluster; a task whose worker dies is
    run again elsewhere and resumes from the species' cache. Then the cross-species summary
    (:attr:`RunLayout.species_summary`) and the study's report are written. ``names`` are the
    species (:func:`species_names`, found when not given). ``run_species(study, layout,
    progress=)`` runs one species' chain in its folder and ``step_cache(run_dir, settings)``
    makes the study's step cache (the runner's :func:`~envelope.study.runner.run_species_folder`
    and :class:`~envelope.study.runner.StepCache`, handed in so this module does not import
    the runner that calls it).
    """
    say = progress or (lambda stage: None)
    names = species_names(study) if names is None else list(names)
    settings = study.to_dict()
    cache = step_cache(layout.run_dir, settings)
    habitat = shared_habitat(study, layout, cache, say)
    jobs = {name: (species_study(study, name, habitat), layout.species(name)) for name in names}
    start = time.perf_counter()
    if client is None:
        outcomes = {}
        for i, (name, (sp_study, sp_layout)) in enumerate(jobs.items(), start=1):
            outcomes[name] = _species_task(run_species, sp_study, sp_layout, name,
                                           progress=lambda stage, i=i, name=name: say(f"{name} ({i}/{len(jobs)}): {stage}"))
    else:
        outcomes = _run_on_cluster(client, run_species, jobs, say)
    wall = time.perf_counter() - start
    _raise_first_error(outcomes)
    cache.manifest["species"] = {name: {"folder": str(jobs[name][1].run_dir.relative_to(layout.run_dir)),
                                        "seconds": round(out["seconds"], 3), "where": out.get("where", "local"),
                                        "ran": len(out["ran"]), "skipped": len(out["skipped"])}
                                 for name, out in outcomes.items()}
    cache.manifest["species_wall_seconds"] = round(wall, 3)
    from envelope.study.summary import write_species_outputs

    results = write_species_outputs(study, layout, cache, names, outcomes, say)
    cache.manifest["last_run"] = {"ran": cache.ran, "skipped": cache.skipped}
    cache.save()
    results.update({"run_dir": str(layout.run_dir), "methods": list(study.model.methods), "ran": cache.ran,
                    "skipped": cache.skipped, "species_wall_seconds": wall})
    return results


def _species_task(run_species, sp_study, sp_layout: RunLayout, name: str, progress=None) -> dict:
    """One species' whole chain; an error of the inputs comes back as a value (never retried)."""
    start = time.perf_counter()
    try:
        result = run_species(sp_study, sp_layout, progress=progress)
    except EnvelopeError as exc:
        return {"species": name, "error": type(exc).__name__, "message": str(exc)}
    result["species"] = name
    result["seconds"] = time.perf_counter() - start
    return result


def _cluster_task(run_species, sp_study, sp_layout: RunLayout, name: str) -> dict:
    """:func:`_species_task` on a worker: the species' own dask work runs on the worker's threads
    (a task that sent its chunks back to the scheduler would wait on the workers it occupies)."""
    import dask

    try:
        from distributed import get_worker

        worker = get_worker()
        threads, where = worker.state.nthreads, str(worker.address)
    except (ImportError, ValueError, AttributeError):
        threads, where = 1, "worker"
    with dask.config.set(scheduler="threads", num_workers=max(1, int(threads))):
        out = _species_task(run_species, sp_study, sp_layout, name)
    out["where"] = where
    return out


def _run_on_cluster(client, run_species, jobs: dict, say) -> dict:
    """Every species as a task on ``client``'s cluster; waits for all (finished species stay cached)."""
    from distributed import as_completed

    futures = {}
    for name, (sp_study, sp_layout) in jobs.items():
        fut = client.submit(_cluster_task, run_species, sp_study, sp_layout, name, retries=TASK_RETRIES, pure=False,
                            key=f"envelope-species-{species_slug(name)}-{time.time_ns()}")
        futures[fut] = name
    say(f"{len(futures)} species sent to the cluster")
    outcomes, done = {}, 0
    for fut in as_completed(list(futures)):
        name = futures[fut]
        try:
            outcomes[name] = fut.result()
        except Exception as exc:  # noqa: BLE001 - a worker lost too often, or a failure after the retries
            outcomes[name] = {"species": name, "error": "ClusterError",
                              "message": f"species {name!r}: its task failed on the cluster after "
                                         f"{TASK_RETRIES} retries ({type(exc).__name__}: {exc}); the species' "
                                         "finished steps are kept, run the study again to resume"}
        done += 1
        say(f"species done: {done}/{len(futures)} ({name})")
    return {name: outcomes[name] for name in jobs}


def _raise_first_error(outcomes: dict) -> None:
    import envelope.errors as errors

    for out in outcomes.values():
        if "error" in out:
            cls = getattr(errors, out["error"], None)
            if not (isinstance(cls, type) and issubclass(cls, EnvelopeError)):
                cls = EnvelopeError
            raise cls(out["message"])
