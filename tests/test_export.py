"""`harness export`: one row per configuration, equal to what MLflow holds, and the README's search_runs twin."""

from __future__ import annotations

import re

import pandas as pd
import pytest

from harness.cli import main

from conftest import REPO, configuration_runs, write_sweep


@pytest.fixture(scope="module")
def demo(tmp_path_factory, tiny_model_dir):
    """A small sweep named demo, as the README's snippet expects, run through the command line."""
    folder = tmp_path_factory.mktemp("export")
    sweep = write_sweep(folder, f"""
name: demo
datasets:
  - {{source: synthetic, n_texts: 200, topic_share: 0.4, seed: 1}}
models:
  - {{name: {tiny_model_dir}, max_length: 64}}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 6}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: hdbscan, min_cluster_size: 10}}
  seeds: [0, 1]
evidence: {{resamples: 30}}
""")
    assert main(["run", str(sweep), "--results-dir", str(folder / "results"), "--no-progress"]) == 0
    return folder


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_export_has_one_row_per_configuration_equal_to_the_configuration_runs(demo, suffix, capsys):
    target = demo / f"out/demo.{suffix}"
    assert main(["export", "demo", "--to", str(target), "--results-dir", str(demo / "results")]) == 0
    assert f"4 configurations of sweep 'demo'" in capsys.readouterr().out
    table = pd.read_csv(target) if suffix == "csv" else pd.read_parquet(target)
    runs = {r.info.run_id: r for r in configuration_runs(f"sqlite:///{demo / 'results' / 'mlflow.db'}", "demo")}
    assert len(table) == len(runs) == 4 and set(table.run_id) == set(runs)
    for row in table.itertuples():
        run = runs[row.run_id]
        assert row.configuration == run.info.run_name and row.dataset == run.data.params["dataset"]
        for setting in ("model", "pooling", "layers", "transform", "reduce.method", "cluster.method"):  # settings as columns
            assert str(table.loc[table.run_id == row.run_id, setting].item()) == run.data.params[setting], setting
        for metric, value in run.data.metrics.items():  # every configuration-run metric, generically
            assert table.loc[table.run_id == row.run_id, metric].item() == pytest.approx(value, nan_ok=True), metric
    for column in ("ari", "ari_std", "ari_ci_low", "ari_ci_high", "rank", "tied_with_leader", "length_confound_index",
                   "length_eta2_clusters", "encode_seconds", "reduce_seconds", "cluster_seconds", "n_seeds",
                   "reduce.method", "cluster.method", "harness.config_key"):
        assert column in table.columns, column
    assert table["rank"].tolist() == sorted(table["rank"].tolist())  # best first


def test_the_readme_search_runs_snippet_gives_the_same_rows(demo, monkeypatch, capsys):
    readme = (REPO / "README.md").read_text()
    snippet = re.search(r"```python\n(import mlflow\n.*?mlflow\.search_runs.*?)```", readme, re.S).group(1)
    monkeypatch.chdir(demo)  # the snippet reads results/mlflow.db from where it runs
    namespace: dict = {}
    exec(compile(snippet, "README.md", "exec"), namespace)  # the README's own code, unchanged
    from_mlflow = namespace["configurations"]
    assert main(["export", "demo", "--to", str(demo / "again.csv")]) == 0
    exported = pd.read_csv(demo / "again.csv")
    assert from_mlflow["run_id"].tolist() == exported["run_id"].tolist()  # same rows, same order
    assert from_mlflow["metrics.ari"].tolist() == pytest.approx(exported["ari"].tolist())


def test_export_refuses_a_wrong_suffix_and_a_foreign_run(demo, capsys):
    results = str(demo / "results")
    assert main(["export", "demo", "--to", str(demo / "demo.xlsx"), "--results-dir", results]) == 2
    assert "--to: demo.xlsx: expected a file name ending in .csv, .parquet, .pq" in capsys.readouterr().err
    assert not (demo / "demo.xlsx").exists()
    configuration = configuration_runs(f"sqlite:///{demo / 'results' / 'mlflow.db'}", "demo")[0].info.run_id
    assert main(["export", "demo", "--run-id", configuration, "--to", str(demo / "x.csv"), "--results-dir", results]) == 2
    assert "is a configuration run, not a sweep run" in capsys.readouterr().err
