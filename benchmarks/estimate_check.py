"""Predicted versus measured: run ``harness plan --estimate``'s formulas on a sweep, then run the sweep in a fresh
process with an empty stage cache, and print seconds and peak memory per stage side by side.

    PYTHONPATH=. python benchmarks/estimate_check.py experiments/demo.yaml
    PYTHONPATH=. python benchmarks/estimate_check.py experiments/synthetic_100k.yaml --texts 5000

``--texts N`` runs a reduced variant (synthetic datasets: n_texts N; public ones: a stratified sample of N), for
sweeps too big to run here. The calibration is read from (or written to) OUT/calibration, so several checks share
one. Timings on a shared machine are indicative only.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml


def reduced_sweep(source: Path, texts: int | None, out: Path) -> Path:
    data = yaml.safe_load(source.read_text())
    if texts is not None:
        for dataset in data["datasets"]:
            dataset["n_texts" if dataset["source"] == "synthetic" else "sample"] = texts
        data["name"] = f"{data['name']}_{texts}"
    path = out / f"{data['name']}.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def measured(sweep: Path, work: Path) -> dict:
    """Run the sweep (fresh process, empty cache); seconds per stage kind and the peak RSS by its end."""
    from harness.engine.runner import run_sweep_file

    started = time.perf_counter()
    result = run_sweep_file(sweep, work, cache_dir=work / "cache")
    wall = time.perf_counter() - started
    stages: dict[str, dict] = {}
    for entry in result.stage_log:
        stage = stages.setdefault(entry["kind"], {"seconds": 0.0, "peak_mb": 0.0, "count": 0})
        stage["seconds"] += entry["seconds"]
        stage["count"] += 1
        stage["peak_mb"] = max(stage["peak_mb"], entry["peak_rss_mb"])
    import resource

    return {"wall": wall, "stages": stages, "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def predicted(sweep: Path, calibration_root: Path, cache: Path):
    from harness.engine.cache import StageCache
    from harness.engine.calibration import calibrated, planned_stages
    from harness.engine.estimate import sweep_estimate
    from harness.engine.runner import prepared_sweep

    prepared = prepared_sweep(sweep)
    calibrations = {s.label: calibrated(prepared.models[s.label], s, calibration_root) for s in prepared.sweep.models}
    return sweep_estimate(planned_stages(prepared, StageCache(cache).has, calibrations), next(iter(calibrations.values())))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sweep", type=Path)
    parser.add_argument("--texts", type=int, default=None, help="run a reduced variant with this many texts")
    parser.add_argument("--out", type=Path, default=Path("results/estimate_check"))
    parser.add_argument("--measure-only", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.measure_only:
        print(json.dumps(measured(args.sweep, args.out)))
        return 0
    from harness.engine.estimate import STAGES, stage_peak_mb

    args.out.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="run-", dir=args.out))
    sweep = reduced_sweep(args.sweep, args.texts, work)
    estimate = predicted(sweep, args.out, work / "cache")
    child = subprocess.run([sys.executable, __file__, str(sweep), "--out", str(work), "--measure-only"],
                           capture_output=True, text=True, check=True)
    run = json.loads(child.stdout.strip().splitlines()[-1])
    print(f"sweep {sweep.name} ({'reduced to ' + str(args.texts) + ' texts' if args.texts else 'as written'})")
    print(f"{'stage':<10} {'runs':>5} {'pred s':>8} {'meas s':>8} {'ratio':>6} {'pred MB':>8} {'meas MB':>8}")
    for kind in STAGES:
        mine, got = estimate.stages[kind], run["stages"].get(kind, {"seconds": 0.0, "peak_mb": 0.0, "count": 0})
        ratio = f"{mine.seconds / got['seconds']:.2f}" if got["seconds"] > 0 and mine.seconds > 0 else "-"
        print(f"{kind:<10} {mine.count:>5} {mine.seconds:>8.1f} {got['seconds']:>8.1f} {ratio:>6} "
              f"{stage_peak_mb(estimate, kind):>8.0f} {got['peak_mb']:>8.0f}")
    # Only the kinds the estimate covers; the rest of the stage log (cached scores, the winner's map) is not estimated.
    measured_stages = sum(s["seconds"] for kind, s in run["stages"].items() if kind in STAGES)
    print(f"{'stages':<10} {'':>5} {estimate.total_seconds:>8.1f} {measured_stages:>8.1f} "
          f"{estimate.total_seconds / measured_stages:>6.2f} {estimate.peak_mb:>8.0f} {run['peak_mb']:>8.0f}")
    others = {kind: s["seconds"] for kind, s in run["stages"].items() if kind not in STAGES}
    if others:
        print("logged but not estimated: " + ", ".join(f"{kind} {seconds:.1f} s" for kind, seconds in sorted(others.items())))
    print(f"whole run wall time (with scoring and MLflow, not estimated): {run['wall']:.1f} s")
    dominant = estimate.dominant
    got = run["stages"].get(dominant, {"seconds": 0.0})["seconds"]
    print(f"dominant stage (predicted): {dominant}; predicted/measured = "
          f"{estimate.stages[dominant].seconds / got if got else float('nan'):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
