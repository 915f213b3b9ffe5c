"""Run a large sweep and record the wall time and peak RSS of its stages.

    HARNESS_DATA_DIR=DIR python benchmarks/scale.py experiments/synthetic_100k.yaml

Wrap it in ``/usr/bin/time -v`` for the whole process's peak RSS. Stage figures are
merged into results/benchmarks.json under "scale" -> sweep name.
"""

from __future__ import annotations

import json
import os
import resource
import sys
import time
from pathlib import Path

os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
os.environ.setdefault("MLFLOW_LOGGING_LEVEL", "WARNING")

REPO = Path(__file__).resolve().parents[1]
RESULTS = REPO / "results" / "benchmarks.json"


def main(sweep_path: str) -> int:
    from tqdm import tqdm

    from harness.engine.runner import loaded_corpora, prepared_sweep, run_sweep_file

    started = time.perf_counter()
    prepared = prepared_sweep(sweep_path)
    corpora = loaded_corpora(prepared)
    load_seconds = time.perf_counter() - started
    load_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    def encode_progress(total: int, description: str):
        bar = tqdm(total=total, desc=description, unit="text", file=sys.stderr, mininterval=30)
        return bar.update, bar.close

    result = run_sweep_file(sweep_path, REPO / "results", resume=False, encode_progress=encode_progress)
    total = time.perf_counter() - started
    stages: dict[str, dict] = {}
    for entry in result.stage_log:
        kind = stages.setdefault(entry["kind"], {"count": 0, "seconds": 0.0, "peak_rss_mb": 0.0})
        kind["count"] += 1
        kind["seconds"] += entry["seconds"]
        kind["peak_rss_mb"] = max(kind["peak_rss_mb"], entry["peak_rss_mb"])
    figures = {
        "texts": {name: c.n_texts for name, c in corpora.items()},
        "load": {"seconds": load_seconds, "peak_rss_mb": load_rss},
        "stages": stages,
        "wall_seconds": total,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "trials": {r.trial.name: {"status": r.status, **{k: r.scores.get(k) for k in ("ari", "length_confound_index", "coverage")}}
                   for r in result.results},
        "cores": os.cpu_count(),
        "date": time.strftime("%Y-%m-%d %H:%M:%S"),
    }
    report = json.loads(RESULTS.read_text()) if RESULTS.exists() else {}
    report.setdefault("scale", {})[prepared.sweep.name] = figures
    RESULTS.write_text(json.dumps(report, indent=2, default=str))
    print(json.dumps(figures, indent=2, default=str))
    return 0 if not result.failed else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1]))
