"""The across-corpus citation card, and ``harness verdict`` over several finished sweeps (edges: MLflow, files).

The card cites the configuration with the best average rank over the sweep's datasets, says whether the
evidence singles it out (the Friedman test, then Holm against every other configuration), and lists its score
and rank on each corpus. It is read from the verdict the run logged (across_corpora.json); a run from before
the verdict was logged gets it computed from its logged scores.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Optional

from harness.errors import HarnessError
from harness.review.across_section import AcrossSection, across_markdown, caveat_lines
from harness.score.across_corpora import (
    DIAGRAM_ARTIFACT, Scored, configuration_identity, configuration_label, gathered_scores, logged_verdict, verdict_of,
    verdict_payload, verdict_png,
)
from harness.track.readback import SweepRecord

CARD_NAME = "winner-across.md"


def scored_from_record(record) -> list[Scored]:
    """From a logged sweep (readback.SweepRecord): each finished configuration's score by its dataset's metric."""
    from harness.review.page import dataset_rankings

    out = []
    for ranking in dataset_rankings(record):
        for configuration in ranking.ordered:
            if configuration.status != "FINISHED":
                continue
            value = configuration.metrics.get(ranking.metric)
            out.append(Scored(ranking.dataset, configuration_identity(configuration.params),
                              configuration_label(configuration.name), float("nan") if value is None else float(value),
                              ranking.metric, record.name))
    return out


def recomputed_payload(records: list[SweepRecord]) -> dict[str, Any]:
    """The verdict over the logged scores of one or more sweeps, configurations matched by their settings."""
    gathered = gathered_scores(s for record in records for s in scored_from_record(record))
    verdict, note = verdict_of(gathered)
    payload = verdict_payload(verdict, gathered, note)
    payload["sweeps"] = {record.name: record.run_id for record in records}
    return payload


def sweep_payload(record: SweepRecord) -> tuple[dict[str, Any], Optional[bytes]]:
    payload, diagram = logged_verdict(record)
    if payload is None:
        payload = recomputed_payload([record])
        diagram = verdict_png(payload)
    return payload, diagram


def _p(value: float) -> str:
    return "p < 0.001" if value < 0.001 else f"p = {value:.3f}"


def across_card_markdown(payload: dict[str, Any], record: SweepRecord) -> str:
    from harness.review.cite import library_versions, tool_commit

    best = payload["best"]
    f = payload["friedman"]
    standing = ("singled out by the evidence" if payload["winner"] == best else
                "best by average rank, but NOT singled out by the evidence (see the test and the comparisons below)")
    lines = [f"# Across-corpus citation: {best}", "",
             f"**Claim.** Over {len(payload['datasets'])} datasets ({', '.join(payload['datasets'])}), ranked by "
             f"{payload['metric']}, `{best}` has the best average rank, {payload['average_ranks'][best]:.2f} "
             f"among {len(payload['configurations'])} configurations: {standing}.", "",
             f"**Verdict.** {payload['headline']}", "",
             f"**Test.** {payload['test']} Friedman chi-square {_p(f['chi2_p_value'])}; Iman-Davenport F {_p(f['f_p_value'])}.", "",
             f"**Nemenyi critical difference** (alpha = {payload['alpha']}): {payload['critical_difference']:.3f}.", "",
             "## Per-corpus scores of the cited configuration", "",
             "| dataset | score | rank on that dataset | sweep |", "|---|---|---|---|"]
    for dataset in payload["datasets"]:
        lines.append(f"| {dataset} | {payload['scores'][dataset][best]:.4f} | {payload['ranks'][dataset][best]:g} of "
                     f"{len(payload['configurations'])} | {payload['sources'].get(dataset, record.name)} |")
    lines += ["", "## Against the best, Holm-corrected", "", "| configuration | average rank | z | adjusted p | finding |",
              "|---|---|---|---|---|"]
    lines += [f"| {c['configuration']} | {payload['average_ranks'][c['configuration']]:.2f} | {c['z']:.2f} | "
              f"{_p(c['p_holm'])} | {'significantly worse' if c['significant'] else 'not significantly different'} |"
              for c in payload["against_best"]]
    if payload.get("bayesian"):
        lines += ["", payload["bayesian"]["sentence"]]
    elif payload.get("bayes_note"):
        lines += ["", f"Bayesian comparison of the two finalists not made: {payload['bayes_note']}."]
    lines += ["", "## Settings", "", "```json", json.dumps(payload["settings"][best], indent=2, sort_keys=True), "```",
              "", "## Caveats", ""] + [f"- {c}" for c in caveat_lines(payload) or ["none"]]
    versions = ", ".join(f"{k} {v}" for k, v in library_versions().items())
    lines += ["", "## Provenance", "", f"- sweep run `{record.run_id}` of `{record.name}` in `{record.tracking_uri}`",
              f"- tool commit {tool_commit()}; {versions}"]
    return "\n".join(lines) + "\n"


def write_across_card(record: SweepRecord, reports_dir: Path) -> Path:
    from harness.review.build import report_folder

    payload, _ = sweep_payload(record)
    folder = report_folder(reports_dir, record)
    folder.mkdir(parents=True, exist_ok=True)
    card = folder / CARD_NAME
    card.write_text(across_card_markdown(payload, record))
    record.client.log_artifact(record.run_id, str(card), "citation")
    return card


def write_verdict(records: list[SweepRecord], reports_dir: Path) -> tuple[dict[str, Any], Path]:
    """``harness verdict``: the verdict over several sweeps, written as verdict.json, verdict.md and the diagram
    under RESULTS/reports/verdict-<sweeps>/."""
    from harness.review.page import safe_name

    names = list(dict.fromkeys(r.name for r in records))
    if len(names) != len(records):
        raise HarnessError("harness verdict: a sweep is named twice; name each sweep once")
    payload = recomputed_payload(records)
    folder = reports_dir / safe_name("verdict-" + "+".join(names), "verdict")
    folder.mkdir(parents=True, exist_ok=True)
    diagram = verdict_png(payload)
    (folder / DIAGRAM_ARTIFACT).write_bytes(diagram)
    (folder / "verdict.json").write_text(json.dumps(payload, indent=2))
    title = [f"# Across-corpus verdict: {', '.join(names)}", "",
             "Sweeps (newest run of each): " + ", ".join(f"{n} `{i}`" for n, i in payload["sweeps"].items())]
    (folder / "verdict.md").write_text("\n".join(title + across_markdown(AcrossSection(payload, diagram), DIAGRAM_ARTIFACT)) + "\n")
    return payload, folder
