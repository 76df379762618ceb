"""Multi-species studies: one run folder per species, the cross-species summary and report page,
and the species as tasks on a dask.distributed cluster (outputs equal to a local run, a killed
worker recovered)."""

import json
import os
import signal
import threading
import time

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.errors import InputError
from envelope.study.demo import demo_dir
from envelope.study.layout import species_slug
from envelope.study.schema import load_study

from tests.study.test_runner import digests, small_study

DEMO = demo_dir()
# Invented names for the test only: the demo's fictional presences relabelled in turn
ALPHA, BETA = "Fictus alpha", "Fictus beta"


def two_taxa_records(folder):
    """The demo presences relabelled alternately as two invented taxa (every field else kept)."""
    table = pd.read_csv(DEMO / "presences.csv", dtype=str, keep_default_na=False)
    table["scientificName"] = [ALPHA if i % 2 == 0 else BETA for i in range(len(table))]
    path = folder / "two_taxa.csv"
    table.to_csv(path, index=False)
    return path


def multi_study(folder, species='"all"', *, name="study.toml"):
    """The small test study over the two-taxa records, with three dispersal distances (so the
    reach intervals are not degenerate)."""
    records = two_taxa_records(folder)
    text = small_study(folder).read_text()
    text = text.replace(f'path = "{DEMO / "presences.csv"}"', f'path = "{records}"\nspecies = {species}')
    text = text.replace("mean_distance_km = 5.0", "mean_distance_km = [3.0, 6.0]")
    path = folder / name
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("species")
    study_path = multi_study(folder)
    run_dir = folder / "run"
    start = time.perf_counter()
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(run_dir)])
    assert result.exit_code == 0, result.output
    return study_path, run_dir, time.perf_counter() - start


# --------------------------------------------------------------------------- study file, names


def test_species_key_takes_one_name_a_list_or_all(tmp_path):
    # Common practice, no source: a string stays one taxon (today's single-species study), a
    # list or "all" makes a multi-species study; wrong forms are refused naming the key
    base = multi_study(tmp_path)
    assert load_study(base).records.species == "all" and load_study(base).multi_species
    for value, expected, multi in ((f'["{ALPHA}", "{BETA}"]', (ALPHA, BETA), True), (f'"{ALPHA}"', ALPHA, False)):
        p = multi_study(tmp_path, value, name="s.toml")
        study = load_study(p)
        assert study.records.species == expected and study.multi_species is multi
    for value, phrase in (("[]", "non-empty array"), ('["all", "Fictus alpha"]', "stands alone"),
                          ("3", "a list of names"), (f'["{ALPHA}", "{ALPHA}"]', "listed twice")):
        p = multi_study(tmp_path, value, name="bad.toml")
        with pytest.raises(InputError, match="records.species") as err:
            load_study(p)
        assert phrase in str(err.value)


def test_species_slug_examples():
    # Common practice, no source: folder names from taxon names, ASCII letters and digits only
    assert species_slug("Fictus alpha") == "fictus-alpha"
    assert species_slug("Aus bus var. cus (L., 1758)") == "aus-bus-var-cus-l-1758"
    assert species_slug("Ãus  ×bus") == "aus-bus"


def test_species_names_are_checked_against_the_records(tmp_path):
    from envelope.study.batch import species_names

    assert species_names(load_study(multi_study(tmp_path))) == [ALPHA, BETA]
    cases = {f'["{ALPHA}", "Fictus gama"]': ["records.species", "'Fictus gama' matches no record", BETA],
             f'["{ALPHA}", "fictus ALPHA"]': ["same taxon"],
             f'["{ALPHA}", "Fictus-alpha"]': ["share the run folder species/fictus-alpha"]}
    for value, phrases in cases.items():
        study = load_study(multi_study(tmp_path, value, name="names.toml"))
        if "Fictus-alpha" in value:  # a distinct taxon name that makes the same folder name
            records = pd.read_csv(study.records.path)
            records.loc[records.index[:3], "scientificName"] = "Fictus-alpha"
            records.to_csv(study.records.path, index=False)
        with pytest.raises(InputError) as err:
            species_names(study)
        for phrase in phrases:
            assert phrase in str(err.value), (value, str(err.value))


def test_an_unknown_species_is_refused_before_any_work(tmp_path):
    study_path = multi_study(tmp_path, '["Fictus gamma"]')
    out = tmp_path / "run"
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(out)])
    assert result.exit_code == 2
    assert "records.species" in result.output and "Fictus gamma" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists()


# --------------------------------------------------------------------------- a local run


def test_each_species_gets_a_full_run_folder(local_run):
    _, run_dir, _ = local_run
    assert sorted(p.name for p in (run_dir / "species").iterdir()) == ["fictus-alpha", "fictus-beta"]
    for slug in ("fictus-alpha", "fictus-beta"):
        folder = run_dir / "species" / slug
        for rel in ("models/pointprocess.envm", "projection/now_suitability.tif", "change/change_table.csv",
                    "reach/high_reach.json", "reach/low_runs.csv", "uncertainty_partition.csv", "report.html",
                    "manifest.json"):
            assert (folder / rel).is_file(), (slug, rel)
        fit = json.loads((folder / "models" / "pointprocess.fit.json").read_text())
        assert fit["records"]["dropped"].get("other_taxon", 0) > 100  # the other taxon's records
    for rel in ("species_summary.csv", "report.html", "manifest.json"):
        assert (run_dir / rel).is_file(), rel
    assert not (run_dir / "models").exists() and not (run_dir / "shared").exists()
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert set(manifest["species"]) == {ALPHA, BETA}
    assert all(s["seconds"] > 0 for s in manifest["species"].values())


def test_a_species_folder_equals_its_own_single_species_run(local_run, tmp_path):
    # Reference: the same species run as today's single-species study (records.species one
    # name): its run folder has exactly that layout, file for file and number for number.
    study_path, run_dir, _ = local_run
    single = tmp_path / "single.toml"
    single.write_text(study_path.read_text().replace('species = "all"', f'species = "{BETA}"')
                      .replace("[study]\n", f'[study]\nspecies = "{BETA}"\n'))
    out = tmp_path / "run"
    result = CliRunner().invoke(cli, ["run", str(single), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert not (out / "species").exists() and not (out / "species_summary.csv").exists()
    expected = digests(run_dir / "species" / "fictus-beta")
    assert len(expected) > 50
    assert digests(out) == expected


def test_species_summary_holds_each_species_numbers(local_run):
    # Reference: each species' own change table and reach runs; the medians and the 5/95 %
    # interval recomputed with NumPy (np.median, np.percentile with linear interpolation, as
    # the reach summary states for its intervals).
    _, run_dir, _ = local_run
    table = pd.read_csv(run_dir / "species_summary.csv")
    assert list(table["species"]) == [ALPHA, BETA] and table.columns[0] == "species"
    for col in ("range_now_km2", "range_future_km2.high", "gained_km2.low", "reached_share.high",
                "reached_share_p05.high", "reached_share_p95.high", "front_advance_km.low", "centroid_shift_km.high",
                "cv_auc"):
        assert col in table.columns, col
    for _, row in table.iterrows():
        folder = run_dir / "species" / species_slug(row["species"])
        change = pd.read_csv(folder / "change" / "change_table.csv")
        last = change[change["horizon"] == 2080].set_index("pathway")
        fit = json.loads((folder / "models" / "pointprocess.fit.json").read_text())
        assert row["cv_auc"] == pytest.approx(fit["cv"]["auc_mean"], rel=1e-12)
        # the table names its sources: the fit's method, and the methods of the reach runs
        assert row["method"] == fit["method"] == "pointprocess" and row["reach_methods"] == "pointprocess"
        assert row["range_now_km2"] == pytest.approx(change["range_km2.now"].iloc[0], rel=1e-12)
        for p in ("high", "low"):
            runs = pd.read_csv(folder / "reach" / f"{p}_runs.csv")
            assert len(runs) == 3  # three dispersal distances
            shares = runs["reached_share_of_gain"].to_numpy(float)
            assert row[f"reached_share.{p}"] == pytest.approx(np.median(shares), rel=1e-9)
            assert row[f"reached_share_p05.{p}"] == pytest.approx(np.percentile(shares, 5), rel=1e-9)
            assert row[f"reached_share_p95.{p}"] == pytest.approx(np.percentile(shares, 95), rel=1e-9)
            assert row[f"reached_share_p05.{p}"] < row[f"reached_share_p95.{p}"]
            assert row[f"front_advance_km.{p}"] == pytest.approx(np.median(runs["front_advance_km"]), rel=1e-9)
            assert row[f"range_future_km2.{p}"] == pytest.approx(last.loc[p, "range_km2.future"], rel=1e-12)
            assert row[f"gained_km2.{p}"] == pytest.approx(last.loc[p, "area_km2.gained_total"], rel=1e-12)
            # Analytic: the climatic gain splits into reached, unreached and without habitat
            # (one climate model: each run's split adds up to the change table's gain)
            split = runs[["gained_reached", "gained_unreached", "gained_no_habitat"]].sum(axis=1)
            np.testing.assert_allclose(split, row[f"gained_km2.{p}"], rtol=1e-6)


def test_report_page_ranks_species_by_gain_out_of_reach(local_run):
    from envelope.study.summary import out_of_reach

    _, run_dir, _ = local_run
    table = pd.read_csv(run_dir / "species_summary.csv")
    ranked = out_of_reach(table, ["high", "low"])
    # Analytic: out of reach = 1 - reached share; the mean over pathways orders the species
    expected = (1 - table[["reached_share.high", "reached_share.low"]]).mean(axis=1)
    assert list(ranked["species"]) == list(table.loc[expected.sort_values(ascending=False).index, "species"])
    html = (run_dir / "report.html").read_text()
    assert "Species ranked by the share of their gain out of reach" in html
    first, second = ranked["species"]
    assert html.index(f"<td>{first}</td>") < html.index(f"<td>{second}</td>")
    assert "local expertise" in html and "statutory guidance" in html


def test_species_ranking_figure_draws_every_species_and_pathway():
    # Common practice, no source: one marker per species and pathway, one interval bar each
    from envelope.figures import plot_species_ranking

    ranked = pd.DataFrame({"species": ["A a", "B b", "C c"], "p": [0.9, 0.5, np.nan], "p.low": [0.8, 0.4, np.nan],
                           "p.high": [0.95, 0.7, np.nan], "q": [0.6, 0.2, 0.1], "q.low": [0.5, 0.1, 0.0],
                           "q.high": [0.7, 0.3, 0.2]})
    fig = plot_species_ranking(ranked, ["p", "q"])
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["A a", "B b", "C c"]
    assert sum(len(line.get_xdata()) for line in ax.get_lines()) == 6
    assert sum(len(c.get_segments()) for c in ax.collections) == 5  # the NaN interval draws none
    with pytest.raises(InputError, match="q.high"):
        plot_species_ranking(ranked.drop(columns="q.high"), ["p", "q"])


def test_second_run_of_a_multi_species_study_does_no_work(local_run):
    study_path, run_dir, _ = local_run
    before = digests(run_dir)
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(run_dir)])
    assert result.exit_code == 0, result.output
    for slug in ("fictus-alpha", "fictus-beta"):
        last = json.loads((run_dir / "species" / slug / "manifest.json").read_text())["last_run"]
        assert last["ran"] == [] and "fit:pointprocess" in last["skipped"]
    assert json.loads((run_dir / "manifest.json").read_text())["last_run"]["ran"] == []
    assert digests(run_dir) == before


def test_habitat_that_needs_work_is_made_once_for_every_species(tmp_path):
    # Reference: envelope.pipelines.inputs.load_habitat on the land cover and its class table,
    # which is what each species' reach would compute; the shared file holds those values.
    from envelope.io.rasters import open_climate, open_layer
    from envelope.pipelines.inputs import load_habitat
    from envelope.study.batch import shared_habitat
    from envelope.study.layout import RunLayout
    from envelope.study.runner import StepCache

    p = multi_study(tmp_path)
    p.write_text(p.read_text().replace(f'path = "{DEMO / "habitat.tif"}"',
                                       f'path = "{DEMO / "landcover.tif"}"\nclasses = "{DEMO / "landcover_classes.csv"}"'))
    study = load_study(p)
    layout = RunLayout.of(study, tmp_path / "run")
    layout.run_dir.mkdir()
    cache = StepCache(layout.run_dir, study.to_dict())
    section = shared_habitat(study, layout, cache)
    assert section.path == layout.shared_habitat and section.classes is None
    want = load_habitat(DEMO / "landcover.tif", open_climate([DEMO / "baseline.tif"]),
                        classes=DEMO / "landcover_classes.csv")
    got = open_layer(layout.shared_habitat)
    assert got.dtype == want.dtype
    np.testing.assert_array_equal(got.values, want.values)
    assert shared_habitat(study, layout, cache) == section and cache.skipped == ["habitat:shared"]
    # a habitat fraction already on the grid is used as it is: nothing to share
    plain = load_study(multi_study(tmp_path, name="plain.toml"))
    assert shared_habitat(plain, RunLayout.of(plain, tmp_path / "run2"), cache) is None


# --------------------------------------------------------------------------- on a cluster


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1, dashboard_address=None,
                                  silence_logs=40) as c:
        yield c


def test_cluster_run_equals_the_local_run(local_run, cluster, tmp_path):
    # Reference: the local run of the same study; each species ran as a task on a
    # LocalCluster(processes=True) worker process, so every output must be the same.
    study_path, run_dir, _ = local_run
    out = tmp_path / "run"
    result = CliRunner().invoke(cli, ["run", str(study_path), "--out", str(out),
                                      "--scheduler", cluster.scheduler_address])
    assert result.exit_code == 0, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    assert {s["where"] for s in manifest["species"].values()} <= set(cluster.scheduler_info["workers"])
    assert digests(out) == digests(run_dir)
    assert (out / "species_summary.csv").read_text() == (run_dir / "species_summary.csv").read_text()


def test_a_worker_killed_mid_run_is_recovered(local_run, cluster, tmp_path):
    # Reference: the local run. A worker process is killed (SIGKILL) while it runs a species,
    # after that species' fit is written; dask.distributed runs the task again on a worker
    # (distributed's allowed-failures), the species resumes from its step cache, and the run
    # ends with outputs identical to the local run's.
    from distributed import Client

    from envelope.study.runner import run_study

    study_path, run_dir, _ = local_run
    out = tmp_path / "run"
    outcome = {}
    with Client(cluster) as client:
        def go():
            try:
                outcome["result"] = run_study(load_study(study_path), out, client=client)
            except BaseException as exc:  # noqa: BLE001 - handed to the test thread
                outcome["error"] = exc

        runner = threading.Thread(target=go)
        runner.start()
        deadline = time.time() + 120
        models = [out / "species" / s / "models" / "pointprocess.envm" for s in ("fictus-alpha", "fictus-beta")]
        while time.time() < deadline and not any(m.exists() for m in models):
            time.sleep(0.05)
        busy = {w: keys for w, keys in client.processing().items() if keys}
        assert busy, "no species task was running when the worker was to be killed"
        victim, keys = next(iter(busy.items()))
        pid = client.run(os.getpid, workers=[victim])[victim]
        os.kill(pid, signal.SIGKILL)
        runner.join(timeout=300)
    assert not runner.is_alive()
    assert "error" not in outcome, outcome.get("error")
    killed = next(name for name in (ALPHA, BETA) if species_slug(name) in str(keys[0]))
    assert outcome["result"]["species"][killed]["where"] != victim  # finished on a live worker
    assert digests(out) == digests(run_dir)


def test_run_help_names_the_scheduler_option():
    result = CliRunner().invoke(cli, ["run", "--help"])
    assert result.exit_code == 0
    assert "--scheduler ADDRESS" in result.output and "species" in result.output
    assert "$ envelope run many-species.toml --out results/all --scheduler" in result.output
