"""The command line: ``harness run`` and ``harness plan``.

Heavy libraries are imported only by the commands that need them, so help and
sweep errors answer at once.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Sequence

from harness.errors import HarnessError

DEFAULT_RESULTS = Path("results")


def _quiet_libraries() -> None:
    os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    os.environ.setdefault("MLFLOW_LOGGING_LEVEL", "WARNING")
    import logging
    import warnings

    for name in ("mlflow", "alembic", "transformers", "sentence_transformers", "numba"):
        logging.getLogger(name).setLevel(logging.ERROR)
    warnings.filterwarnings("ignore", category=FutureWarning)
    warnings.filterwarnings("ignore", category=DeprecationWarning)


def command_plan(args: argparse.Namespace) -> int:
    from harness.plan import stage_counts
    from harness.runner import prepared_sweep

    prepared = prepared_sweep(args.sweep)
    for trial in prepared.trials:
        print(f"{trial.key}  {trial.name}")
    counts = stage_counts(prepared.trials)
    methods: dict[str, int] = {}
    for key, trial in {t.stages["reduce"].key: t for t in prepared.trials}.items():
        methods[trial.reducer.method] = methods.get(trial.reducer.method, 0) + 1
    print()
    print(f"trials:          {len(prepared.trials)}")
    print(f"forward passes:  {counts['encode']}  (one per model x dataset x max length)")
    print(f"pooled variants: {counts['pool']}  (all from those forward passes)")
    print(f"transforms:      {counts['transform']}")
    print(f"reductions:      {counts['reduce']}  ({', '.join(f'{m} {n}' for m, n in sorted(methods.items()))})")
    print(f"clusterings:     {counts['cluster']}")
    return 0


def command_run(args: argparse.Namespace) -> int:
    from harness.leaderboard import table
    from harness.runner import run_sweep_file

    _quiet_libraries()
    progress = None
    if not args.no_progress:
        from tqdm import tqdm

        progress = lambda items, **kw: tqdm(items, file=sys.stderr, dynamic_ncols=True, **kw)  # noqa: E731
    result = run_sweep_file(args.sweep, Path(args.results_dir), args.tracking_uri, progress=progress)
    print(table(result.leaderboard(), result.rank_by))
    print(f"\nMLflow: {result.tracking_uri}  (sweep run {result.parent_run_id})")
    if result.failed:
        print(f"{len(result.failed)} of {len(result.results)} trials failed:", file=sys.stderr)
        for failed in result.failed:
            print(f"  {failed.trial.name}: {failed.error}", file=sys.stderr)
        return 1
    return 0


def parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(prog="harness", description="Score sentence-embedding setups for topic discovery.")
    commands = top.add_subparsers(dest="command", required=True)

    run = commands.add_parser("run", help="run every trial of a sweep and log it to MLflow")
    run.add_argument("sweep", help="the sweep file (YAML)")
    run.add_argument("--results-dir", default=str(DEFAULT_RESULTS), help="where the MLflow store, artifacts and cache live (default: results)")
    run.add_argument("--tracking-uri", default=None, help="MLflow tracking URI (default: sqlite:///RESULTS_DIR/mlflow.db)")
    run.add_argument("--no-progress", action="store_true", help="no progress bar")
    run.set_defaults(handler=command_run)

    plan = commands.add_parser("plan", help="list a sweep's trials and the work they need, without running anything")
    plan.add_argument("sweep", help="the sweep file (YAML)")
    plan.set_defaults(handler=command_plan)
    return top


def main(argv: Sequence[str] | None = None) -> int:
    args = parser().parse_args(argv)
    try:
        return args.handler(args)
    except HarnessError as err:
        print(f"harness: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("harness: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
