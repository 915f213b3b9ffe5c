"""Building a report or a citation card from a finished sweep (the edge: MLflow, cache, files)."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Optional

import numpy as np

from harness.readback import ConfigurationRecord, SweepRecord
from harness.report import (
    ReportContent,
    caveats,
    cluster_map_png,
    length_png,
    main_effects,
    main_effects_png,
    pareto_front,
    quality_cost_png,
    ranked,
    ranking_metric,
    render_html,
    render_markdown,
)


def winner_trial(record: SweepRecord, configuration: ConfigurationRecord):
    """The planned trial (first seed) of a configuration, from the sweep file the run recorded, or None."""
    from harness.runner import prepared_sweep

    path = Path(record.tags.get("harness.sweep_path", ""))
    if not path.is_file() or hashlib.sha256(path.read_bytes()).hexdigest() != record.tags.get("harness.sweep_sha256"):
        return None, None
    prepared = prepared_sweep(path)
    trials = [t for t in prepared.trials if t.config_key == configuration.tags.get("harness.config_key")]
    return (prepared, trials[0]) if trials else (prepared, None)


def winner_coordinates(record: SweepRecord, configuration: ConfigurationRecord) -> Optional[np.ndarray]:
    """2-D UMAP of the winner's pooled vectors (from the stage cache; recomputed if it was pruned)."""
    from harness.cache import StageCache
    from harness.reduce import UmapSettings, umap_reduced
    from harness.runner import loaded_corpora
    from harness.stages import StageExecutor

    prepared, trial = winner_trial(record, configuration)
    if trial is None:
        return None
    cache_dir = record.tags.get("harness.cache_dir") or None
    corpora = {k: v for k, v in loaded_corpora(prepared).items() if k == trial.dataset}
    executor = StageExecutor(corpora, [trial], StageCache(Path(cache_dir)) if cache_dir else None)
    vectors = executor.transformed(trial)
    settings = UmapSettings(method="umap", n_components=2, n_neighbors=min(15, len(vectors) - 1), metric="cosine")
    return umap_reduced(np.asarray(vectors, dtype=np.float32), settings, 0)


def report_content(record: SweepRecord, with_map: bool = True) -> ReportContent:
    metric = ranking_metric(record)
    ordered = ranked(record.configurations, metric)
    datasets = list(dict.fromkeys(c.dataset for c in ordered))
    first = [c for c in ordered if c.dataset == datasets[0]] if datasets else []
    effects = main_effects(first, metric)
    costs = [c.compute_seconds for c in first]
    front = pareto_front(costs, [c.metrics.get(metric, float("nan")) for c in first])
    images: dict[str, bytes] = {}
    if effects:
        images["main-effects"] = main_effects_png(effects, metric)
    if first:
        images["quality-cost"] = quality_cost_png(first, metric, front)
    clusters_table: list[dict] = []
    if first and first[0].seed_run_ids:
        winner = first[0]
        index = "length_confound_index" if "length_confound_index" in winner.metrics else "length_eta2_clusters"
        confounded = max(first, key=lambda c: c.metrics.get(index, -1.0))
        tables = []
        for label, config in (("winner", winner), (f"most length-confounded ({index} {confounded.metrics.get(index, 0):.2f})", confounded)):
            table = record.artifact_table(config.seed_run_ids[0], "assignments.parquet") if config.seed_run_ids else None
            if table is not None:
                tables.append((f"{label}: {config.name.split('/', 2)[-1]}", table))
        if tables:
            images["length-plot"] = length_png(tables)
        described = record.artifact_table(winner.seed_run_ids[0], "clusters.parquet")
        clusters_table = described.to_dict("records") if described is not None else []
        if with_map:
            xy = winner_coordinates(record, winner)
            assignments = record.artifact_table(winner.seed_run_ids[0], "assignments.parquet")
            if xy is not None and assignments is not None:
                legend = {int(r["cluster"]): r["top_terms"] for r in clusters_table}
                images["cluster-map"] = cluster_map_png(xy, assignments["cluster"].to_numpy(), legend)
    return ReportContent(record=record, metric=metric, ordered=ordered, effects=effects, front=front,
                         caveats=caveats(first, metric), images=images, winner_clusters=clusters_table)


def write_report(record: SweepRecord, reports_dir: Path, with_map: bool = True) -> tuple[Path, Path]:
    """Write report.html (self-contained) and report.md (+ PNGs) and log them to the sweep run."""
    content = report_content(record, with_map)
    folder = reports_dir / record.name
    folder.mkdir(parents=True, exist_ok=True)
    page = folder / "report.html"
    page.write_text(render_html(content))
    image_paths = {}
    for element, data in content.images.items():
        (folder / f"{element}.png").write_bytes(data)
        image_paths[element] = f"{element}.png"
    markdown = folder / "report.md"
    markdown.write_text(render_markdown(content, image_paths))
    record.client.log_artifact(record.run_id, str(page), "report")
    record.client.log_artifact(record.run_id, str(markdown), "report")
    return page, markdown
