"""Successive halving over sample sizes: nested seeded subsamples, the survivors of each round, and the winner.

The nesting and stratification rule is checked over many seeds, factors, start sizes and label layouts; the
survivors a run logged are checked against an independent simulation of the halving rule (written out here,
from the issue's statement: keep the best ceil(k / factor) by the ranking score, and whatever ties the last kept)
on the scores it logged; and on an easy synthetic corpus the halving search finds the full grid's winner.
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest

from harness.cli import main
from harness.datasets.synthetic import SyntheticSource, synthetic_corpus
from harness.engine.halving import nested_order, round_rows, round_sizes, subcorpus

from conftest import write_sweep


@pytest.mark.parametrize("seed", [0, 1, 7, 42])
@pytest.mark.parametrize("factor", [2, 3, 4])
def test_every_round_holds_the_previous_round_and_keeps_class_shares(seed, factor):
    layouts = {
        "balanced": np.repeat(np.arange(4), 50),
        "skewed": np.array([0] * 120 + [1] * 50 + [2] * 20 + [3] * 7),
        "unlabelled": None,
    }
    for (layout, labels), start in itertools.product(layouts.items(), [5, 12, 30]):
        n = 200 if labels is None else labels.size
        sizes = round_sizes(n, start, factor)
        assert sizes[0] == start and sizes[-1] == n and all(b == a * factor for a, b in zip(sizes[:-2], sizes[1:-1]))
        assert sizes[-2] < n <= sizes[-2] * factor
        order = nested_order(labels, n, seed)
        assert sorted(order) == list(range(n))  # a permutation: the last round is the whole corpus
        assert np.array_equal(order, nested_order(labels, n, seed))  # seeded
        previous = set()
        for size in sizes:
            rows = round_rows(order, size)
            assert len(rows) == size and len(set(rows)) == size
            assert previous <= set(rows.tolist()), (layout, seed, factor, start, size)
            previous = set(rows.tolist())
            if labels is not None:
                # Each class within one text of its proportional share (the stratification the issue asks for).
                classes, counts = np.unique(labels, return_counts=True)
                got = np.array([(labels[rows] == c).sum() for c in classes])
                assert np.all(np.abs(got - counts * size / n) <= 1.0 + 1e-9), (layout, seed, factor, start, size, got)


def test_a_different_seed_draws_a_different_subsample():
    labels = np.repeat(np.arange(4), 50)
    draws = {tuple(round_rows(nested_order(labels, 200, seed), 20)) for seed in range(10)}
    assert len(draws) == 10


def test_a_subsample_has_its_own_dataset_key():
    from harness.engine.plan import dataset_key

    corpus = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=60, n_topics=3, seed=0))
    order = nested_order(corpus.labels, corpus.n_texts, 0)
    keys = {dataset_key(subcorpus(corpus, round_rows(order, size))) for size in (15, 30, 60)}
    assert len(keys) == 3 and dataset_key(subcorpus(corpus, round_rows(order, 60))) == dataset_key(corpus)


SWEEP = """
name: {name}
datasets:
  - {{source: synthetic, name: easy, n_texts: 240, n_topics: 4, topic_share: 0.7, seed: 5}}
models:
  - {{name: tfidf-svd-20, family: lexical, dimensions: 20}}
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 2}}
    - {{method: pca, n_components: 5}}
    - {{method: pca, n_components: 10}}
  cluster:
    - {{method: kmeans, k: 2}}
    - {{method: kmeans, k: labels}}
    - {{method: kmeans, k: 8}}
  seeds: [0]
rank_by: ari
evidence: {{resamples: 0, permutations: 9}}
{search}
"""
NOT_SETTINGS = {"dataset", "round", "round_texts"}


def _runs(uri: str, experiment: str):
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=uri)
    return client.search_runs([client.get_experiment_by_name(experiment).experiment_id], max_results=5000)


def _identity(run) -> str:
    return json.dumps({k: v for k, v in run.data.params.items() if k not in NOT_SETTINGS and v != "n/a"}, sort_keys=True)


def _simulated_keep(values: dict[str, float], factor: int) -> set[str]:
    """The halving rule, written out independently of harness.engine.halving."""
    keep = max(1, math.ceil(len(values) / factor))
    ordered = sorted(values.values(), reverse=True)
    line = ordered[keep - 1]
    return {name for name, value in values.items() if value >= line}


@pytest.fixture(scope="module")
def halving_and_grid(tmp_path_factory):
    folder = tmp_path_factory.mktemp("halving")
    results = folder / "results"
    halving = write_sweep(folder, SWEEP.format(name="halved", search="search: {strategy: halving, start_texts: 30, factor: 3}"), "h.yaml")
    grid = write_sweep(folder, SWEEP.format(name="full", search=""), "g.yaml")
    assert main(["run", str(halving), "--results-dir", str(results), "--no-progress"]) == 0
    assert main(["run", str(grid), "--results-dir", str(results), "--no-progress"]) == 0
    return results, f"sqlite:///{results / 'mlflow.db'}"


def test_the_logged_survivors_follow_the_halving_rule_on_the_logged_scores(halving_and_grid):
    results, uri = halving_and_grid
    runs = [r for r in _runs(uri, "halved") if r.data.tags["harness.kind"] in ("round", "configuration")]
    by_round: dict[int, dict[str, object]] = {}
    for run in runs:
        by_round.setdefault(int(run.data.params["round"]), {})[_identity(run)] = run
    assert sorted(by_round) == [0, 1, 2]  # 30, 90, 240 texts
    assert {r.data.params["round_texts"] for r in by_round[0].values()} == {"30"}
    assert {r.data.tags["harness.kind"] for r in by_round[2].values()} == {"configuration"}
    assert len(by_round[0]) == 9
    for index in (0, 1):
        values = {name: run.data.metrics["ari"] for name, run in by_round[index].items()}
        kept = _simulated_keep(values, 3)
        assert set(by_round[index + 1]) == kept, index
        cut = {name for name, run in by_round[index].items() if run.data.tags.get("harness.cut_at") == str(index)}
        assert cut == set(values) - kept
    assert not any("harness.cut_at" in r.data.tags for r in by_round[2].values())


def test_the_halving_log_names_each_configurations_own_run(halving_and_grid):
    """halving.json's run ids are the MLflow runs of the configurations it lists (written before the sweep's writes
    have all landed, so each id must have been resolved, never left a reference)."""
    from mlflow.tracking import MlflowClient

    from harness.engine.runner import HALVING_ARTIFACT
    from harness.score.across_corpora import configuration_label

    _, uri = halving_and_grid
    client = MlflowClient(tracking_uri=uri)
    (sweep,) = [r for r in _runs(uri, "halved") if r.data.tags["harness.kind"] == "sweep"]
    log = json.loads(Path(client.download_artifacts(sweep.info.run_id, HALVING_ARTIFACT)).read_text())
    listed = [(r["round"], c) for d in log.values() for r in d["rounds"] for c in r["configurations"]]
    ranked = [r for r in _runs(uri, "halved") if r.data.tags["harness.kind"] in ("round", "configuration")]
    assert sorted(c["run_id"] for _, c in listed) == sorted(r.info.run_id for r in ranked)  # each run listed once
    for index, entry in listed:
        run = client.get_run(entry["run_id"])
        assert run.data.params["round"] == str(index) and run.data.tags["mlflow.parentRunId"] == sweep.info.run_id
        assert configuration_label(run.info.run_name) == entry["configuration"]  # the entry's own configuration


def test_halving_finds_the_full_grids_winner_on_an_easy_corpus(halving_and_grid):
    results, uri = halving_and_grid
    full = {_identity(r): r.data.metrics["ari"] for r in _runs(uri, "full") if r.data.tags["harness.kind"] == "configuration"}
    final = {_identity(r): r.data.metrics["ari"] for r in _runs(uri, "halved")
             if r.data.tags["harness.kind"] == "configuration"}
    halving_winner = max(final, key=final.get)
    # The winner, or a configuration with exactly the full grid's best score (a tie under any test).
    assert full[halving_winner] == max(full.values())
    # The last round is the whole corpus: the same trials as the full grid's, so the same scores.
    assert all(final[name] == full[name] for name in final)


def test_the_report_says_who_was_cut_where_and_that_the_verdict_is_on_survivors(halving_and_grid):
    results, uri = halving_and_grid
    assert main(["report", "halved", "--results-dir", str(results), "--no-map"]) == 0
    page = (results / "reports" / "halved" / "report.html").read_text()
    assert "id=\"halving\"" in page and "survivors only" in page
    cut = [r for r in _runs(uri, "halved") if "harness.cut_at" in r.data.tags]
    for run in cut:
        assert run.info.run_name.split("/", 1)[1] in page
    markdown = (results / "reports" / "halved" / "report.md").read_text()
    assert "## Successive halving" in markdown


def test_a_first_round_as_large_as_a_dataset_is_refused_at_its_key(tmp_path, capsys):
    sweep = write_sweep(tmp_path, SWEEP.format(name="bad", search="search: {strategy: halving, start_texts: 240, factor: 3}"))
    assert main(["run", str(sweep), "--results-dir", str(tmp_path / "results"), "--no-progress"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "search.start_texts" in err[0] and str(sweep) in err[0] and "expected" in err[0]
    assert not (tmp_path / "results" / "mlflow.db").exists()


def test_halving_without_a_start_is_refused_at_its_key(tmp_path, capsys):
    sweep = write_sweep(tmp_path, SWEEP.format(name="bad", search="search: {strategy: halving, factor: 3}"))
    assert main(["run", str(sweep), "--results-dir", str(tmp_path / "results"), "--no-progress"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "search" in err[0] and "start_texts" in err[0] and str(sweep) in err[0]


def test_a_tie_at_the_cut_line_under_the_paired_bootstrap_survives():
    # The rule: keep the best 1/F and every configuration tied with the cut line under the paired
    # bootstrap. The tie is decided here with numpy's percentiles, independently of harness.score.evidence.
    from harness.engine.halving import survivors

    rng = np.random.default_rng(0)
    shared = rng.normal(scale=0.05, size=1000)  # the same resampled texts move every configuration alike (paired)
    draws = {"a": 0.90 + shared, "b": 0.80 + shared + rng.normal(scale=0.004, size=1000),
             "c": 0.79 + shared + rng.normal(scale=0.004, size=1000), "d": 0.10 + shared}
    values = {name: float(np.mean(d)) for name, d in draws.items()}
    low, high = np.percentile(draws["b"] - draws["c"], [2.5, 97.5])
    c_tied = bool(low <= 0 <= high)
    low, high = np.percentile(draws["b"] - draws["d"], [2.5, 97.5])
    d_tied = bool(low <= 0 <= high)
    assert (c_tied, d_tied) == (True, False)  # the case this test is about
    assert survivors(values, 2) == ["a", "b"]  # without distributions: best half only
    assert survivors(values, 2, draws) == ["a", "b", "c"]
    # Unpaired noise as large as the gap: a clear cut is no longer clear, and the tie test keeps it.
    noisy = {**draws, "d": 0.10 + rng.normal(scale=1.0, size=1000)}
    low, high = np.percentile(noisy["b"] - noisy["d"], [2.5, 97.5])
    assert (low <= 0 <= high) == ("d" in survivors(values, 2, noisy))
    # A configuration without a distribution (a label-free metric, no resamples) is cut by value alone.
    assert survivors(values, 2, {**draws, "c": None}) == ["a", "b"]


HALVING_TRANSFORMER = """
name: halved-encoder
datasets:
  - {{source: synthetic, name: easy, n_texts: 180, n_topics: 3, topic_share: 0.7, seed: 2}}
models:
  - {{name: {model}, max_length: 32}}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 2}}
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0]
rank_by: ari
evidence: {{resamples: 50, permutations: 9}}
search: {{strategy: halving, start_texts: 20, factor: 3}}
"""


def test_every_round_takes_its_vectors_from_the_whole_corpus_forward_pass(tmp_path, tiny_model_dir):
    # The issue: subsamples are nested, so the whole corpus's encode serves every round (no extra forward pass).
    # Three rounds (20, 60, 180 texts), one model: one forward pass, the two early rounds' trials take rows of it.
    from harness.embed.encode import pooled_variants
    from harness.embed.models import loaded_encoder, resolve_model
    from harness.engine.runner import run_sweep_file
    sweep = write_sweep(tmp_path, HALVING_TRANSFORMER.format(model=tiny_model_dir))
    result = run_sweep_file(sweep, tmp_path / "results")
    assert result.work["forward_passes"] == 1
    # once per early round and encode key (the trials of a round that share the model share its rows)
    assert result.work["encodes_shared_from_full_corpus"] == 2
    # Rows of the whole corpus's vectors equal the subsample's own forward pass to float rounding (the batches
    # differ, as under another batch_size: plan.RESULT_NEUTRAL), the claim the sharing rests on.
    corpus = synthetic_corpus(SyntheticSource(source="synthetic", name="easy", n_texts=180, n_topics=3,
                                              topic_share=0.7, seed=2))
    rows = round_rows(nested_order(corpus.labels, corpus.n_texts, 0), 20)
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 32, False)
    variants = [("last", "mean"), ("last", "max")]
    whole = pooled_variants(encoder, corpus.texts, variants, batch_size=32)
    part = pooled_variants(encoder, subcorpus(corpus, rows).texts, variants, batch_size=32)
    for variant in variants:
        np.testing.assert_allclose(whole[variant][rows], part[variant], rtol=0, atol=1e-5 * np.abs(part[variant]).max())


def test_only_backends_whose_vectors_ignore_batch_mates_share_rows(tmp_path, tiny_model_dir):
    # The rule share_rows and the encode key rest on: under ROW_INDEPENDENT_BACKENDS a text's vectors are the same
    # (to float rounding) whatever texts share its batch; under the others they are not, so those backends encode
    # every subsample themselves and their batch size enters the encode key. Checked for every backend the schema
    # accepts: rows of a 180-text pass against a 20-text subsample's own pass (other batches, same batch size).
    import typing

    from harness.embed.encode import pooled_variants
    from harness.embed.models import loaded_encoder, resolve_model
    from harness.embed.onnx_backend import onnx_encoder
    from harness.engine.plan import ROW_INDEPENDENT_BACKENDS
    from harness.sweep import ModelSettings

    backends = typing.get_args(ModelSettings.model_fields["backend"].annotation)
    corpus = synthetic_corpus(SyntheticSource(source="synthetic", name="easy", n_texts=180, n_topics=3,
                                              topic_share=0.7, seed=2))
    rows = round_rows(nested_order(corpus.labels, corpus.n_texts, 0), 20)
    torch_encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 32, False)
    variants = [("last", "mean"), ("last", "max")]
    for backend in backends:
        encoder = torch_encoder if backend == "torch" else onnx_encoder(torch_encoder, tmp_path / backend,
                                                                        int8=backend == "onnx_int8")
        whole = pooled_variants(encoder, corpus.texts, variants, batch_size=32)
        part = pooled_variants(encoder, subcorpus(corpus, rows).texts, variants, batch_size=32)
        agree = all(np.abs(whole[v][rows] - part[v]).max() <= 1e-5 * np.abs(part[v]).max() for v in variants)
        assert agree == (backend in ROW_INDEPENDENT_BACKENDS), backend
