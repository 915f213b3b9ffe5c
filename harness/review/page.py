"""The report a reviewer reads: what was compared, what won, by how much, and what the length check says.

Verdicts are per dataset: configurations are ranked, and everything read off a
ranking is drawn, within one dataset; a sweep over two or more datasets adds the across-corpus verdict it logged
(average ranks over datasets, harness/review/across_section.py). Analysis functions are pure (records in,
tables out); the renderers lay out a self-contained HTML page (images embedded,
no network resources, every value escaped) and a Markdown twin without raw HTML.
"""

from __future__ import annotations

import base64
import html
import io
import math
import numbers
import re
from dataclasses import dataclass, field
from typing import Optional

import numpy as np

from harness.review.across_section import DIAGRAM_NAME as ACROSS_DIAGRAM, AcrossSection, across_html, across_markdown
from harness.review.halving_section import halving_html, halving_markdown
from harness.sweep import DEFAULT_LABEL_FREE_METRIC, DEFAULT_LABELLED_METRIC
from harness.track.readback import ConfigurationRecord, SweepRecord

# Axes of the grid, as the params of a configuration run that set them (reduce.* and cluster.* by prefix; the
# model axis is every other param but the dataset and the sweep-wide ones). Grouping by settings, not by name
# segments, keeps apart options that a name could shorten alike.
AXES = ("model", "layers", "pooling", "transform", "reduce", "cluster")
AXIS_PARAMS = {"layers": ("layers",), "pooling": ("pooling",), "transform": ("transform", "normalize")}
NOT_MODEL = frozenset({"dataset", "seed", "storage_dtype"})
LOW_COVERAGE, HIGH_LENGTH_INDEX, MANY_TRUNCATED, FEW_SEEDS = 0.8, 0.2, 0.05, 3

# What the evidence step says about a configuration run (tags) beside its scores (metrics).
STABILITY_TAG, INTERVAL_SCOPE_TAG, VERDICT_TAG = "harness.stability", "harness.interval_scope", "harness.verdict"
INTERVAL_SCOPES = {"seeds_and_texts": "seeds and texts", "texts_only": "texts only"}


def ranking_metric(record: SweepRecord, dataset: str) -> str:
    """The metric a dataset's configurations are ranked by: the sweep's rank_by, else ari with labels and
    silhouette without (as the run's own leaderboard does, per dataset)."""
    chosen = record.params.get("rank_by", "default")
    if chosen != "default":
        return chosen
    card = record.cards.get(dataset, {})
    if "n_classes" in card:
        labelled = bool(card["n_classes"])
    else:
        labelled = any("ari" in c.metrics for c in record.configurations if c.dataset == dataset)
    return DEFAULT_LABELLED_METRIC if labelled else DEFAULT_LABEL_FREE_METRIC


def _score(configuration: ConfigurationRecord, metric: str) -> float:
    value = configuration.metrics.get(metric, float("nan"))
    return float("nan") if value is None else float(value)


def ranked(configurations: list[ConfigurationRecord], metric: str) -> list[ConfigurationRecord]:
    """Best first: by the rank the run logged when every configuration has one (the run's leaderboard), else by
    the mean score; configurations without a score last."""
    def by_score(c: ConfigurationRecord):
        value = _score(c, metric)
        return (math.isnan(value), -value if not math.isnan(value) else 0.0, c.name)

    if configurations and all("rank" in c.metrics for c in configurations):
        return sorted(configurations, key=lambda c: (c.metrics["rank"], by_score(c)))
    return sorted(configurations, key=by_score)


@dataclass(frozen=True)
class DatasetRanking:
    """One dataset's configurations, best first: verdicts are per dataset, never across corpora."""

    dataset: str
    metric: str
    ordered: list[ConfigurationRecord]

    @property
    def winner(self) -> Optional[ConfigurationRecord]:
        """The leader, or None when no configuration of this dataset has a score."""
        if self.ordered and not math.isnan(_score(self.ordered[0], self.metric)):
            return self.ordered[0]
        return None

    @property
    def runner_up(self) -> Optional[ConfigurationRecord]:
        return self.ordered[1] if self.winner is not None and len(self.ordered) > 1 else None


def dataset_rankings(record: SweepRecord) -> list[DatasetRanking]:
    """Per dataset, in the sweep's order: its own metric and its configurations, best first."""
    rankings = []
    for dataset in record.datasets:
        mine = [c for c in record.configurations if c.dataset == dataset]
        if mine:
            metric = ranking_metric(record, dataset)
            rankings.append(DatasetRanking(dataset, metric, ranked(mine, metric)))
    return rankings


# -- what the evidence says about one configuration ------------------------------------------------------

def valid_seeds(configuration: ConfigurationRecord, metric: str) -> tuple[Optional[int], Optional[int]]:
    """(seeds with a finite value of ``metric``, all seeds) as the run logged them; None where not logged."""
    valid, total = configuration.metrics.get(f"{metric}_valid_seeds"), configuration.metrics.get("n_seeds")
    return (None if valid is None else int(valid)), (None if total is None else int(total))


def fewer_valid_seeds(configuration: ConfigurationRecord, metric: str) -> bool:
    valid, total = valid_seeds(configuration, metric)
    return valid is not None and total is not None and valid < total


def stability_applies(configuration: ConfigurationRecord) -> bool:
    """False for a seed-free pipeline: every stage ignores the seed, so agreement across seeds says nothing."""
    return configuration.tags.get(STABILITY_TAG) != "not_applicable"


def interval_scope(configuration: ConfigurationRecord) -> Optional[str]:
    """What the interval resamples ('seeds and texts' or 'texts only'), where the run says."""
    scope = configuration.tags.get(INTERVAL_SCOPE_TAG)
    return INTERVAL_SCOPES.get(scope, scope) if scope else None


def provisional(configuration: ConfigurationRecord) -> bool:
    return configuration.tags.get(VERDICT_TAG) == "provisional"


SAFE_NAME_LENGTH = 100


def safe_name(name: str, fallback: str = "unnamed") -> str:
    """A file or folder name made of letters, digits, '_', '-' and inner dots only (at most 100 characters), so
    that no name read from a store (a sweep, a dataset, a run id) can point outside the folder it is joined to."""
    cleaned = re.sub(r"[^A-Za-z0-9_.-]+", "_", str(name))
    cleaned = re.sub(r"\.{2,}", ".", cleaned)[:SAFE_NAME_LENGTH].strip("._-")
    return cleaned or fallback


def distinct_safe_names(names: list[str]) -> dict[str, str]:
    """Each name's safe_name, numbered where two names would otherwise share one (a/b and a?b both give a_b)."""
    safe = {name: safe_name(name) for name in names}
    taken = list(safe.values())
    return {name: value if taken.count(value) == 1 else f"{value}-{index}"
            for index, (name, value) in enumerate(safe.items())}


def axis_settings(params: dict[str, str], axis: str) -> dict[str, str]:
    """The params of a configuration that belong to one axis of the grid."""
    if axis in AXIS_PARAMS:
        return {k: params.get(k, "") for k in AXIS_PARAMS[axis]}
    if axis in ("reduce", "cluster"):
        return {k: v for k, v in params.items() if k.startswith(f"{axis}.")}
    taken = {k for names in AXIS_PARAMS.values() for k in names}
    return {k: v for k, v in params.items()
            if k not in NOT_MODEL and k not in taken and not k.startswith(("reduce.", "cluster.", "evidence."))}


def axis_option(configuration: ConfigurationRecord, axis: str, shown: Optional[set[str]] = None) -> str:
    """A readable label of the configuration's option on an axis: the settings in ``shown`` (those that vary), a bare
    value when only one does."""
    settings = axis_settings(configuration.params, axis)
    keys = [k for k in settings if shown is None or k in shown] or list(settings)
    if len(keys) == 1:
        return str(settings[keys[0]])
    return ", ".join(f"{k.split('.', 1)[-1]}={settings[k]}" for k in keys)


@dataclass(frozen=True)
class Effect:
    option: str
    mean: float
    low: float
    high: float
    n: int


def main_effects(configurations: list[ConfigurationRecord], metric: str) -> dict[str, list[Effect]]:
    """For each axis with more than one option: the mean score of each option over the rest of the grid,
    with a normal-approximation 95 % interval (mean +- 1.96 standard errors over configurations)."""
    effects: dict[str, list[Effect]] = {}
    for axis in AXES:
        options = [axis_settings(c.params, axis) for c in configurations]
        varying = {k for k in set().union(*options) if len({str(o.get(k)) for o in options}) > 1} if options else set()
        groups: dict[str, list[float]] = {}
        for c in configurations:
            value = c.metrics.get(metric, float("nan"))
            if not math.isnan(value):
                groups.setdefault(axis_option(c, axis, varying), []).append(value)
        if len(groups) < 2:
            continue
        rows = []
        for option, values in groups.items():
            values = np.array(values)
            half = 1.96 * values.std(ddof=1) / math.sqrt(values.size) if values.size > 1 else float("nan")
            rows.append(Effect(option, float(values.mean()), float(values.mean() - half), float(values.mean() + half), values.size))
        effects[axis] = sorted(rows, key=lambda e: -e.mean)
    return effects


def axis_spread(effects: dict[str, list[Effect]]) -> list[tuple[str, float]]:
    """Axes ordered by how much the choice matters: the range of their options' mean scores."""
    return sorted(((axis, rows[0].mean - rows[-1].mean) for axis, rows in effects.items()), key=lambda a: -a[1])


def pareto_front(costs: list[float], scores: list[float]) -> list[int]:
    """Indices of the points that no other point beats on both cost (lower) and score (higher)."""
    front = []
    for i, (cost, score) in enumerate(zip(costs, scores)):
        dominated = any(c <= cost and s >= score and (c < cost or s > score) for c, s in zip(costs, scores))
        if not dominated and not math.isnan(score):
            front.append(i)
    return sorted(front, key=lambda i: costs[i])


def caveats(ordered: list[ConfigurationRecord], metric: str) -> list[str]:
    """Warnings read off one dataset's ranking: failed configurations, ties at the top, low coverage, high length
    index, truncation, few or invalid seeds, a provisional verdict."""
    notes = []
    scored = [c for c in ordered if not math.isnan(_score(c, metric))]
    failed = [c for c in ordered if c.status != "FINISHED"]
    if failed:
        notes.append(f"{len(failed)} configuration(s) did not finish (a seed run failed or was interrupted); they have "
                     f"no scores and are ranked last: {', '.join(c.name for c in failed[:5])}{' ...' if len(failed) > 5 else ''}.")
    if not scored:
        return notes + ["no configuration finished"]
    winner = ordered[0]
    tied = [c for c in ordered[1:] if c.metrics.get("tied_with_leader") == 1.0]
    if tied:
        notes.append(f"{len(tied)} configuration(s) are tied with the winner on {metric} (paired bootstrap interval of "
                     f"the difference contains 0): {', '.join(c.name for c in tied[:5])}{' ...' if len(tied) > 5 else ''}. "
                     "The data do not separate them; choose among them on cost, stability or interpretability.")
    if winner.metrics.get("coverage", 1.0) < LOW_COVERAGE:
        notes.append(f"The winner leaves {1 - winner.metrics['coverage']:.0%} of texts as noise (coverage "
                     f"{winner.metrics['coverage']:.2f}); its scores on clustered points only are the *_clustered metrics.")
    if winner.metrics.get("length_confound_index", 0.0) > HIGH_LENGTH_INDEX:
        notes.append(f"The winner's clusters carry length beyond topic: length-confound index "
                     f"{winner.metrics['length_confound_index']:.2f} (0 = none, 1 = clusters are length bins). "
                     "See the length picture above; a transform such as remove_length may help.")
    if winner.metrics.get("truncated_fraction", 0.0) > MANY_TRUNCATED:
        notes.append(f"{winner.metrics['truncated_fraction']:.0%} of texts were longer than the model's maximum length "
                     "and were cut; consider long_texts: chunk_mean.")
    if winner.metrics.get("split_fraction", 0.0) > MANY_TRUNCATED:  # long_texts: chunk_mean: nothing cut
        notes.append(f"{winner.metrics['split_fraction']:.0%} of texts were longer than the model's maximum length and "
                     f"were split into windows ({winner.metrics.get('windows_per_text_mean', float('nan')):.1f} per text "
                     "on average) whose vectors were averaged; nothing was cut.")
    notes += seed_caveats(ordered, metric)
    return notes


def seed_caveats(ordered: list[ConfigurationRecord], metric: str) -> list[str]:
    """What the seeds do and do not back: a provisional verdict, scores averaged over fewer seeds than ran,
    stability that does not apply."""
    notes = []
    winner = ordered[0]
    seeds = winner.metrics.get("n_seeds", 1.0)
    if provisional(winner):
        notes.append(f"Provisional verdict: {seeds:.0f} seed(s) per configuration, fewer than {FEW_SEEDS}. The intervals "
                     f"and tie flags cover {interval_scope(winner) or 'texts only'}, not the spread over seeds; run "
                     f"{FEW_SEEDS} or more seeds before citing this winner.")
    elif seeds < FEW_SEEDS:
        notes.append(f"Only {seeds:.0f} seed(s) per configuration: stability across seeds is not established "
                     "(stability_ari needs at least 2; 3 or more is better).")
    short = [c for c in ordered if fewer_valid_seeds(c, metric)]
    if short:
        shown = ", ".join(f"{c.name} ({valid_seeds(c, metric)[0]} of {valid_seeds(c, metric)[1]})" for c in short[:5])
        notes.append(f"{len(short)} configuration(s) have a finite {metric} on fewer seeds than they ran, and their mean "
                     f"is over those seeds only: {shown}{' ...' if len(short) > 5 else ''}."
                     + (" The winner is one of them." if any(c is winner for c in short) else ""))
    seed_free = [c for c in ordered if not stability_applies(c)]
    if seed_free and metric == "stability_ari":
        notes.append(f"stability_ari does not apply to {len(seed_free)} seed-free configuration(s) (every stage ignores "
                     "the seed, so agreement across seeds is 1 by construction); they have no stability score.")
    return notes


def run_notes(record: SweepRecord) -> list[str]:
    """What the reader must know about the run itself before its numbers: failed or unfinished trials."""
    planned = record.params.get("n_trials", "?")
    failed = [t for t in record.unfinished_trials if t.status == "FAILED"]
    notes = []
    if failed or record.status == "FAILED":
        shown = "; ".join(f"{t.name}: {t.error or 'no error recorded'}" for t in failed[:10])
        notes.append(f"{len(failed)} of {planned} trials of this run FAILED: a configuration with a failed seed has no "
                     f"scores and is ranked last{': ' + shown if shown else '.'}{' ...' if len(failed) > 10 else ''}")
    if record.status == "KILLED":
        notes.append(f"This run was interrupted (status KILLED) before it finished: {len(record.configurations)} "
                     f"configuration run(s) exist for {planned} planned trials; what it did not reach is missing here.")
    elif record.status == "RUNNING":
        notes.append("This run has status RUNNING: it is still going, or its process died without closing it; "
                     "what follows may be incomplete.")
    elif record.status not in ("FINISHED", "FAILED"):
        notes.append(f"This run ended with status {record.status}; what follows may be incomplete.")
    return notes


def _png(figure) -> bytes:
    from harness.plots import pyplot

    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100)
    pyplot().close(figure)
    return buffer.getvalue()


def main_effects_png(effects: dict[str, list[Effect]], metric: str) -> bytes:
    plt = __import__("harness.plots", fromlist=["pyplot"]).pyplot()
    figure, axes = plt.subplots(1, max(len(effects), 1), figsize=(4.2 * max(len(effects), 1), 3.6), squeeze=False)
    for ax, (axis, rows) in zip(axes[0], effects.items()):
        y = np.arange(len(rows))
        means = np.array([r.mean for r in rows])
        errors = np.array([[r.mean - r.low, r.high - r.mean] for r in rows]).T
        ax.barh(y, means, xerr=np.nan_to_num(errors), color="#6a9fd4", capsize=3)
        ax.set_yticks(y, [r.option for r in rows], fontsize=8)
        ax.invert_yaxis()
        ax.set_title(axis, fontsize=10)
        ax.set_xlabel(f"mean {metric}", fontsize=8)
    figure.tight_layout()
    return _png(figure)


def quality_cost_png(configurations: list[ConfigurationRecord], metric: str, front: list[int]) -> bytes:
    plt = __import__("harness.plots", fromlist=["pyplot"]).pyplot()
    figure, ax = plt.subplots(figsize=(7, 4.2))
    costs = [c.compute_seconds for c in configurations]
    scores = [c.metrics.get(metric, float("nan")) for c in configurations]
    ax.scatter(costs, scores, color="#999999", s=18, label="configuration")
    ax.plot([costs[i] for i in front], [scores[i] for i in front], "-o", color="#d0543c", ms=5, label="Pareto front")
    for i in front:
        ax.annotate(configurations[i].name.split("/", 2)[-1], (costs[i], scores[i]), fontsize=6, xytext=(3, 3),
                    textcoords="offset points")
    ax.set_xlabel("compute seconds (encode + reduce + cluster, mean over seeds)")
    ax.set_ylabel(metric)
    ax.legend(fontsize=8)
    figure.tight_layout()
    return _png(figure)


def length_png(tables: list[tuple[str, object]]) -> bytes:
    from harness.plots import draw_token_counts_by_cluster, pyplot

    plt = pyplot()
    figure, axes = plt.subplots(1, len(tables), figsize=(6.5 * len(tables), 4), squeeze=False)
    for ax, (title, table) in zip(axes[0], tables):
        draw_token_counts_by_cluster(ax, table["token_count"].to_numpy(), table["cluster"].to_numpy(), title)
    figure.tight_layout()
    return _png(figure)


def cluster_map_png(xy: np.ndarray, clusters: np.ndarray, legend: dict[int, str]) -> bytes:
    from harness.plots import pyplot

    plt = pyplot()
    figure, ax = plt.subplots(figsize=(9, 6))
    noise = clusters == -1
    ax.scatter(xy[noise, 0], xy[noise, 1], s=4, color="#cccccc", label="noise")
    palette = plt.get_cmap("tab20")
    for i, cluster in enumerate(sorted(set(clusters[~noise].tolist()))):
        members = clusters == cluster
        ax.scatter(xy[members, 0], xy[members, 1], s=5, color=palette(i % 20),
                   label=f"{cluster}: {legend.get(cluster, '')[:48]}")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.legend(fontsize=6, loc="center left", bbox_to_anchor=(1.0, 0.5), markerscale=3)
    figure.tight_layout()
    return _png(figure)


@dataclass
class DatasetSection:
    """Everything the report shows about one dataset, computed: its ranking and what is read off it."""

    ranking: DatasetRanking
    slug: str  # unique, safe for element ids and file names
    effects: dict[str, list[Effect]] = field(default_factory=dict)
    front: list[int] = field(default_factory=list)
    caveats: list[str] = field(default_factory=list)
    images: dict[str, bytes] = field(default_factory=dict)  # element -> PNG
    missing: dict[str, str] = field(default_factory=dict)  # element -> why it is not shown
    winner_clusters: list[dict] = field(default_factory=list)

    @property
    def dataset(self) -> str:
        return self.ranking.dataset

    @property
    def metric(self) -> str:
        return self.ranking.metric

    @property
    def ordered(self) -> list[ConfigurationRecord]:
        return self.ranking.ordered

    def image_name(self, element: str) -> str:
        return f"{element}-{self.slug}"


@dataclass
class ReportContent:
    """Everything a report shows, computed; rendering only lays it out."""

    record: SweepRecord
    sections: list[DatasetSection]
    run_notes: list[str] = field(default_factory=list)
    across: Optional[AcrossSection] = None  # the across-corpus verdict the run logged (two or more datasets)
    halving: Optional[dict] = None  # the rounds of a successive-halving search, as the run logged them


def section_slug(index: int, dataset: str) -> str:
    return f"d{index}-{safe_name(dataset, 'dataset')}"


def _fmt(value: Optional[float], digits: int = 3) -> str:
    """A number to ``digits`` places, '-' for none or NaN; anything else (a card edited by hand) as text."""
    if value is None or (isinstance(value, numbers.Real) and math.isnan(value)):
        return "-"
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        return f"{value:.{digits}f}"
    return str(value)


LEADERBOARD_HEADER = ["rank", "configuration", "{metric}", "seeds", "95% CI", "interval covers", "tie", "length index",
                      "coverage", "stability", "seconds"]


def leaderboard_rows(section: DatasetSection) -> list[list[str]]:
    """One dataset's leaderboard as text cells, with the evidence flags: valid seeds, interval scope, provisional
    verdict, stability not applicable, failed configurations."""
    metric = section.metric
    rows = []
    for position, c in enumerate(section.ordered, start=1):
        m = c.metrics
        if c.status != "FINISHED":
            rows.append([str(position), c.name, "failed" if c.status == "FAILED" else c.status.lower()]
                        + ["-"] * (len(LEADERBOARD_HEADER) - 3))
            continue
        valid, total = valid_seeds(c, metric)
        seeds = "-" if total is None else (f"{valid} of {total} valid" if fewer_valid_seeds(c, metric) else f"{total}")
        interval = f"[{_fmt(m.get(f'{metric}_ci_low'))}, {_fmt(m.get(f'{metric}_ci_high'))}]" if f"{metric}_ci_low" in m else "-"
        tie = "leader" if position == 1 else ("tied" if m.get("tied_with_leader") == 1.0 else "")
        if position == 1 and provisional(c):
            tie = "leader (provisional)"
        stability = _fmt(m.get("stability_ari")) if stability_applies(c) else "n/a (seed-free)"
        rows.append([str(position), c.name, _fmt(m.get(metric)), seeds, interval, interval_scope(c) or "-", tie,
                     _fmt(m.get("length_confound_index")), _fmt(m.get("coverage")), stability, _fmt(c.compute_seconds, 1)])
    return rows


def winner_line(section: DatasetSection) -> str:
    winner = section.ranking.winner
    if winner is None:
        return f"{section.dataset}: no configuration finished"
    flags = " (provisional: fewer than 3 seeds)" if provisional(winner) else ""
    return f"{section.dataset}: {winner.name}, {section.metric} {_fmt(winner.metrics.get(section.metric))}{flags}"


TIE_NOTE = "tie: the paired bootstrap interval of the difference to the leader contains 0; no correction for many comparisons."
STABILITY_NOTE = ("stability n/a (seed-free): every stage of that pipeline ignores the seed, so agreement across seeds "
                  "is 1 by construction and is not reported.")
SEEDS_NOTE = "seeds: how many seeds the mean is over; 'k of n valid' where only k gave a finite value."
EFFECTS_NOTE = "Mean {metric} of each option over the rest of this dataset's grid (95 % interval over configurations)."


def _e(value) -> str:
    """Every value written into the page goes through here: text, numbers, names read from the store."""
    return html.escape(str(value), quote=True)


def _html_list(items: list[str], element_id: str, css: str = "") -> str:
    body = "".join(f"<li>{_e(item)}</li>" for item in items) or "<li>none</li>"
    return f"<ul id='{_e(element_id)}' class='{_e(css)}'>{body}</ul>"


def _html_image(section: DatasetSection, element: str, alt: str) -> str:
    element_id = _e(section.image_name(element))
    if element not in section.images:
        why = f": {section.missing[element]}" if element in section.missing else ""
        return f"<p id='{element_id}' class='{_e(element)}'><i>not available: {_e(alt)}{_e(why)}</i></p>"
    data = base64.b64encode(section.images[element]).decode("ascii")
    return f"<img id='{element_id}' class='{_e(element)}' alt='{_e(alt)}' src='data:image/png;base64,{data}'>"


def _html_section(section: DatasetSection) -> str:
    header = [h.format(metric=section.metric) for h in LEADERBOARD_HEADER]
    board = "".join("<tr>" + "".join(f"<td>{_e(cell)}</td>" for cell in row) + "</tr>" for row in leaderboard_rows(section))
    spread = ", ".join(f"{axis} ({delta:.3f})" for axis, delta in axis_spread(section.effects))
    clusters = "".join("<tr>" + "".join(f"<td>{_e(cell)}</td>" for cell in (
        row.get("cluster"), row.get("size"), _fmt(row.get("median_tokens"), 0), _fmt(row.get("npmi"), 2), row.get("top_terms")))
        + "</tr>" for row in section.winner_clusters)
    effects = "".join("<tr>" + "".join(f"<td>{_e(cell)}</td>" for cell in (
        axis, x.option, _fmt(x.mean), f"[{_fmt(x.low)}, {_fmt(x.high)}]", x.n)) + "</tr>"
        for axis, rows in section.effects.items() for x in rows)
    slug = _e(section.slug)
    return f"""<section class="dataset" id="dataset-{slug}" data-dataset="{_e(section.dataset)}">
<h2>Dataset {_e(section.dataset)}</h2>
<p class="winner"><b>Winner.</b> {_e(winner_line(section))}; ranked by {_e(section.metric)} (mean over seeds).</p>
<h3>Leaderboard</h3>
<table id="leaderboard-{slug}" class="leaderboard"><tr>{"".join(f"<th>{_e(h)}</th>" for h in header)}</tr>{board}</table>
<p>{_e(TIE_NOTE)} {_e(SEEDS_NOTE)} {_e(STABILITY_NOTE)}</p>
<h3>Which choice matters</h3>
<p>{_e(EFFECTS_NOTE.format(metric=section.metric))} Axes by spread: {_e(spread or "-")}.</p>
{_html_image(section, "main-effects", "main effects plot")}
<table id="effects-{slug}" class="effects"><tr><th>axis</th><th>option</th><th>mean</th><th>95% interval</th><th>configurations</th></tr>{effects}</table>
<h3>Quality against cost</h3>{_html_image(section, "quality-cost", "score against compute time, Pareto front marked")}
<h3>The length picture</h3>
<p>Token counts per cluster: the winner and the most length-confounded configuration of this dataset.</p>
{_html_image(section, "length-plot", "token-count distribution per cluster")}
<h3>The winner's clusters</h3>{_html_image(section, "cluster-map", "2-D map of the winner's clusters")}
<table id="winner-clusters-{slug}" class="winner-clusters"><tr><th>cluster</th><th>size</th><th>median tokens</th><th>NPMI</th><th>distinctive terms</th></tr>{clusters}</table>
<h3>Caveats</h3>{_html_list(section.caveats, f"caveats-{section.slug}", "caveats")}
</section>
"""


def _card_line(name: str, card: dict) -> str:
    quantiles = card.get("token_length_quantiles") or {}
    return (f"{name}: {card.get('rows', '?')} texts, {card.get('n_classes') or 'no'} classes, route "
            f"{card.get('route', '')}, fingerprint {card.get('fingerprint', '')}, median {quantiles.get('q50', '?')} tokens, "
            f"η²(log length | label) = {_fmt(card.get('length_eta2_labels'), 4)}")


def render_html(content: ReportContent) -> str:
    r = content.record
    cards = "".join(f"<li>{_e(_card_line(name, card))}</li>" for name, card in r.cards.items())
    winners = "".join(f"<li>{_e(winner_line(section))}</li>" for section in content.sections) or "<li>none</li>"
    status = (f"<div id='run-status' class='run-status'><b>This run is not complete.</b>{_html_list(content.run_notes, 'run-notes')}</div>"
              if content.run_notes else "<div id='run-status' class='run-status-ok'></div>")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{_e(r.name)}: sweep report</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em auto; max-width: 1200px; color: #222; }}
table {{ border-collapse: collapse; font-size: 13px; }} td, th {{ border: 1px solid #ccc; padding: 3px 6px; }}
th {{ background: #f0f0f0; }} img {{ max-width: 100%; }} code {{ font-size: 12px; }}
.caveats li, .run-status {{ color: #8a3b12; }} section.dataset {{ border-top: 2px solid #888; margin-top: 2em; }}
</style></head><body>
<h1 id="title">Sweep report: {_e(r.name)}</h1>
<p id="question"><b>Question.</b> {_e(r.tags.get("harness.question") or "(none given)")}</p>
<p id="run"><b>Run.</b> MLflow sweep run <code>{_e(r.run_id)}</code> (status {_e(r.status)}) in <code>{_e(r.tracking_uri)}</code>.</p>
{status}
<p><b>Winners, one per dataset</b> (configurations are ranked within a dataset, never across datasets):</p>
<ul id="winners">{winners}</ul>
<h2>Datasets</h2><ul id="datasets">{cards}</ul>
<h2>Grid</h2><pre id="grid">{_e(r.sweep_text)}</pre>
{halving_html(content.halving)}
{across_html(content.across)}
{"".join(_html_section(section) for section in content.sections)}
</body></html>
"""


def md_text(value) -> str:
    """Text for Markdown: no raw HTML (many viewers render it) and no table-breaking pipes or newlines."""
    return html.escape(str(value), quote=False).replace("|", "\\|").replace("\n", " ")


def render_markdown(content: ReportContent, image_paths: dict[str, str]) -> str:
    r = content.record
    lines = [f"# Sweep report: {md_text(r.name)}", "", f"**Question.** {md_text(r.tags.get('harness.question') or '(none given)')}", "",
             f"MLflow sweep run `{md_text(r.run_id)}` (status {md_text(r.status)}) in `{md_text(r.tracking_uri)}`.", ""]
    if content.run_notes:
        lines += ["**This run is not complete.**", ""] + [f"- {md_text(note)}" for note in content.run_notes] + [""]
    lines += ["**Winners, one per dataset** (ranked within a dataset, never across datasets):", ""]
    lines += [f"- {md_text(winner_line(section))}" for section in content.sections] + ["", "## Datasets", ""]
    lines += [f"- {md_text(_card_line(name, card))}" for name, card in r.cards.items()]
    lines += halving_markdown(content.halving)
    lines += across_markdown(content.across, image_paths.get(ACROSS_DIAGRAM))
    for section in content.sections:
        header = [h.format(metric=section.metric) for h in LEADERBOARD_HEADER]
        lines += ["", f"## Dataset {md_text(section.dataset)}", "", f"**Winner.** {md_text(winner_line(section))}", "",
                  "### Leaderboard", "", "| " + " | ".join(md_text(h) for h in header) + " |", "|" + "---|" * len(header)]
        lines += ["| " + " | ".join(md_text(cell) for cell in row) + " |" for row in leaderboard_rows(section)]
        lines += ["", md_text(f"{TIE_NOTE} {SEEDS_NOTE} {STABILITY_NOTE}"), "", "### Which choice matters", "",
                  md_text(EFFECTS_NOTE.format(metric=section.metric)), ""]
        for axis, rows in section.effects.items():
            lines.append(f"- **{md_text(axis)}**: " + "; ".join(
                md_text(f"{x.option} {_fmt(x.mean)} [{_fmt(x.low)}, {_fmt(x.high)}]") for x in rows))
        for element, title in (("main-effects", "Main effects"), ("quality-cost", "Quality against cost"),
                               ("length-plot", "The length picture"), ("cluster-map", "The winner's clusters")):
            name = section.image_name(element)
            if name in image_paths:
                lines += ["", f"### {title}", "", f"![{title}]({image_paths[name]})"]
            elif element in section.missing:
                lines += ["", f"### {title}", "", f"*Not available: {md_text(section.missing[element])}*"]
        lines += ["", "| cluster | size | median tokens | NPMI | distinctive terms |", "|---|---|---|---|---|"]
        lines += ["| " + " | ".join(md_text(cell) for cell in (c.get("cluster"), c.get("size"), _fmt(c.get("median_tokens"), 0),
                                                               _fmt(c.get("npmi"), 2), c.get("top_terms"))) + " |"
                  for c in section.winner_clusters]
        lines += ["", "### Caveats", ""] + [f"- {md_text(note)}" for note in section.caveats or ["none"]]
    return "\n".join(lines) + "\n"
