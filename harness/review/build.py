"""Building a report from a finished sweep (the edge: it reads the MLflow store, and only the store).

Everything comes from what the run logged: its runs' params, metrics and tags, and artifacts such as each
seed run's assignments and the winner's 2-D map. No sweep file, corpus, model or stage cache is opened, so
a copy of the results folder reports the same anywhere."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd

from harness.engine.winner_map import MAP_INFO, MAP_LOGGED, MAP_POINTS, MAP_TAG
from harness.errors import HarnessError
from harness.review.across_section import DIAGRAM_NAME as ACROSS_DIAGRAM, AcrossSection
from harness.review.halving_section import logged_halving
from harness.review.page import (
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
from harness.track.readback import ConfigurationRecord, SweepRecord


@dataclass(frozen=True)
class LoggedMap:
    """The winner's 2-D map as the run logged it: one row per text (id, label, cluster, token_count, x, y) and where
    the points come from, with the legend (cluster -> distinctive terms)."""

    points: pd.DataFrame
    info: dict

    @property
    def xy(self) -> np.ndarray:
        return self.points[["x", "y"]].to_numpy(np.float64)

    @property
    def clusters(self) -> np.ndarray:
        return self.points["cluster"].to_numpy(np.int64)

    @property
    def legend(self) -> dict[int, str]:
        return {int(cluster): str(terms) for cluster, terms in (self.info.get("legend") or {}).items()}


NO_MAP_LOGGED = ("the run logged no map for its winner (runs made before harness computed the map at the end of a "
                 "run have none; the report does not recompute it): run the sweep again, finished trials are reused")


def logged_map(record: SweepRecord, configuration: ConfigurationRecord) -> tuple[Optional[LoggedMap], str]:
    """The map the run logged with this configuration run, or None and why there is none. Read from the store only:
    no sweep file, data, model or cache is opened, and nothing is recomputed."""
    state = configuration.tags.get(MAP_TAG)
    if state is not None and state != MAP_LOGGED:
        return None, f"the run logged no map for its winner ({state})"
    points = record.artifact_table(configuration.run_id, MAP_POINTS)
    info_text = record.artifact_text(configuration.run_id, MAP_INFO)
    if points is None or info_text is None:
        if state is None:
            return None, NO_MAP_LOGGED
        missing = MAP_POINTS if points is None else MAP_INFO
        return None, f"the run logged a map, but its {missing} cannot be read from the store's artifacts"
    try:
        info = json.loads(info_text)
    except ValueError:
        return None, f"the run's {MAP_INFO} is not valid JSON"
    if not isinstance(info, dict):
        return None, f"the run's {MAP_INFO} is not a JSON object"
    absent = [column for column in ("x", "y", "cluster") if column not in points.columns]
    if absent:
        return None, f"the run's {MAP_POINTS} lacks the column(s) {', '.join(absent)}"
    return LoggedMap(points, info), ""


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
    if not with_map:
        section.missing["cluster-map"] = "left out (harness report --no-map)"
        return section
    found, why = logged_map(record, winner)
    if found is None:
        section.missing["cluster-map"] = why
    else:
        section.images["cluster-map"] = cluster_map_png(found.xy, found.clusters, found.legend)
    return section


def report_content(record: SweepRecord, with_map: bool = True) -> ReportContent:
    sections = [dataset_section(record, ranking, section_slug(i, ranking.dataset), with_map)
                for i, ranking in enumerate(dataset_rankings(record))]
    return ReportContent(record=record, sections=sections, run_notes=run_notes(record), across=across_section(record),
                         halving=logged_halving(record))


def across_section(record: SweepRecord) -> Optional[AcrossSection]:
    """The across-corpus verdict the sweep run logged, or None (one dataset, or a run from before it was logged)."""
    from harness.score.across_corpora import logged_verdict

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
    record.log_artifact(record.run_id, page, "report")
    record.log_artifact(record.run_id, markdown, "report")
    return page, markdown
