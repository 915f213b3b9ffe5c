"""Ranking configurations per dataset, flagging ties with the leader, and rendering the ranking as text."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from harness.score.describe import SHORT_TEXT_WORDS, coherence_is_meaningful, median_words
from harness.score.evidence import (
    BOOTSTRAPPED,
    SCOPE_TAG,
    SCOPE_TEXTS_ONLY,
    SEED_LEVEL_MINIMUM,
    STABILITY_TAG,
    VERDICT_TAG,
    tied_with,
)
from harness.sweep import DEFAULT_LABEL_FREE_METRIC, DEFAULT_LABELLED_METRIC

COHERENCE_TAG, MEDIAN_WORDS_TAG = "harness.coherence", "harness.median_words"


@dataclass
class RankedRow:
    rank: int
    configuration: Any  # runner.ConfigurationResult
    value: float
    interval: tuple[float, float] | None = None
    tied: bool | None = None  # None: no paired bootstrap for this metric, or this row is the leader
    difference_interval: tuple[float, float] | None = None
    valid_seeds: int | None = None  # seeds with a finite value of the ranking metric (None: not a per-seed mean)
    n_seeds: int | None = None

    @property
    def short_of_seeds(self) -> bool:
        """Ranked on a mean over fewer seeds than the configuration ran (the others gave NaN)."""
        return self.valid_seeds is not None and self.n_seeds is not None and self.valid_seeds < self.n_seeds


@dataclass
class Ranking:
    dataset: str
    metric: str
    rows: list[RankedRow] = field(default_factory=list)
    level: float = 0.95
    median_words: float | None = None  # words per text in the dataset (for the coherence caveat)

    @property
    def winner(self) -> RankedRow | None:
        return self.rows[0] if self.rows else None

    @property
    def short_texts(self) -> bool:
        """Whether the texts are too short for NPMI to read as a coherence level."""
        return self.median_words is not None and not coherence_is_meaningful(self.median_words)

    @property
    def tags(self) -> dict[str, str]:
        """Tags for each configuration run of this dataset: its median length, and whether coherence is meaningful."""
        if self.median_words is None:
            return {}
        tags = {MEDIAN_WORDS_TAG: f"{self.median_words:g}"}
        if self.short_texts:
            tags[COHERENCE_TAG] = "not_meaningful"
        return tags

    @property
    def provisional(self) -> bool:
        """Whether the verdict rests on fewer than SEED_LEVEL_MINIMUM seeds (any configuration of the dataset)."""
        return any(row.configuration.tags.get(VERDICT_TAG) == "provisional" for row in self.rows)

    @property
    def texts_only(self) -> bool:
        """Whether the intervals and tie flags cover text sampling only (not the spread over seeds)."""
        return any(row.configuration.tags.get(SCOPE_TAG) == SCOPE_TEXTS_ONLY for row in self.rows)


def ranking_metric(rank_by: str | None, labelled: bool) -> str:
    if rank_by is not None:
        return rank_by
    return DEFAULT_LABELLED_METRIC if labelled else DEFAULT_LABEL_FREE_METRIC


def _value(configuration, metric: str) -> float:
    value = configuration.metrics.get(metric, float("nan"))
    return float("nan") if value is None else float(value)


def rank_configurations(configurations: list, sweep, corpora: dict) -> dict[str, Ranking]:
    """Per dataset: configurations best first by the mean over seeds; runners-up tied with the leader where the
    paired bootstrap interval of the difference contains 0 (bootstrapped metrics only)."""
    rankings: dict[str, Ranking] = {}
    for configuration in configurations:
        dataset = configuration.dataset
        if dataset not in rankings:
            metric = ranking_metric(sweep.rank_by, corpora[dataset].labels is not None)
            rankings[dataset] = Ranking(dataset, metric, level=sweep.evidence.level,
                                        median_words=median_words(corpora[dataset].texts))
        metric = rankings[dataset].metric
        row = RankedRow(0, configuration, _value(configuration, metric))
        valid, n_seeds = configuration.metrics.get(f"{metric}_valid_seeds"), configuration.metrics.get("n_seeds")
        if valid is not None and n_seeds is not None:
            row.valid_seeds, row.n_seeds = int(valid), int(n_seeds)
        rankings[dataset].rows.append(row)
    for ranking in rankings.values():
        ranking.rows.sort(key=lambda r: (math.isnan(r.value), -r.value if not math.isnan(r.value) else 0.0, r.configuration.name))
        leader = ranking.rows[0] if ranking.rows else None
        for position, row in enumerate(ranking.rows, start=1):
            row.rank = position
            distributions = row.configuration.distributions
            if ranking.metric in BOOTSTRAPPED and ranking.metric in distributions:
                row.interval = (row.configuration.metrics[f"{ranking.metric}_ci_low"],
                                row.configuration.metrics[f"{ranking.metric}_ci_high"])
                if row is not leader and ranking.metric in leader.configuration.distributions:
                    row.tied, row.difference_interval = tied_with(leader.configuration.distributions[ranking.metric],
                                                                  distributions[ranking.metric], ranking.level)
    return rankings


def _stability_not_applicable(configuration) -> bool:
    return configuration.tags.get(STABILITY_TAG) == "not_applicable"


def _number(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:.{digits}f}"


def table(ranking: Ranking, limit: int | None = None) -> str:
    """Fixed-width text table of one dataset's ranking."""
    level = f"{ranking.level * 100:g}% CI"
    header = ["rank", "configuration", ranking.metric, level, "tie", "seeds", "stability_ari", "length_confound_index",
              "length_leakage_r2", "coverage", "n_clusters"]
    cells = []
    for row in ranking.rows[:limit] if limit else ranking.rows:
        metrics = row.configuration.metrics
        if not row.configuration.complete:
            cells.append([str(row.rank), row.configuration.name, "failed"] + ["-"] * (len(header) - 3))
            continue
        not_applicable = _stability_not_applicable(row.configuration)
        cells.append([
            str(row.rank), row.configuration.name,
            "n/a" if not_applicable and ranking.metric == "stability_ari" else _number(row.value),
            f"[{_number(row.interval[0])}, {_number(row.interval[1])}]" if row.interval else "-",
            "leader" if row.rank == 1 else ("tied" if row.tied else ("" if row.tied is not None else "-")),
            _seeds(row), "n/a" if not_applicable else _number(metrics.get("stability_ari")),
            _number(metrics.get("length_confound_index")), _number(metrics.get("length_leakage_r2")),
            _number(metrics.get("coverage")), _number(metrics.get("n_clusters"), 1),
        ])
    widths = [max(len(h), *(len(c[i]) for c in cells)) if cells else len(h) for i, h in enumerate(header)]
    verdict = " - provisional verdict" if ranking.provisional else ""
    lines = [f"{ranking.dataset}: ranked by {ranking.metric} (mean over seeds){verdict}",
             "  ".join(h.ljust(w) for h, w in zip(header, widths)), "  ".join("-" * w for w in widths)]
    lines += ["  ".join(c.ljust(w) for c, w in zip(cell, widths)) for cell in cells]
    return "\n".join(lines + notes(ranking))


def _seeds(row: RankedRow) -> str:
    """Seeds behind the row's score, valid / run, with '!' where some gave no value."""
    if row.valid_seeds is None:
        return "-"
    return f"{row.valid_seeds}/{row.n_seeds}" + ("!" if row.short_of_seeds else "")


def notes(ranking: Ranking) -> list[str]:
    """What the reader must know to cite this ranking: the lines printed under its table."""
    lines = []
    if any(_stability_not_applicable(row.configuration) for row in ranking.rows):
        lines.append("note: stability_ari n/a: no stage of that pipeline uses the seed (e.g. PCA + HDBSCAN), so its "
                     "seeds agree by construction; it is not ranked on stability.")
    short = [row for row in ranking.rows if row.short_of_seeds]
    if short:
        lines.append(f"note: '!' in seeds: {ranking.metric} is a mean over the seeds where it had a value (NaN on the "
                     f"others), so {len(short)} row(s) rank on fewer seeds than they ran and are less certain than "
                     "the table looks.")
    if ranking.texts_only:
        lines.append(f"note: intervals and ties cover text sampling only, not the spread over seeds (fewer than "
                     f"{SEED_LEVEL_MINIMUM} seeds); the verdict is provisional: run {SEED_LEVEL_MINIMUM} or more "
                     "seeds.")
    elif ranking.provisional:
        lines.append(f"note: fewer than {SEED_LEVEL_MINIMUM} seeds; the verdict is provisional: run "
                     f"{SEED_LEVEL_MINIMUM} or more seeds.")
    elif any(row.interval for row in ranking.rows):
        lines.append("note: intervals and ties resample seeds and texts (two-level bootstrap).")
    if ranking.short_texts:
        lines.append(f"note: npmi is not meaningful as a coherence level here: texts have a median of "
                     f"{ranking.median_words:g} words (< {SHORT_TEXT_WORDS}), and on texts this short two words of one "
                     "topic rarely share a text, so even the gold topics score below 0; compare npmi only between "
                     "configurations of this dataset.")
    return lines


def descriptions_table(rows: list[dict]) -> str:
    """The winner's clusters: size, median length, NPMI and distinctive terms."""
    lines = [f"{'cluster':>7}  {'size':>5}  {'median tokens':>13}  {'npmi':>6}  top terms"]
    for row in rows:
        lines.append(f"{row['cluster']:>7}  {row['size']:>5}  {row['median_tokens']:>13.0f}  {_number(row['npmi'], 2):>6}  {row['top_terms']}")
    return "\n".join(lines)
