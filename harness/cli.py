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
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    # huggingface_hub and datasets log each retry of an unreachable hub, and set their loggers' levels from these
    # variables when first imported; the one-line error says why the route failed.
    os.environ.setdefault("HF_HUB_VERBOSITY", "error")
    os.environ.setdefault("DATASETS_VERBOSITY", "error")
    import logging
    import warnings

    for name in ("mlflow", "alembic", "transformers", "sentence_transformers", "numba", "huggingface_hub", "datasets"):
        logging.getLogger(name).setLevel(logging.ERROR)
    warnings.filterwarnings("ignore", category=FutureWarning)
    warnings.filterwarnings("ignore", category=DeprecationWarning)


STAGE_LABELS = {
    "encode": "forward passes",
    "pool": "pooled variants",
    "transform": "transforms",
    "graph": "neighbour graphs",
    "reduce": "reductions",
    "cluster": "clusterings",
}


def command_plan(args: argparse.Namespace) -> int:
    from harness.engine.cache import StageCache
    from harness.engine.plan import stage_work
    from harness.engine.runner import prepared_sweep

    prepared = prepared_sweep(args.sweep)
    cache = StageCache(Path(args.cache_dir) if args.cache_dir else Path(args.results_dir) / "cache")
    for trial in prepared.trials:
        same = f"  (same stages as {trial.equivalent_to})" if trial.equivalent_to else ""
        print(f"{trial.key}  {trial.name}{same}")
    equivalent = [t for t in prepared.trials if t.equivalent_to]
    reducers = {t.stages["reduce"].key: t.reducer.method for t in prepared.trials}
    by_method = {m: list(reducers.values()).count(m) for m in sorted(set(reducers.values()))}
    print()
    print(f"{'trials':<16} {len(prepared.trials)}  ({len(prepared.trials) - len(equivalent)} computed, "
          f"{len(equivalent)} equivalent to another trial: same stages, computed once)")
    print(f"{'stage':<16} {'needed':>6} {'cached':>6} {'to run':>6}")
    for work in stage_work(prepared.trials, cache.has):
        extra = f"  ({', '.join(f'{m} {n}' for m, n in by_method.items())})" if work.kind == "reduce" else ""
        print(f"{STAGE_LABELS[work.kind]:<16} {work.needed:>6} {work.cached:>6} {work.to_run:>6}{extra}")
    if equivalent:
        print("\nmean and mean_sqrt_len differ by a positive factor per text (under long_texts: truncate, and for static")
        print("vectors without remove_first_component): after l2 normalisation or a cosine UMAP they give the same")
        print("clusters; seed-free stages give the same result for every seed.")
    search = prepared.sweep.search
    if search.strategy == "halving":
        from harness.engine.halving import round_sizes

        print(f"\nsearch: halving (factor {search.factor}); the work above is the full grid's on the whole corpora. The "
              "forward passes of transformer models on the torch or onnx backend are the whole corpus's and serve every "
              "round (int8 ONNX, TF-IDF, static and precomputed vectors are computed again per round); each round runs "
              "the survivors of the round "
              "before on a nested subsample of")
        for name, corpus in prepared.corpora.items():
            print(f"  {name}: " + ", ".join(str(n) for n in round_sizes(corpus.n_texts, search.start_texts, search.factor))
                  + " texts")
    if args.estimate:
        print()
        print_estimate(prepared, cache, args)
    return 0


def cluster_workers(args: argparse.Namespace) -> int:
    """How many workers the stages that parallelise are spread over: 1 locally, the scheduler's workers with
    --scheduler, the default LocalCluster's otherwise."""
    if args.executor != "dask":
        return 1
    from harness.engine.distributed import LOCAL_WORKERS

    if args.scheduler is None:
        return LOCAL_WORKERS
    from distributed import Client

    try:
        with Client(args.scheduler, timeout=10) as client:
            return max(len(client.scheduler_info()["workers"]), 1)
    except OSError as err:
        raise HarnessError(f"--scheduler: cannot reach {args.scheduler}: {err}") from None


def print_estimate(prepared, cache, args: argparse.Namespace) -> None:
    from harness.engine.calibration import calibrated, cpu_model, planned_stages
    from harness.engine.estimate import STAGES, stage_peak_mb, sweep_estimate

    _quiet_libraries()
    workers = cluster_workers(args)
    calibrations = {spec.label: calibrated(prepared.models[spec.label], spec, cache.root) for spec in prepared.sweep.models}
    first = next(iter(calibrations.values()))
    estimate = sweep_estimate(planned_stages(prepared, cache.has, calibrations), first, workers)
    where = f"{cpu_model()}, {os.cpu_count()} cores" + (f"; {workers} Dask workers" if workers > 1 else "")
    print(f"estimate for this machine ({where}); calibration: {cache.root / 'calibration'}")
    print(f"{'stage':<16} {'to run':>6} {'seconds':>9} {'share':>6} {'peak MB':>8}")
    total = estimate.total_seconds
    for kind in STAGES:
        stage = estimate.stages[kind]
        share = f"{stage.seconds / total:.0%}" if total > 0 else "-"
        note = f"  ({'; '.join(stage.notes)})" if stage.notes else ""
        print(f"{STAGE_LABELS[kind]:<16} {stage.count:>6} {stage.seconds:>9.1f} {share:>6} {stage_peak_mb(estimate, kind):>8.0f}{note}")
    print(f"{'total':<16} {'':>6} {total:>9.1f} {'':>6} {estimate.peak_mb:>8.0f}")
    if total > 0:
        dominant = estimate.dominant
        print(f"dominant stage: {STAGE_LABELS[dominant]} ({estimate.stages[dominant].seconds / total:.0%} of the estimated time)")
    print("seconds: a calibration on this machine (a few hundred texts through the model, small UMAP, PCA, HDBSCAN,")
    print("k-means and agglomerative fits) scaled by each stage's growth rule (harness/engine/estimate.py); scoring and")
    print("MLflow logging are not included. peak MB: the calibration process's measured resident memory with the model loaded,")
    print("plus the arrays the run holds (pooled vectors, transforms, reductions) and the largest working set of one")
    print("stage (UMAP's neighbour graph, HDBSCAN's copy, agglomerative's distances), estimated from their sizes.")


def next_steps(sweep_name: str, args: argparse.Namespace) -> str:
    """What to do after a run, as commands that work from here (the results folder named when it is not the default)."""
    where = "" if Path(args.results_dir) == DEFAULT_RESULTS else f" --results-dir {args.results_dir}"
    uri = f" --tracking-uri {args.tracking_uri}" if args.tracking_uri else ""
    steps = [(f"harness report {sweep_name}{where}{uri}", "the HTML report"),
             (f"harness ui{where}" if not uri else f"open {args.tracking_uri}", "browse and compare the runs"),
             (f"harness cite {sweep_name}{where}{uri}", "a citation card for the winner"),
             (f"harness export {sweep_name} --to {sweep_name}.csv{where}{uri}", "one row per configuration")]
    width = max(len(command) for command, _ in steps)
    return "next:\n" + "\n".join(f"  {command:<{width}}  {what}" for command, what in steps)


def command_run(args: argparse.Namespace) -> int:
    from harness.engine.runner import run_sweep_file
    from harness.sweep import load_sweep

    _quiet_libraries()
    progress = encode_progress = None
    if not args.no_progress:
        from tqdm import tqdm

        progress = lambda **kw: tqdm(file=sys.stderr, dynamic_ncols=True, **kw)  # noqa: E731

        def encode_bar(total: int, description: str):
            bar = tqdm(total=total, desc=description, unit="text", file=sys.stderr, dynamic_ncols=True, leave=False)
            return bar.update, bar.close

        encode_progress = encode_bar

    result = run_sweep_file(
        args.sweep, Path(args.results_dir), args.tracking_uri,
        cache_dir=Path(args.cache_dir) if args.cache_dir else None, use_cache=not args.no_cache,
        resume=not args.rerun_finished, progress=progress, encode_progress=encode_progress,
        executor=args.executor, scheduler=args.scheduler, winner_map=not args.no_map,
    )
    from harness.score.leaderboard import descriptions_table, table  # scoring libraries: only once the sweep has run

    for ranking in result.rankings.values():
        print(table(ranking))
        winner = ranking.winner
        if winner is not None and winner.configuration.descriptions:
            print(f"\nwinner's clusters (seed {winner.configuration.trials[0].seed}):")
            print(descriptions_table(winner.configuration.descriptions))
        print()
    print("tie: the paired bootstrap interval of the difference to the leader contains 0 (see README: how to read it)")
    if result.across is not None:
        print("\nacross corpora (average ranks over datasets; report: the 'Across corpora' section):")
        print("\n".join(f"  {line}" for line in result.across["lines"]))
        if result.across.get("bayes_note"):
            print(f"  note: {result.across['bayes_note']}")
        print()
    reused = sum(r.status == "REUSED" for r in result.results)
    work = ", ".join(f"{k} {v}" for k, v in sorted(result.work.items())) or "none"
    print(f"{len(result.results) - reused} trials run, {reused} reused from earlier runs; work done: {work}")
    print(f"MLflow: {result.tracking_uri}  (sweep run {result.parent_run_id})")
    print(next_steps(load_sweep(args.sweep).name, args))
    if result.failed:
        print(f"{len(result.failed)} of {len(result.results)} trials failed:", file=sys.stderr)
        for failed in result.failed:
            print(f"  {failed.trial.name}: {failed.error}", file=sys.stderr)
        return 1
    return 0


def command_cache_info(args: argparse.Namespace) -> int:
    from harness.engine.cache import StageCache

    root = Path(args.cache_dir) if args.cache_dir else Path(args.results_dir) / "cache"
    entries = StageCache(root).entries()
    print(f"cache: {root.resolve()}")
    if not entries:
        print("empty")
        return 0
    print(f"{'stage':<10} {'entries':>8} {'MB':>10}")
    for kind in sorted({e.kind for e in entries}):
        mine = [e for e in entries if e.kind == kind]
        print(f"{kind:<10} {len(mine):>8} {sum(e.bytes for e in mine) / 1e6:>10.1f}")
    print(f"{'total':<10} {len(entries):>8} {sum(e.bytes for e in entries) / 1e6:>10.1f}")
    return 0


def command_cache_prune(args: argparse.Namespace) -> int:
    from harness.engine.cache import StageCache

    if args.older_than < 0:
        raise HarnessError(f"--older-than: expected a number of days >= 0, got {args.older_than}")
    root = Path(args.cache_dir) if args.cache_dir else Path(args.results_dir) / "cache"
    removed = StageCache(root).prune(args.older_than)
    print(f"removed {len(removed)} entries ({sum(e.bytes for e in removed) / 1e6:.1f} MB) unused for {args.older_than:g} days")
    return 0


def command_datasets(args: argparse.Namespace) -> int:
    import json

    from harness.datasets.card import reachable_cards, tokenizer_counter
    from harness.embed.models import resolve_model

    _quiet_libraries()
    data_dir = Path(args.data_dir).resolve() if args.data_dir else None
    if data_dir is not None and not data_dir.is_dir():
        raise HarnessError(f"--data-dir: no such folder: {data_dir}")
    cards = reachable_cards(data_dir, tokenizer_counter(resolve_model(args.model).folder))
    if args.json:
        print(json.dumps({"model_for_lengths": args.model, "datasets": cards}, indent=2))
        return 0
    print(f"token lengths by the tokenizer of {args.model}\n")
    for card in cards:
        if not card["reachable"]:
            print(f"{card['name']}: not reachable: {card['reason']}\n")
            continue
        print(f"{card['name']}  ({card['n_classes']} classes; {card['route']})")
        print(f"  {'split':<6} {'rows':>7} {'tokens q05':>10} {'q50':>6} {'q95':>6} {'eta2(log len|label)':>20}")
        for split, info in card["splits"].items():
            q = info["token_length_quantiles"]
            print(f"  {split:<6} {info['rows']:>7} {q['q05']:>10.0f} {q['q50']:>6.0f} {q['q95']:>6.0f} {info['length_eta2_labels']:>20.4f}")
        for split in card["missing_splits"]:
            print(f"  {split:<6} not held by this source")
        print()
    print("synthetic  (built-in town requests; generated from its settings, always available)")
    return 0


def command_datasets_mirror(args: argparse.Namespace) -> int:
    from harness.datasets.mirror import MANIFEST, build_mirror
    from harness.datasets.public import DATA_DIR_VARIABLE, MIRROR_FILES

    _quiet_libraries()
    out = Path(args.out).expanduser().resolve()
    names = list(dict.fromkeys(args.names)) or list(MIRROR_FILES)
    manifest = build_mirror(out, names, progress=lambda message: print(message, file=sys.stderr, flush=True))
    for name in names:
        entry = manifest["datasets"][name]
        splits = ", ".join(f"{s} {n:,}" for s, n in entry["rows_per_split"].items())
        print(f"{name}: {entry['rows']:,} rows ({splits}) from {entry['route']} -> {out / entry['file']}  sha256 {entry['sha256']}")
    print(f"manifest: {out / MANIFEST}")
    print(f"copy the folder where it is needed and set {DATA_DIR_VARIABLE}={out}")
    return 0


def command_schema(args: argparse.Namespace) -> int:
    from harness.schema import key_reference_markdown, schema_text

    sys.stdout.write(key_reference_markdown() if args.markdown else schema_text())
    return 0


def _tracking_uri(args: argparse.Namespace) -> str:
    from harness.track.tracking import default_tracking_uri

    return args.tracking_uri or default_tracking_uri(Path(args.results_dir))


def _finished_sweep(args: argparse.Namespace):
    """The sweep run a report, a citation or an export describes, with a plain word on stderr when it is not complete."""
    from harness.review.page import run_notes
    from harness.track.readback import sweep_record

    if args.sweep is None and args.run_id is None:
        raise HarnessError("name a sweep (its newest run) or give --run-id RUN_ID")
    record = sweep_record(_tracking_uri(args), args.sweep, args.run_id)
    print(f"sweep run {record.run_id} of '{record.name}' (status {record.status})")
    for note in run_notes(record):
        print(f"warning: {note}", file=sys.stderr)
    return record


def command_report(args: argparse.Namespace) -> int:
    from harness.review.build import write_report

    _quiet_libraries()
    record = _finished_sweep(args)
    page, markdown = write_report(record, Path(args.results_dir) / "reports", with_map=not args.no_map)
    print(f"report: {page}\nmarkdown: {markdown}\nlogged to sweep run {record.run_id}")
    return 0


def command_cite(args: argparse.Namespace) -> int:
    from harness.review.cite import write_citations

    _quiet_libraries()
    record = _finished_sweep(args)
    if args.across:
        from harness.review.cite_across import write_across_card

        print(f"across corpora\n  citation: {write_across_card(record, Path(args.results_dir) / 'reports')}")
        return 0
    for citation in write_citations(record, Path(args.results_dir) / "reports", Path(args.results_dir), args.dataset):
        print(f"dataset {citation.dataset}\n  citation: {citation.card}\n  runnable sweep: {citation.sweep_file}\n"
              f"  reproduce: {citation.command}")
    return 0


def command_verdict(args: argparse.Namespace) -> int:
    from harness.review.cite_across import write_verdict
    from harness.track.readback import sweep_record

    _quiet_libraries()
    uri = _tracking_uri(args)
    records = [sweep_record(uri, name) for name in args.sweeps]
    payload, folder = write_verdict(records, Path(args.results_dir) / "reports")
    for record in records:
        print(f"sweep run {record.run_id} of '{record.name}' (status {record.status})")
    print("\n".join(payload["lines"]))
    if payload.get("bayesian") is None and payload.get("bayes_note"):
        print(f"note: {payload['bayes_note']}")
    for note in payload["dropped"]:
        print(f"dropped: {note}")
    print(f"verdict: {folder / 'verdict.md'}\njson: {folder / 'verdict.json'}")
    return 0


def command_export(args: argparse.Namespace) -> int:
    from harness.review.export import configuration_table, export_format, write_table

    _quiet_libraries()
    target = Path(args.to)
    export_format(target)  # a wrong suffix is refused before MLflow is read
    record = _finished_sweep(args)  # the run report and cite describe, with the same warnings
    table = configuration_table(record)
    write_table(table, target)
    print(f"{len(table)} configurations of sweep '{record.name}' (run {record.run_id}), {len(table.columns)} columns "
          f"-> {target}")
    return 0


def command_ui(args: argparse.Namespace) -> int:
    import subprocess

    results = Path(args.results_dir).resolve()
    store = results / "mlflow.db"
    if not store.is_file():
        raise HarnessError(f"{store}: no tracking store yet; run a sweep first (harness run SWEEP)")
    from harness.track.runs_view import runs_page_link
    from harness.track.tracking import sweep_experiments

    _quiet_libraries()
    base = f"http://{'127.0.0.1' if args.host in ('0.0.0.0', '::') else args.host}:{args.port}"
    sweeps = sweep_experiments(f"sqlite:///{store}")
    environment = {**os.environ, "MLFLOW_SERVER_ENABLE_JOB_EXECUTION": "false"}
    command = [sys.executable, "-m", "mlflow", "server", "--backend-store-uri", f"sqlite:///{store}",
               "--default-artifact-root", (results / "artifacts").as_uri(), "--host", args.host,
               "--port", str(args.port), "--workers", "1"]
    print(f"MLflow UI on {base}  (Ctrl-C stops it); each sweep's configurations, best first:", flush=True)
    for name, experiment_id in sweeps:
        print(f"  {name}: {runs_page_link(base, experiment_id)}", flush=True)
    if not sweeps:
        print("  (no sweep in this store yet)", flush=True)
    try:
        return subprocess.call(command, env=environment)
    except KeyboardInterrupt:
        return 0


def _add_results_option(command: argparse.ArgumentParser) -> None:
    command.add_argument("--results-dir", default=str(DEFAULT_RESULTS),
                         help="where the MLflow store, artifacts and cache live (default: results)")


def _add_store_options(command: argparse.ArgumentParser) -> None:
    """For the commands that read or write the stage cache."""
    _add_results_option(command)
    command.add_argument("--cache-dir", default=None, help="stage cache folder (default: RESULTS_DIR/cache)")


_EXAMPLES = (
    ("harness plan experiments/demo.yaml", "list the trials and the work they need"),
    ("harness plan experiments/demo.yaml --estimate", "and the expected seconds and peak memory per stage here"),
    ("harness run experiments/demo.yaml", "run them, log to MLflow, print the leaderboard"),
    ("harness report demo", "HTML and Markdown report of the newest run"),
    ("harness ui", "browse the runs in MLflow (prints a link per sweep)"),
    ("harness export demo --to demo.csv", "one row per configuration"),
    ("harness datasets mirror --out ~/harness-data", "offline copy of the public datasets"),
    ("harness schema > sweep.schema.json", "JSON Schema for your editor"),
)
EXAMPLES = "examples:\n" + "\n".join(f"  {c:<46} {w}" for c, w in _EXAMPLES) + """

'harness COMMAND --help' describes each command."""


def parser() -> argparse.ArgumentParser:
    from harness import __version__

    top = argparse.ArgumentParser(prog="harness", description="Score sentence-embedding setups for topic discovery.",
                                  epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    top.add_argument("--version", action="version", version=f"harness {__version__}",
                     help="print the version and exit")
    commands = top.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = commands.add_parser("run", help="run every trial of a sweep and log it to MLflow")
    run.add_argument("sweep", help="the sweep file (YAML)")
    _add_store_options(run)
    run.add_argument("--tracking-uri", default=None, help="MLflow tracking URI (default: sqlite:///RESULTS_DIR/mlflow.db)")
    run.add_argument("--no-cache", action="store_true", help="neither read nor write the stage cache")
    run.add_argument("--rerun-finished", action="store_true",
                     help="run trials again even where the experiment has a FINISHED run with the same key")
    run.add_argument("--no-progress", action="store_true", help="no progress bars")
    run.add_argument("--no-map", action="store_true",
                     help="do not compute the 2-D map of each dataset's winner at the end (the report then has none)")
    run.add_argument("--executor", choices=("local", "dask"), default="local",
                     help="where reductions and clusterings run: local, this process (the default), or dask, a Dask cluster")
    run.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                     help="an existing Dask scheduler (default with --executor dask: a 2-worker LocalCluster on 127.0.0.1)")
    run.set_defaults(handler=command_run)

    plan = commands.add_parser("plan", help="list a sweep's trials and the work they need, without running anything")
    plan.add_argument("sweep", help="the sweep file (YAML)")
    _add_store_options(plan)
    plan.add_argument("--estimate", action="store_true",
                      help="also print the expected seconds and peak memory per stage on this machine (calibrates once per model)")
    plan.add_argument("--executor", choices=("local", "dask"), default="local",
                      help="with --estimate: where the run would compute (default: local; dask: parallel stages divided by the workers)")
    plan.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                      help="with --estimate --executor dask: the scheduler whose workers to count (default: a 2-worker LocalCluster)")
    plan.set_defaults(handler=command_plan)

    datasets = commands.add_parser("datasets", help="cards of the built-in datasets that can be reached now")
    datasets.add_argument("--data-dir", default=None, help="a mirror folder of Parquet files (default: $HARNESS_DATA_DIR)")
    datasets.add_argument("--model", default="sentence-transformers/all-MiniLM-L6-v2",
                          help="whose tokenizer measures lengths (default: sentence-transformers/all-MiniLM-L6-v2)")
    datasets.add_argument("--json", action="store_true", help="print the cards as JSON")
    datasets.set_defaults(handler=command_datasets)
    datasets_commands = datasets.add_subparsers(dest="datasets_command", metavar="{mirror}")
    mirror = datasets_commands.add_parser(
        "mirror", help="build an offline mirror (Parquet files + manifest) from the public routes",
        description="Fetch the public datasets through their usual routes (needs a network) and write the Parquet "
                    "files the loaders read, with manifest.json (rows, SHA-256). Copy the folder to machines without "
                    "a network and set HARNESS_DATA_DIR to it. Nothing is written unless every dataset was fetched.")
    mirror.add_argument("--out", required=True, metavar="DIR", help="the mirror folder to write (created if missing)")
    mirror.add_argument("names", nargs="*", metavar="NAME",
                        help="datasets to mirror: twenty_newsgroups, ag_news (default: all)")
    mirror.set_defaults(handler=command_datasets_mirror)

    schema = commands.add_parser("schema", help="print the JSON Schema of a sweep file (for editors and validators)",
                                 description="Print the JSON Schema (draft 2020-12) of a sweep file, generated from the "
                                             "typed settings harness validates with.")
    schema.add_argument("--markdown", action="store_true", help="print the key reference table instead (as in the README)")
    schema.set_defaults(handler=command_schema)

    def finished_sweep_command(name: str, help_text: str, handler) -> argparse.ArgumentParser:
        command = commands.add_parser(name, help=help_text)
        command.add_argument("sweep", nargs="?", default=None,
                             help="a sweep name (its newest run, finished or not) or a sweep run id")
        command.add_argument("--run-id", default=None, help="this sweep run rather than the newest")
        _add_results_option(command)  # the stage cache is the one the sweep run recorded
        command.add_argument("--tracking-uri", default=None, help="MLflow tracking URI (default: sqlite:///RESULTS_DIR/mlflow.db)")
        command.set_defaults(handler=handler)
        return command

    report = finished_sweep_command("report", "write the HTML and Markdown report of a finished sweep", command_report)
    report.add_argument("--no-map", action="store_true", help="leave out the 2-D map of the winner's clusters")
    cite = finished_sweep_command("cite", "write a citation card for each dataset's winner, with the command that "
                                  "reproduces it", command_cite)
    cite.add_argument("--dataset", default=None, metavar="NAME", help="only this dataset's winner")
    cite.add_argument("--across", action="store_true",
                      help="cite the across-corpus winner instead: average rank over datasets, the test, per-corpus scores")

    verdict = commands.add_parser(
        "verdict", help="which configuration wins across the datasets of one or more finished sweeps",
        description="Rank the configurations shared by every dataset of the named sweeps (matched by their settings, "
                    "not their names) within each dataset, average the ranks, and test the differences (Friedman / "
                    "Iman-Davenport, Nemenyi critical difference, Holm against the best). Says what was dropped.")
    verdict.add_argument("sweeps", nargs="+", metavar="SWEEP", help="sweep names (the newest run of each)")
    _add_results_option(verdict)
    verdict.add_argument("--tracking-uri", default=None, help="MLflow tracking URI (default: sqlite:///RESULTS_DIR/mlflow.db)")
    verdict.set_defaults(handler=command_verdict)

    export = finished_sweep_command("export", "write one row per configuration of a sweep run to CSV or Parquet "
                                    "(the run report and cite describe)", command_export)
    export.description = ("One row per configuration and dataset: the settings as columns, every score of the "
                          "configuration run (mean over seeds, standard deviation, interval, valid seeds), rank, tie "
                          "flag, length measures, stage seconds, and the evidence tags; the sweep run's status in "
                          "every row.")
    export.add_argument("--to", required=True, metavar="FILE", help="the file to write: FILE.csv or FILE.parquet")

    ui = commands.add_parser("ui", help="start the MLflow UI on the results store and print a link per sweep")
    _add_results_option(ui)
    ui.add_argument("--host", default="127.0.0.1", help="address to bind (default: 127.0.0.1, this machine only)")
    ui.add_argument("--port", type=int, default=5000, help="port to listen on (default: 5000)")
    ui.set_defaults(handler=command_ui)

    cache = commands.add_parser("cache", help="inspect or prune the stage cache")
    cache_commands = cache.add_subparsers(dest="cache_command", required=True)
    info = cache_commands.add_parser("info", help="entries and size per stage kind")
    _add_store_options(info)
    info.set_defaults(handler=command_cache_info)
    prune = cache_commands.add_parser("prune", help="remove entries not used for some days")
    prune.add_argument("--older-than", type=float, required=True, metavar="DAYS",
                       help="remove entries not used for more than DAYS days (0 empties the cache)")
    _add_store_options(prune)
    prune.set_defaults(handler=command_cache_prune)
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
