"""The ``halving`` benchmark group (on request only, outside the default ``make bench``): successive halving
against the full grid on one corpus, side by side in one process.

    HF_HUB_OFFLINE=1 python benchmarks/halving.py                 # 96 configurations, MiniLM, 2,000 texts
    HF_HUB_OFFLINE=1 python benchmarks/halving.py --small         # the lexical model and 600 texts (minutes)
    HF_HUB_OFFLINE=1 python benchmarks/run.py --only halving      # the same, through the benchmark runner

Figures (results/benchmarks.json): ``halving_cost_fraction`` = halving's wall time / the full grid's (target
<= 0.40), and ``halving_same_winner`` = 1 when halving's winner is the full grid's winner or tied with it under
the full grid's own tie test (the paired bootstrap against the leader), else 0. Each search runs with an empty
stage cache of its own, so neither reuses the other's work.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
RESULTS = REPO / "results" / "benchmarks.json"
sys.path.insert(0, str(REPO))

# 6 pooled vectors (MiniLM: 3 poolings x 2 layer choices) x 4 reducers x 4 clusterers = 96 configurations, one seed
# each; the small version: 3 lexical models (one pooled vector each) x 2 normalisations x 4 x 4 = 96.
SWEEP = """
name: {name}
datasets:
  - {{source: synthetic, name: bench, n_texts: {n_texts}, n_topics: 8, topic_share: 0.35, min_words: 5, max_words: 60, seed: 0}}
models: {models}
grid:
  pooling: [cls, mean, max]
  layers: [last, mean_last_4]
  normalize: {normalize}
  reduce:
    - {{method: pca, n_components: 5}}
    - {{method: pca, n_components: 20}}
    - {{method: umap, n_components: 5, n_neighbors: 15, min_dist: 0.0, metric: cosine}}
    - {{method: umap, n_components: 5, n_neighbors: 30, min_dist: 0.0, metric: cosine}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: kmeans, k: 16}}
    - {{method: hdbscan, min_cluster_size: 15}}
    - {{method: hdbscan, min_cluster_size: 40}}
  seeds: [0]
rank_by: ari
evidence: {{resamples: 200, permutations: 19}}
{search}
"""
MINILM = ("[{name: sentence-transformers/all-MiniLM-L6-v2, max_length: 128}]", "[none]")
LEXICAL = ("[{name: tfidf-svd-20, family: lexical, dimensions: 20}, {name: tfidf-svd-50, family: lexical, dimensions: 50}, "
           "{name: tfidf-svd-100, family: lexical, dimensions: 100}]", "[none, l2]")


def _winner(result) -> tuple[str, object]:
    from harness.score.across_corpora import configuration_identity

    ranking = next(iter(result.rankings.values()))
    return configuration_identity(ranking.rows[0].configuration.trials[0].config_params), ranking


def halving_sweeps(n_texts: int, start_texts: int, factor: int, small: bool) -> dict[str, str]:
    """The full grid's sweep and the halving search's, over the same configurations and corpus."""
    models, normalize = LEXICAL if small else MINILM
    searches = {"grid": "", "halving": f"search: {{strategy: halving, start_texts: {start_texts}, factor: {factor}}}"}
    return {name: SWEEP.format(name=f"bench_{name}", n_texts=n_texts, models=models, normalize=normalize, search=search)
            for name, search in searches.items()}


def halving_figures(n_texts: int, start_texts: int, factor: int, small: bool) -> dict:
    import numpy as np

    from harness.engine.runner import run_sweep_file
    from harness.geometry.reduce import UmapSettings, umap_reduced
    from harness.score.across_corpora import configuration_identity

    # UMAP compiles once per process (numba); pay it before timing either search.
    umap_reduced(np.random.default_rng(0).normal(size=(300, 20)).astype(np.float32), UmapSettings(method="umap"), 0)
    seconds, results = {}, {}
    (REPO / "results").mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory(dir=REPO / "results") as folder:
        folder = Path(folder)
        for name, text in halving_sweeps(n_texts, start_texts, factor, small).items():
            path = folder / f"{name}.yaml"
            path.write_text(text)
            started = time.perf_counter()
            results[name] = run_sweep_file(path, folder / name, None)
            seconds[name] = time.perf_counter() - started
    full_winner, full_ranking = _winner(results["grid"])
    halving_winner, _ = _winner(results["halving"])
    row = next(r for r in full_ranking.rows if configuration_identity(r.configuration.trials[0].config_params) == halving_winner)
    same = int(halving_winner == full_winner or bool(row.tied))
    fraction = seconds["halving"] / seconds["grid"]
    configurations = len(full_ranking.rows)
    common = {"configurations": configurations, "texts": n_texts, "start_texts": start_texts, "factor": factor,
              "model": "tfidf-svd-20/50/100 (lexical)" if small else "all-MiniLM-L6-v2", "seconds": seconds,
              "halving_winner_full_grid_rank": row.rank, "survivors": len(results["halving"].configurations),
              "work": {"grid": results["grid"].work, "halving": results["halving"].work}}
    return {
        "halving_cost_fraction": {"value": fraction, "target": "<= 0.40", "met": fraction <= 0.40, **common},
        "halving_same_winner": {"value": float(same), "target": "1 (the full grid's winner or tied with it)",
                                "met": same == 1, **common},
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--texts", type=int, default=None, help="corpus size (default 2000; 600 with --small)")
    parser.add_argument("--start-texts", type=int, default=None, help="first round (default: texts / 9, so 3 rounds at factor 3)")
    parser.add_argument("--factor", type=int, default=3)
    parser.add_argument("--small", action="store_true", help="the lexical model instead of MiniLM: minutes on a laptop")
    args = parser.parse_args()
    texts = args.texts or (600 if args.small else 2000)
    start = args.start_texts or max(texts // (args.factor ** 2), 50)
    figures = halving_figures(texts, start, args.factor, args.small)
    report = json.loads(RESULTS.read_text()) if RESULTS.exists() else {}
    report.setdefault("figures", {}).update(figures)
    RESULTS.write_text(json.dumps(report, indent=2, default=str))
    for figure, data in figures.items():
        print(f"{figure:<24} {data['value']:8.3f}  target {data['target']:<44} {'met' if data['met'] else 'NOT met'}")
    common = figures["halving_cost_fraction"]
    print(f"{common['configurations']} configurations, {texts} texts, {common['model']}, start {start}, factor {args.factor}; "
          f"seconds {common['seconds']}; written to {RESULTS.relative_to(REPO)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
