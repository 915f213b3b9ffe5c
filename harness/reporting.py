"""Building a report or a citation card from a finished sweep (the edge: MLflow, cache, files)."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Optional

import numpy as np

from harness.errors import HarnessError
from harness.across_report import DIAGRAM_NAME as ACROSS_DIAGRAM, AcrossSection
from harness.halving_report import logged_halving
from harness.readback import ConfigurationRecord, SweepRecord
from harness.report import (
    DatasetRanking,
    DatasetSection,
    ReportContent,
    caveats,
    cluster_map_png,
    dataset_rankings,
    length_png,
    main_effects,
    main_effects_png,
    pareto_front,
    quality_cost_png,
    render_html,
    render_markdown,
    run_notes,
    safe_name,
    section_slug,
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


def dataset_section(record: SweepRecord, ranking: DatasetRanking, slug: str, with_map: bool = True) -> DatasetSection:
    """One dataset's part of the report: main effects, Pareto front, length picture, cluster map and caveats,
    all from that dataset's configurations only."""
    metric, scored = ranking.metric, [c for c in ranking.ordered if c.status == "FINISHED"]
    section = DatasetSection(ranking=ranking, slug=slug, effects=main_effects(scored, metric),
                             caveats=caveats(ranking.ordered, metric))
    section.front = pareto_front([c.compute_seconds for c in scored], [c.metrics.get(metric, float("nan")) for c in scored])
    if section.effects:
        section.images["main-effects"] = main_effects_png(section.effects, metric)
    if scored:
        section.images["quality-cost"] = quality_cost_png(scored, metric, section.front)
    winner = ranking.winner
    if winner is None or not winner.seed_run_ids:
        return section
    index = "length_confound_index" if "length_confound_index" in winner.metrics else "length_eta2_clusters"
    confounded = max(scored, key=lambda c: c.metrics.get(index, -1.0))
    tables = []
    for label, config in (("winner", winner), (f"most length-confounded ({index} {confounded.metrics.get(index, 0):.2f})", confounded)):
        table = record.artifact_table(config.seed_run_ids[0], "assignments.parquet") if config.seed_run_ids else None
        if table is not None:
            tables.append((f"{label}: {config.name.split('/', 2)[-1]}", table))
    if tables:
        section.images["length-plot"] = length_png(tables)
    described = record.artifact_table(winner.seed_run_ids[0], "clusters.parquet")
    section.winner_clusters = described.to_dict("records") if described is not None else []
    if with_map:
        xy = winner_coordinates(record, winner)
        assignments = record.artifact_table(winner.seed_run_ids[0], "assignments.parquet")
        if xy is not None and assignments is not None:
            legend = {int(r["cluster"]): str(r["top_terms"]) for r in section.winner_clusters}
            section.images["cluster-map"] = cluster_map_png(xy, assignments["cluster"].to_numpy(), legend)
    return section


def report_content(record: SweepRecord, with_map: bool = True) -> ReportContent:
    sections = [dataset_section(record, ranking, section_slug(i, ranking.dataset), with_map)
                for i, ranking in enumerate(dataset_rankings(record))]
    return ReportContent(record=record, sections=sections, run_notes=run_notes(record), across=across_section(record),
                         halving=logged_halving(record))


def across_section(record: SweepRecord) -> Optional[AcrossSection]:
    """The across-corpus verdict the sweep run logged, or None (one dataset, or a run from before it was logged)."""
    from harness.across_corpora import logged_verdict

    payload, diagram = logged_verdict(record)
    return None if payload is None else AcrossSection(payload, diagram)


def report_folder(reports_dir: Path, record: SweepRecord) -> Path:
    """RESULTS/reports/<sweep>, the name made safe: a name read from the store never leaves reports_dir."""
    folder = reports_dir / safe_name(record.name, safe_name(record.run_id, "sweep"))
    if folder.resolve().parent != reports_dir.resolve():  # cannot happen with safe_name; a guard, not a rule
        raise HarnessError(f"sweep '{record.name}': report folder {folder} would be outside {reports_dir}")
    return folder


def write_report(record: SweepRecord, reports_dir: Path, with_map: bool = True) -> tuple[Path, Path]:
    """Write report.html (self-contained) and report.md (+ PNGs) and log them to the sweep run."""
    content = report_content(record, with_map)
    folder = report_folder(reports_dir, record)
    folder.mkdir(parents=True, exist_ok=True)
    page = folder / "report.html"
    page.write_text(render_html(content))
    image_paths = {}
    for section in content.sections:
        for element, data in section.images.items():
            name = section.image_name(element)
            (folder / f"{name}.png").write_bytes(data)
            image_paths[name] = f"{name}.png"
    if content.across is not None and content.across.diagram:
        (folder / f"{ACROSS_DIAGRAM}.png").write_bytes(content.across.diagram)
        image_paths[ACROSS_DIAGRAM] = f"{ACROSS_DIAGRAM}.png"
    markdown = folder / "report.md"
    markdown.write_text(render_markdown(content, image_paths))
    record.client.log_artifact(record.run_id, str(page), "report")
    record.client.log_artifact(record.run_id, str(markdown), "report")
    return page, markdown
