"""dask_encode_over_local: the encode stage on a 2-worker LocalCluster over the local executor, side by side.

2,000 synthetic texts through the packaged MiniLM (``sentence-transformers/all-MiniLM-L6-v2``, offline), the
same trial's forward pass both ways, each from an empty cache. The cluster is started before the clock runs
(worker start-up is not the stage's cost); each worker's model load is in the figure, as the local model
load is in the local one. Reported with the torch threads each side used. Also run by ``benchmarks/run.py``
as the on-request group `dask_encode` (`python benchmarks/run.py --only dask_encode`).

    python benchmarks/dask_encode.py [--texts 2000]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

REPO = Path(__file__).resolve().parents[1]
MINILM = "sentence-transformers/all-MiniLM-L6-v2"
WORKERS = 2


def _prepared(folder: Path, n_texts: int):
    from harness.engine.runner import loaded_corpora, prepared_sweep

    sweep = folder / "sweep.yaml"
    sweep.write_text(f"""
name: dask_encode_bench
datasets:
  - {{source: synthetic, n_texts: {n_texts}, seed: 0}}
models: [{MINILM}]
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 8}}
  cluster:
    - {{method: kmeans, k: labels}}
""")
    prepared = prepared_sweep(sweep)
    return prepared, loaded_corpora(prepared)


def dask_encode_figures(n_texts: int = 2000, repeats: int = 1) -> dict:
    """One cold encode each way (a second would find the model loaded); ``repeats`` is accepted for run.py."""
    import torch

    from harness.engine.cache import StageCache
    from harness.engine.distributed import dask_client
    from harness.engine.distributed_encode import CHUNK_TEXTS, encode_on_cluster
    from harness.engine.stages import StageExecutor

    (REPO / "results").mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory(dir=REPO / "results") as folder:
        prepared, corpora = _prepared(Path(folder), n_texts)
        trial = prepared.trials[0]
        local_threads = os.cpu_count() or 1
        torch.set_num_threads(local_threads)
        local = StageExecutor(corpora, prepared.trials, StageCache(Path(folder) / "local"))
        started = time.perf_counter()
        local.pooled(trial)
        local_seconds = time.perf_counter() - started

        client = dask_client(None, WORKERS)
        try:
            client.wait_for_workers(WORKERS)
            remote = StageExecutor(corpora, prepared.trials, StageCache(Path(folder) / "dask"))
            started = time.perf_counter()
            report = encode_on_cluster(remote, prepared.trials, client)
            remote.pooled(trial)
            dask_seconds = time.perf_counter() - started
        finally:
            client.close()
            client.cluster_to_close.close()
    return {"dask_encode_over_local": {
        "value": dask_seconds / local_seconds, "target": "reported (< 1 means the cluster is faster)", "met": True,
        "seconds": {"local": local_seconds, "dask": dask_seconds}, "texts": n_texts, "workers": WORKERS,
        "chunk_texts": CHUNK_TEXTS, "chunks": report["chunks_sent"],
        "torch_threads": {"local": local_threads, "per_dask_worker": report["torch_threads"]}, "task_slots_per_host": report["task_slots"],
        "cores": os.cpu_count(), "model": MINILM,
    }}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--texts", type=int, default=2000)
    args = parser.parse_args()
    print(json.dumps(dask_encode_figures(args.texts), indent=2))
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(REPO))
    sys.exit(main())
