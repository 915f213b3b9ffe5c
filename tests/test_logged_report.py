"""The report and the citation card read only what the run logged: a results folder copied elsewhere, without
its sweep file, data cache or original folder, reports and cites the same, and the winner's 2-D map is the one
the run computed from the winner's vectors.
"""

from __future__ import annotations

import base64
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from harness.cli import main
from harness.engine.runner import run_sweep_file

from conftest import configuration_runs, finished_runs, write_sweep

CLEAR, FAINT = "clear_requests", "faint_requests"


def _sweep(name: str, model: Path) -> str:
    return f"""
name: {name}
question: Does the map survive a move?
datasets:
  - {{source: synthetic, name: {CLEAR}, n_texts: 90, n_topics: 3, topic_share: 0.6, seed: 1}}
  - {{source: synthetic, name: {FAINT}, n_texts: 70, n_topics: 3, topic_share: 0.1, seed: 2}}
models: [{model}]
grid:
  pooling: [mean, max]
  normalize: [l2]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 50, permutations: 19}}
"""


def _reference_map(vectors: np.ndarray) -> np.ndarray:
    """The report's map settings, applied with scikit-learn and umap-learn directly (not through harness): the exact
    cosine neighbours (scikit-learn's brute-force NearestNeighbors, one BLAS thread, each point its own first
    neighbour) handed to umap-learn as precomputed_knn; 2 components, min(15, n - 1) neighbours, min_dist 0,
    random_state 0."""
    import warnings

    import umap
    from sklearn.neighbors import NearestNeighbors
    from threadpoolctl import threadpool_limits

    vectors = np.asarray(vectors, dtype=np.float32)
    k = min(15, len(vectors) - 1)
    with threadpool_limits(limits=1):
        distances, indices = NearestNeighbors(n_neighbors=k, metric="cosine", algorithm="brute").fit(vectors).kneighbors(vectors)
    reducer = umap.UMAP(n_components=2, n_neighbors=k, min_dist=0.0, metric="cosine", random_state=0,
                        precomputed_knn=(indices.astype(np.int64), distances.astype(np.float32), None))
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*n_jobs value.*overridden.*")  # a seed makes it single-threaded
        warnings.filterwarnings("ignore", message=".*knn_search_index.*")
        return reducer.fit_transform(vectors)


@pytest.fixture(scope="module")
def moved(tmp_path_factory, tiny_model_dir):
    """A two-dataset sweep run in one folder; what the run cached is read back before anything is deleted; then
    mlflow.db and artifacts/ are copied to another folder and the sweep file and the whole original results
    folder (the cache with it) are deleted."""
    from harness.datasets import dataset_name
    from harness.engine.cache import StageCache
    from harness.engine.runner import loaded_corpora, prepared_sweep
    from harness.engine.stages import StageExecutor

    folder = tmp_path_factory.mktemp("original")
    sweep = write_sweep(folder, _sweep("moving", tiny_model_dir))
    results = folder / "results"
    result = run_sweep_file(sweep, results)
    assert not result.failed

    prepared = prepared_sweep(sweep)
    corpora = loaded_corpora(prepared)
    expected = {}
    for dataset, ranking in result.rankings.items():
        configuration = ranking.winner.configuration
        trial = next(t for t in prepared.trials if t.key == configuration.trials[0].key)
        executor = StageExecutor(corpora, [trial], StageCache(results / "cache"))
        vectors = executor.transformed(trial)
        assert executor.work["transform_cache_hits"] == 1 and "forward_passes" not in executor.work  # the run's own
        expected[dataset] = {
            "xy": _reference_map(vectors),
            "clusters": configuration.seeds[0].clusters,
            "ids": list(corpora[dataset].ids),
            "token_counts": executor.token_counts(trial),
            "seed_run": configuration.seeds[0].run_id,
            "trial": trial,
            "spec": next(s for s in prepared.sweep.datasets if dataset_name(s) == dataset),
            "configuration": configuration,
        }

    elsewhere = tmp_path_factory.mktemp("elsewhere") / "results"
    elsewhere.mkdir()
    shutil.copy2(results / "mlflow.db", elsewhere / "mlflow.db")
    shutil.copytree(results / "artifacts", elsewhere / "artifacts")
    shutil.rmtree(results)
    sweep.unlink()
    return elsewhere, results, result, expected


def _images(page: str) -> dict[str, bytes]:
    """The PNGs embedded in a report page, by element id."""
    found = re.findall(r"<img id='([^']+)' class='[^']*' alt='[^']*' src='data:image/png;base64,([^']+)'>", page)
    return {element: base64.b64decode(data) for element, data in found}


def test_the_report_of_a_moved_store_shows_the_map_the_run_computed(moved, capsys):
    elsewhere, original, result, expected = moved
    assert main(["report", "moving", "--results-dir", str(elsewhere)]) == 0
    assert not original.exists()  # nothing was read from, or written to, the folder the run used
    page = (elsewhere / "reports" / "moving" / "report.html").read_text()
    images = _images(page)
    assert {f"cluster-map-d{i}-{dataset}" for i, dataset in enumerate((CLEAR, FAINT))} <= set(images)

    from harness.review.build import logged_map
    from harness.review.page import cluster_map_png
    from harness.track.readback import sweep_record


    record = sweep_record(f"sqlite:///{elsewhere / 'mlflow.db'}", "moving")
    for index, dataset in enumerate((CLEAR, FAINT)):
        wanted = expected[dataset]
        winner = next(c for c in record.configurations if c.run_id == wanted["configuration"].run_id)
        found, why = logged_map(record, winner)
        assert found is not None, why
        # The coordinates: umap-learn, given scikit-learn's exact neighbours, on the vectors the run cached for the
        # winner's first seed.
        np.testing.assert_allclose(found.xy, wanted["xy"], rtol=0, atol=1e-6)
        assert np.array_equal(found.clusters, wanted["clusters"])
        assert found.points["id"].tolist() == [str(i) for i in wanted["ids"]]
        assert np.array_equal(found.points["token_count"].to_numpy(), wanted["token_counts"])
        # The legend: the distinctive terms the same seed run logged in its clusters.parquet.
        described = record.artifact_table(wanted["seed_run"], "clusters.parquet")
        assert found.legend == {int(r.cluster): r.top_terms for r in described.itertuples()}
        assert found.info["seed_run_id"] == wanted["seed_run"] and found.info["dataset"] == dataset
        # The page shows exactly that map: the same figure drawn from the independent coordinates.
        element = f"cluster-map-d{index}-{dataset}"
        assert images[element] == cluster_map_png(wanted["xy"], wanted["clusters"], found.legend)
    # The report was logged next to the sweep run's other artifacts, in the folder the store now lives in.
    logged = list((elsewhere / "artifacts").glob(f"moving/{result.parent_run_id}/artifacts/report/report.html"))
    assert len(logged) == 1


def test_cite_of_a_moved_store_writes_the_logged_settings_and_they_reproduce_the_winner(moved, capsys):
    elsewhere, original, result, expected = moved
    assert main(["cite", "moving", "--results-dir", str(elsewhere)]) == 0
    assert not original.exists()
    out = capsys.readouterr().out
    reports = elsewhere / "reports" / "moving"
    commands = {}
    for dataset in (CLEAR, FAINT):
        wanted = expected[dataset]
        trial, spec = wanted["trial"], wanted["spec"]
        card = yaml.safe_load((reports / f"winner-{dataset}.yaml").read_text())
        # Every setting as the sweep file (read before it was deleted) planned the winner's trials.
        assert card["datasets"] == [{k: v for k, v in spec.as_params().items() if v is not None}]
        assert [m["name"] for m in card["models"]] == [trial.model.name]
        assert card["grid"] == {"pooling": [trial.pooling], "layers": [trial.layers],
                                "transform": [[s.as_params() for s in trial.transform]], "normalize": [trial.normalize],
                                "reduce": [trial.reducer.as_params()], "cluster": [trial.clusterer.as_params()],
                                "seeds": [0, 1]}
        assert card["rank_by"] == "ari" and card["evidence"]["resamples"] == 50
        assert (reports / f"winner-{dataset}.md").is_file()
        commands[dataset] = out.split(f"dataset {dataset}\n")[1].split("reproduce: ")[1].splitlines()[0].split()
    assert list((elsewhere / "artifacts").glob(f"moving/{result.parent_run_id}/artifacts/citation/winner-*.yaml"))

    # The card's own command, run from the moved folder, gives the winner's scores again.
    assert main(commands[CLEAR][1:] + ["--no-progress"]) == 0
    winner = expected[CLEAR]["configuration"]
    (again,) = configuration_runs(f"sqlite:///{elsewhere / 'mlflow.db'}", f"moving-winner-{CLEAR}")
    for name in ("ari", "ami", "length_confound_index"):
        assert again.data.metrics[name] == pytest.approx(winner.metrics[name], abs=1e-9), name


# -- a map that is not there is said to be missing, and why; it is never recomputed ---------------------

@pytest.fixture(scope="module")
def single(tmp_path_factory, tiny_model_dir):
    folder = tmp_path_factory.mktemp("single")
    sweep = write_sweep(folder, f"""
name: single
datasets:
  - {{source: synthetic, n_texts: 60, n_topics: 3, topic_share: 0.5, seed: 3}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 4}}]
  cluster: [{{method: kmeans, k: labels}}]
  seeds: [0]
evidence: {{resamples: 20, permutations: 19}}
""")
    return folder, sweep


def _map_paragraph(page: str) -> str:
    start = page.index("class='cluster-map'")
    return page[start:page.index("</p>", start)]


def test_a_run_without_a_logged_map_is_reported_without_one_and_says_why(single, capsys):
    """A run logged before the map was computed at run end (the map's tag and artifacts taken away here): the
    sweep file, the data and the cache are all still there, and still no map is recomputed."""
    from mlflow.tracking import MlflowClient

    folder, sweep = single
    results = folder / "older"
    result = run_sweep_file(sweep, results)
    (configuration,) = result.configurations
    client = MlflowClient(tracking_uri=result.tracking_uri)
    client.delete_tag(configuration.run_id, "harness.map")
    artifacts = Path(client.get_run(configuration.run_id).info.artifact_uri.removeprefix("file://"))
    for name in ("winner_map.parquet", "winner_map.json", "configuration.json"):
        (artifacts / name).unlink()

    assert main(["report", "single", "--results-dir", str(results)]) == 0
    page = (results / "reports" / "single" / "report.html").read_text()
    assert "cluster-map" not in _images(page)
    assert "the run logged no map for its winner" in _map_paragraph(page) and "does not recompute" in _map_paragraph(page)
    assert "the run logged no map for its winner" in (results / "reports" / "single" / "report.md").read_text()

    # Its citation needs the settings the run logged: refused in one line, nothing written.
    capsys.readouterr()
    assert main(["cite", "single", "--results-dir", str(results)]) == 2
    err = capsys.readouterr().err
    assert f"configuration run {configuration.run_id} has no configuration.json" in err and len(err.strip().splitlines()) == 1
    assert not (results / "reports" / "single" / "winner.yaml").exists()


def test_a_run_started_with_no_map_says_so_in_the_report(single, capsys):
    folder, sweep = single
    results = folder / "unmapped"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress", "--no-map"]) == 0
    client, _, _ = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "single")
    (configuration,) = configuration_runs(f"sqlite:///{results / 'mlflow.db'}", "single")
    assert configuration.data.tags["harness.map"] == "left out: the run was started with --no-map"
    assert "winner_map.parquet" not in {a.path for a in client.list_artifacts(configuration.info.run_id)}
    assert main(["report", "single", "--results-dir", str(results)]) == 0
    page = (results / "reports" / "single" / "report.html").read_text()
    assert "cluster-map" not in _images(page)
    assert "left out: the run was started with --no-map" in _map_paragraph(page)


# -- where a moved results folder's artifacts are looked for ---------------------------------------------

def test_artifacts_are_looked_for_relative_to_the_store_only_when_the_results_folder_moved(tmp_path):
    from harness.track.readback import relocated_artifact_uri, store_folder

    run = "artifacts/sweep/0123abcd/artifacts"
    old, new = Path("/data/team/results"), Path("/mnt/copy/results")
    cases = [
        # (artifact URI as recorded, recorded results folder, store folder) -> where the artifacts are read
        ((f"file://{old}/{run}", str(old), new), f"file://{new}/{run}"),  # moved: same place under the new folder
        ((f"{old}/{run}", str(old), new), f"file://{new}/{run}"),  # a plain absolute path, as MLflow may store it
        ((f"file://{old}/{run}", str(old), old), None),  # not moved
        ((f"file://{old}/{run}", str(old), None), None),  # not a local SQLite store (a server)
        ((f"file://{old}/{run}", "", new), None),  # no recorded results folder (a run from another tool)
        ((f"file:///elsewhere/{run}", str(old), new), None),  # artifacts kept outside the results folder
        (("mlflow-artifacts:/1/0123abcd/artifacts", str(old), new), None),  # served by a tracking server
        (("s3://bucket/1/0123abcd/artifacts", str(old), new), None),  # object storage
        ((f"file://{old}-2/{run}", str(old), new), None),  # a sibling folder whose name starts alike
    ]
    for arguments, wanted in cases:
        assert relocated_artifact_uri(*arguments) == wanted, arguments
    assert store_folder(f"sqlite:///{tmp_path / 'mlflow.db'}") == tmp_path.resolve()
    assert store_folder("http://127.0.0.1:5000") is None and store_folder("file:///tmp/mlruns") is None
