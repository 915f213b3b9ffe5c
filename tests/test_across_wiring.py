"""The across-corpus verdict, wired in: a sweep over three synthetic corpora logs it, the report shows it, the
card cites it, and ``harness verdict`` computes it over two sweep files.

The logged average ranks and Friedman statistic are checked against an independent recomputation from the
configuration runs' logged scores with scipy (scipy.stats.rankdata for the ranks, scipy.stats.friedmanchisquare
for the statistic), not against harness.score.across.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from harness.cli import main

from conftest import configuration_runs, finished_runs, needs_mirror, write_sweep

DATASETS = ("clear", "middle", "faint")
NEWSGROUPS, AG_NEWS = "twenty_newsgroups.parquet", "ag_news.parquet"  # mirror files (tests/test_public_datasets.py)
SWEEP = """
name: {name}
question: Which setup finds the topics across corpora?
datasets:
  - {{source: synthetic, name: clear, n_texts: 120, n_topics: 4, topic_share: 0.7, seed: 1}}
  - {{source: synthetic, name: middle, n_texts: 120, n_topics: 4, topic_share: 0.4, seed: 2}}
  - {{source: synthetic, name: faint, n_texts: 120, n_topics: 4, topic_share: 0.2, seed: 3}}
models: [{model}]
grid:
  pooling: [{poolings}]
  reduce:
    - {{method: pca, n_components: 4}}
    - {{method: pca, n_components: 8}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0]
evidence: {{resamples: 50, permutations: 9}}
"""


@pytest.fixture(scope="module")
def across_run(tmp_path_factory, tiny_model_dir):
    folder = tmp_path_factory.mktemp("across")
    results = folder / "results"
    sweep = write_sweep(folder, SWEEP.format(name="across", model=tiny_model_dir, poolings="mean, max, cls"))
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 0
    return folder, results


def _logged_payload(results, name="across"):
    uri = f"sqlite:///{results / 'mlflow.db'}"
    client, parents, _ = finished_runs(uri, name)
    parent = max(parents, key=lambda r: r.info.start_time)
    path = client.download_artifacts(parent.info.run_id, "across_corpora.json", str(results / "download"))
    return uri, parent, json.loads(open(path).read())


def test_the_logged_average_ranks_and_friedman_statistic_match_scipy(across_run):
    from scipy.stats import friedmanchisquare, rankdata

    _, results = across_run
    uri, parent, payload = _logged_payload(results)
    # Independent table: each configuration run's logged ari, matched across datasets by its params minus dataset.
    table: dict[str, dict[str, float]] = {}
    for run in configuration_runs(uri, "across"):
        params = {k: v for k, v in run.data.params.items() if k != "dataset" and v != "n/a"}
        table.setdefault(json.dumps(params, sort_keys=True), {})[run.data.params["dataset"]] = run.data.metrics["ari"]
    assert len(table) == 6 and all(len(row) == 3 for row in table.values())
    settings = list(table)
    scores = np.array([[table[s][d] for s in settings] for d in DATASETS])
    # scipy.stats.rankdata: rank 1 for the highest score, ties share the average rank (Demšar 2006, section 3.2.2).
    expected = rankdata(-scores, axis=1, method="average").mean(axis=0)
    by_settings = {json.dumps(s, sort_keys=True): c for c, s in payload["settings"].items()}
    logged = [payload["average_ranks"][by_settings[s]] for s in settings]
    assert np.allclose(logged, expected, atol=1e-12)
    # scipy.stats.friedmanchisquare over the same columns (one sample per configuration, one row per dataset).
    chi2, p = friedmanchisquare(*scores.T)
    assert payload["friedman"]["chi2"] == pytest.approx(chi2, abs=1e-9)
    assert payload["friedman"]["chi2_p_value"] == pytest.approx(p, abs=1e-9)
    assert parent.data.metrics["across.friedman_chi2"] == pytest.approx(chi2, abs=1e-9)
    assert parent.data.tags["harness.across_best"] == payload["best"]
    assert sorted(payload["datasets"]) == sorted(DATASETS)
    assert "across_corpora_cd.png" in {a.path for a in
                                       __import__("mlflow").tracking.MlflowClient(uri).list_artifacts(parent.info.run_id)}


def test_the_report_shows_the_diagram_the_tables_and_the_few_datasets_caveat(across_run):
    _, results = across_run
    assert main(["report", "across", "--results-dir", str(results), "--no-map"]) == 0
    page = (results / "reports" / "across" / "report.html").read_text()
    assert "id=\"across-corpora\"" in page and "<h2>Across corpora</h2>" in page
    assert "id='across-corpora-cd' class='cd-diagram'" in page and "data:image/png;base64," in page
    assert "id=\"across-holm\"" in page and "Iman-Davenport" in page and "Nemenyi critical difference" in page
    assert "Only 3 datasets" in page  # the caveat below about 5 datasets
    markdown = (results / "reports" / "across" / "report.md").read_text()
    assert "## Across corpora" in markdown and "![Critical-difference diagram](across-corpora-cd.png)" in markdown
    assert (results / "reports" / "across" / "across-corpora-cd.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cite_across_names_the_best_its_average_rank_the_test_and_every_corpus(across_run, capsys):
    _, results = across_run
    _, _, payload = _logged_payload(results)
    assert main(["cite", "across", "--across", "--results-dir", str(results)]) == 0
    card = (results / "reports" / "across" / "winner-across.md").read_text()
    best = payload["best"]
    assert f"# Across-corpus citation: {best}" in card
    assert f"{payload['average_ranks'][best]:.2f}" in card
    assert "Friedman test over 3 datasets" in card and "Iman-Davenport" in card
    for dataset in DATASETS:
        assert f"| {dataset} | {payload['scores'][dataset][best]:.4f} |" in card


def test_verdict_over_two_sweeps_matches_configurations_by_settings_and_says_what_it_dropped(tmp_path, tiny_model_dir, capsys):
    results = tmp_path / "results"
    one = SWEEP.format(name="first", model=tiny_model_dir, poolings="mean, max").replace(
        "  - {source: synthetic, name: faint, n_texts: 120, n_topics: 4, topic_share: 0.2, seed: 3}\n", "")
    two = (SWEEP.format(name="second", model=tiny_model_dir, poolings="mean, cls")
           .replace("  - {source: synthetic, name: clear, n_texts: 120, n_topics: 4, topic_share: 0.7, seed: 1}\n", "")
           .replace("  - {source: synthetic, name: middle, n_texts: 120, n_topics: 4, topic_share: 0.4, seed: 2}\n", "")
           .replace("name: faint", "name: other"))
    assert main(["run", str(write_sweep(tmp_path, one, "one.yaml")), "--results-dir", str(results), "--no-progress"]) == 0
    assert main(["run", str(write_sweep(tmp_path, two, "two.yaml")), "--results-dir", str(results), "--no-progress"]) == 0
    capsys.readouterr()
    assert main(["verdict", "first", "second", "--results-dir", str(results)]) == 0
    out = capsys.readouterr().out
    written = next(line.split(": ", 1)[1] for line in out.splitlines() if line.startswith("json: "))
    payload = json.loads(open(written).read())
    assert sorted(payload["datasets"]) == ["clear", "middle", "other"]
    # Shared by every dataset: mean pooling only (max ran on the first sweep's corpora, cls on the second's).
    assert {s["pooling"] for s in payload["settings"].values()} == {"mean"} and len(payload["configurations"]) == 2
    assert any("max" in d and "not run on dataset other" in d for d in payload["dropped"])
    assert any("cls" in d and "not run on dataset clear" in d for d in payload["dropped"])
    assert "dropped: configuration" in out and "Friedman test over 3 datasets" in out
    assert (Path(written).parent / "across_corpora_cd.png").is_file() and Path(written).parent.parent == results / "reports"


def test_a_one_dataset_sweep_logs_no_verdict(tmp_path, tiny_model_dir):
    results = tmp_path / "results"
    single = (SWEEP.format(name="single", model=tiny_model_dir, poolings="mean, max")
              .replace("  - {source: synthetic, name: middle, n_texts: 120, n_topics: 4, topic_share: 0.4, seed: 2}\n", "")
              .replace("  - {source: synthetic, name: faint, n_texts: 120, n_topics: 4, topic_share: 0.2, seed: 3}\n", ""))
    assert main(["run", str(write_sweep(tmp_path, single)), "--results-dir", str(results), "--no-progress"]) == 0
    _, parents, _ = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "single")
    assert "harness.across_best" not in parents[0].data.tags
    assert main(["report", "single", "--results-dir", str(results), "--no-map"]) == 0
    assert "across-corpora" not in (results / "reports" / "single" / "report.html").read_text()


# --- gathering and matching, on plain values ------------------------------------------------------------------

def _scored(dataset, settings, label, value, source="s"):
    from harness.score.across_corpora import Scored, configuration_identity

    return Scored(dataset, configuration_identity({"dataset": dataset, **settings}), label, value, "ari", source)


def test_configurations_are_matched_by_settings_not_by_name():
    from harness.score.across_corpora import gathered_scores

    gathered = gathered_scores([
        _scored("a", {"pooling": "mean"}, "m/mean", 0.5), _scored("a", {"pooling": "max"}, "m/max", 0.4),
        # The same settings under another name (another sweep's model label) is the same configuration...
        _scored("b", {"pooling": "mean"}, "other/mean", 0.3, "t"), _scored("b", {"pooling": "max"}, "other/max", 0.2, "t"),
        # ...and the same name with other settings is another one, which dataset a lacks.
        _scored("b", {"pooling": "cls"}, "m/mean", 0.9, "t"),
    ])
    assert gathered.scores == {"a": {"m/mean": 0.5, "m/max": 0.4}, "b": {"m/mean": 0.3, "m/max": 0.2, "m/mean [3]": 0.9}}
    assert gathered.dropped == ["configuration m/mean [3]: not run on dataset a"]
    assert gathered.settings["m/mean [3]"] == {"pooling": "cls"}


def test_a_dataset_met_again_in_another_sweep_is_dropped_not_counted_twice():
    from harness.score.across_corpora import gathered_scores

    gathered = gathered_scores([_scored("a", {"p": "1"}, "x", 0.5, "first"), _scored("a", {"p": "1"}, "x", 0.1, "second")])
    assert gathered.scores == {"a": {"x": 0.5}}
    assert gathered.dropped == ["dataset a of sweep second: already given by sweep first"]


def test_without_baycomp_the_verdict_says_how_to_get_the_bayesian_comparison(monkeypatch):
    import sys

    from harness.score.across_corpora import BAYES_HINT, gathered_scores, verdict_of

    rows = [_scored(d, {"p": c}, c, v) for d, values in {"a": (0.5, 0.4, 0.1), "b": (0.6, 0.2, 0.3), "c": (0.9, 0.5, 0.4)}.items()
            for c, v in zip("xyz", values)]
    with_bayes, note = verdict_of(gathered_scores(rows))
    assert note is None and with_bayes.bayesian is not None and with_bayes.bayesian.first == with_bayes.best
    monkeypatch.setitem(sys.modules, "baycomp", None)  # what an environment without the package sees: ImportError
    without, note = verdict_of(gathered_scores(rows))
    assert without.bayesian is None and note == BAYES_HINT and "harness[bayes]" in note


@pytest.mark.slow
@needs_mirror(NEWSGROUPS, AG_NEWS)
def test_the_shipped_across_corpora_sweep_reports_its_diagram_over_five_corpora(tmp_path, capsys):
    from conftest import REPO

    results = tmp_path / "results"
    assert main(["run", str(REPO / "experiments" / "across_corpora.yaml"), "--results-dir", str(results), "--no-progress"]) == 0
    assert "across corpora (average ranks over datasets" in capsys.readouterr().out
    assert main(["report", "across_corpora", "--results-dir", str(results), "--no-map"]) == 0
    page = (results / "reports" / "across_corpora" / "report.html").read_text()
    assert "id='across-corpora-cd' class='cd-diagram'" in page and "Friedman test over 5 datasets" in page
    assert "Only 5 datasets" not in page and "fewer than about 5" not in page  # five corpora: no power caveat
