"""Every number a sweep logs can be recomputed by a reader from the run's own artifacts.

One real (small) sweep with the packaged MiniLM, three seeds, a seeded and a seed-free
pipeline and a pair of equivalent poolings; then, for every seed run, the logged
ari, ami, nmi, v_measure and length measures are recomputed from that run's
``assignments.parquet`` twice, with scikit-learn and with formulas written out here,
and every configuration run is checked against its seed runs.
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn import metrics as skm

from harness.engine.runner import run_sweep_file

from conftest import MINILM, configuration_runs, finished_runs, write_sweep

SWEEP = """
name: recompute
datasets:
  - {{source: synthetic, n_texts: 240, topic_share: 0.4, seed: 5}}
models: [{model}]
grid:
  pooling: [mean, mean_sqrt_len]
  normalize: [l2]
  reduce:
    - {{method: pca, n_components: 6}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: hdbscan, min_cluster_size: 8}}
  seeds: [0, 1, 2]
evidence: {{resamples: 200, permutations: 19}}
"""


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    folder = tmp_path_factory.mktemp("recompute")
    result = run_sweep_file(write_sweep(folder, SWEEP.format(model=MINILM)), folder / "results")
    uri = f"sqlite:///{folder / 'results' / 'mlflow.db'}"
    client, _, seeds = finished_runs(uri, "recompute")
    tables = {run.info.run_id: pd.read_parquet(client.download_artifacts(run.info.run_id, "assignments.parquet",
                                                                         str(folder))) for run in seeds}
    return result, seeds, configuration_runs(uri, "recompute"), tables


# -- the direct formulas ---------------------------------------------------------------------------------------------

def _table(labels: np.ndarray, clusters: np.ndarray) -> np.ndarray:
    _, y = np.unique(labels, return_inverse=True)
    _, c = np.unique(clusters, return_inverse=True)
    table = np.zeros((y.max() + 1, c.max() + 1))
    np.add.at(table, (y, c), 1)
    return table


def _comb2(x):
    return x * (x - 1) / 2


def _ari(table: np.ndarray) -> float:
    # Hubert & Arabie (1985): (index - expected index) / (max index - expected index) over pairs of items.
    index, a, b = _comb2(table).sum(), _comb2(table.sum(1)).sum(), _comb2(table.sum(0)).sum()
    expected = a * b / _comb2(table.sum())
    return (index - expected) / ((a + b) / 2 - expected)


def _entropy(counts: np.ndarray) -> float:
    p = counts[counts > 0] / counts.sum()
    return float(-(p * np.log(p)).sum())


def _mutual_info(table: np.ndarray) -> float:
    n, outer = table.sum(), np.outer(table.sum(1), table.sum(0))
    nz = table > 0
    return float((table[nz] / n * np.log(n * table[nz] / outer[nz])).sum())


def _expected_mi(table: np.ndarray) -> float:
    # Vinh, Epps & Bailey (2010): E[MI] under random permutation; cell counts are hypergeometric (scipy's pmf here).
    n, total = int(table.sum()), 0.0
    for a in table.sum(1).astype(int):
        for b in table.sum(0).astype(int):
            k = np.arange(max(1, a + b - n), min(a, b) + 1)
            total += (k / n * np.log(n * k / (a * b)) * stats.hypergeom.pmf(k, n, a, b)).sum()
    return total


def _direct_scores(labels: np.ndarray, clusters: np.ndarray) -> dict[str, float]:
    table = _table(labels, clusters)
    h_y, h_c, mi = _entropy(table.sum(1)), _entropy(table.sum(0)), _mutual_info(table)
    emi = _expected_mi(table)
    h, c = mi / h_y, mi / h_c
    return {"ari": _ari(table), "nmi": mi / ((h_y + h_c) / 2), "ami": (mi - emi) / ((h_y + h_c) / 2 - emi),
            "v_measure": 2 * h * c / (h + c)}


def _eta2_eps2(lengths: np.ndarray, groups: np.ndarray) -> tuple[float, float]:
    # One-way ANOVA of log length on the groups (noise = one group): eta^2 = SS_b / SS_t, and Kelley's (1935)
    # epsilon^2 = (SS_b - (k - 1) SS_w / (N - k)) / SS_t.
    log_len = np.log(lengths)
    levels = np.unique(groups)
    ss_t = ((log_len - log_len.mean()) ** 2).sum()
    ss_w = sum(((log_len[groups == g] - log_len[groups == g].mean()) ** 2).sum() for g in levels)
    k, n = levels.size, log_len.size
    return (ss_t - ss_w) / ss_t, (ss_t - ss_w - (k - 1) * ss_w / (n - k)) / ss_t


# -- the checks ------------------------------------------------------------------------------------------------------

def test_the_sweep_is_what_the_checks_need(sweep):
    result, seeds, configs, _ = sweep
    assert len(seeds) == 12 and len(configs) == 4 and not result.failed
    assert any(run.data.metrics["noise_fraction"] > 0 for run in seeds)  # noise is exercised
    assert all(run.data.metrics["n_clusters"] >= 2 for run in seeds)  # no degenerate clustering: every formula applies


def test_every_logged_external_score_recomputes_from_the_assignments(sweep):
    _, seeds, _, tables = sweep
    for run in seeds:
        table = tables[run.info.run_id]
        labels, clusters = table.label.to_numpy(), table.cluster.to_numpy()
        logged = run.data.metrics
        reference = {"ari": skm.adjusted_rand_score(labels, clusters), "ami": skm.adjusted_mutual_info_score(labels, clusters),
                     "nmi": skm.normalized_mutual_info_score(labels, clusters), "v_measure": skm.v_measure_score(labels, clusters)}
        direct = _direct_scores(labels, clusters)
        for name in ("ari", "ami", "nmi", "v_measure"):
            assert logged[name] == pytest.approx(reference[name], abs=1e-9), (run.info.run_name, name, "scikit-learn")
            assert logged[name] == pytest.approx(direct[name], abs=1e-9), (run.info.run_name, name, "direct")
        kept = clusters != -1
        if kept.any():
            assert logged["ari_clustered"] == pytest.approx(skm.adjusted_rand_score(labels[kept], clusters[kept]), abs=1e-9)


def test_every_logged_length_measure_recomputes_from_the_assignments(sweep):
    _, seeds, _, tables = sweep
    for run in seeds:
        table = tables[run.info.run_id]
        labels, clusters = table.label.to_numpy(), table.cluster.to_numpy()
        lengths = np.maximum(table.token_count.to_numpy(), 1)
        eta_c, eps_c = _eta2_eps2(lengths, clusters)
        eta_y, eps_y = _eta2_eps2(lengths, labels)
        # scikit-learn has no ANOVA; scipy's F statistic gives eta^2 = F (k-1) / (F (k-1) + N - k) independently.
        k, n = np.unique(clusters).size, lengths.size
        f = stats.f_oneway(*[np.log(lengths[clusters == g]) for g in np.unique(clusters)]).statistic
        expected = {"length_eta2_clusters": eta_c, "length_epsilon2_clusters": eps_c, "length_eta2_labels": eta_y,
                    "length_epsilon2_labels": eps_y, "length_confound_index": (eps_c - eps_y) / (1 - eps_y)}
        for name, value in expected.items():
            assert run.data.metrics[name] == pytest.approx(value, abs=1e-9), (run.info.run_name, name)
        assert run.data.metrics["length_eta2_clusters"] == pytest.approx(f * (k - 1) / (f * (k - 1) + n - k), abs=1e-9)


def test_every_configuration_run_summarises_its_own_seed_runs(sweep):
    _, seeds, configs, _ = sweep
    for config in configs:
        children = [run for run in seeds if run.data.tags["mlflow.parentRunId"] == config.info.run_id]
        assert len(children) == 3 and config.data.metrics["n_seeds"] == 3
        for name in ("ari", "ami", "length_confound_index", "silhouette"):
            values = [run.data.metrics[name] for run in children if not math.isnan(run.data.metrics[name])]
            assert config.data.metrics[f"{name}_valid_seeds"] == len(values)
            assert config.data.metrics[name] == pytest.approx(np.mean(values), abs=1e-12)
            if len(values) > 1:
                assert config.data.metrics[f"{name}_std"] == pytest.approx(statistics.stdev(values), abs=1e-12)
        low, high = config.data.metrics["ari_ci_low"], config.data.metrics["ari_ci_high"]
        assert low <= config.data.metrics["ari"] + 0.05 and high >= config.data.metrics["ari"] - 0.05
        assert config.data.tags["harness.interval_scope"] == "seeds_and_texts" and "harness.verdict" not in config.data.tags


def test_seed_free_configurations_log_no_stability(sweep):
    _, _, configs, _ = sweep
    for config in configs:
        free = config.data.params["cluster.method"] == "hdbscan"  # PCA + HDBSCAN: no stage takes the seed
        assert ("stability_ari" in config.data.metrics) is not free, config.info.run_name
        assert (config.data.tags.get("harness.stability") == "not_applicable") is free, config.info.run_name


def test_configurations_of_a_dataset_are_bootstrapped_on_the_same_draws(sweep):
    # mean and mean_sqrt_len are equivalent after l2: their seeds cluster identically. Resampled on the same seed and
    # text draws, their bootstrap distributions are identical arrays and the tie interval between them is [0, 0];
    # configurations drawn independently would differ resample by resample.
    result, _, _, _ = sweep
    by_name = {c.name: c for c in result.configurations}
    pairs = [(name, name.replace("/mean/", "/mean_sqrt_len/")) for name in by_name if "/mean/" in name]
    assert len(pairs) == 2
    for mean, scaled in pairs:
        for metric in ("ari", "ami"):
            first, second = by_name[mean].distributions[metric], by_name[scaled].distributions[metric]
            assert np.ptp(first) > 0 and np.array_equal(first, second), (mean, metric)
