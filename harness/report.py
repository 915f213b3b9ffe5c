"""The report a reviewer reads: what was compared, what won, by how much, and what the length check says.

Analysis functions are pure (records in, tables out); ``write_report`` renders a
self-contained HTML page (images embedded, no network resources) and a Markdown
twin with its images beside it.
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass
from typing import Optional

import numpy as np

from harness.readback import ConfigurationRecord, SweepRecord

# Axes of the grid, as the params of a configuration run that set them (reduce.* and cluster.* by prefix; the
# model axis is every other param but the dataset and the sweep-wide ones). Grouping by settings, not by name
# segments, keeps apart options that a name could shorten alike.
AXES = ("model", "layers", "pooling", "transform", "reduce", "cluster")
AXIS_PARAMS = {"layers": ("layers",), "pooling": ("pooling",), "transform": ("transform", "normalize")}
NOT_MODEL = frozenset({"dataset", "seed", "storage_dtype"})
LOW_COVERAGE, HIGH_LENGTH_INDEX, MANY_TRUNCATED, FEW_SEEDS = 0.8, 0.2, 0.05, 3


def ranking_metric(record: SweepRecord) -> str:
    chosen = record.params.get("rank_by", "default")
    if chosen != "default":
        return chosen
    labelled = any("ari" in c.metrics for c in record.configurations)
    return "ari" if labelled else "silhouette"


def ranked(configurations: list[ConfigurationRecord], metric: str) -> list[ConfigurationRecord]:
    """Best first by the configuration's mean score; configurations without it last."""
    def key(c: ConfigurationRecord):
        value = c.metrics.get(metric, float("nan"))
        return (math.isnan(value), -value if not math.isnan(value) else 0.0, c.name)

    return sorted(configurations, key=key)


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
    """Warnings read off the data: ties at the top, low coverage, high length index, truncation, few seeds."""
    notes = []
    if not ordered:
        return ["no configuration finished"]
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
    seeds = winner.metrics.get("n_seeds", 1.0)
    if seeds < FEW_SEEDS:
        notes.append(f"Only {seeds:.0f} seed(s) per configuration: stability across seeds is not established "
                     "(stability_ari needs at least 2; 3 or more is better).")
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
class ReportContent:
    """Everything a report shows, computed; rendering only lays it out."""

    record: SweepRecord
    metric: str
    ordered: list[ConfigurationRecord]
    effects: dict[str, list[Effect]]
    front: list[int]
    caveats: list[str]
    images: dict[str, bytes]  # element id -> PNG
    winner_clusters: list[dict]


def _fmt(value: Optional[float], digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:.{digits}f}"


def leaderboard_rows(content: ReportContent) -> list[list[str]]:
    metric = content.metric
    rows = []
    for position, c in enumerate(content.ordered, start=1):
        m = c.metrics
        interval = f"[{_fmt(m.get(f'{metric}_ci_low'))}, {_fmt(m.get(f'{metric}_ci_high'))}]" if f"{metric}_ci_low" in m else "-"
        tie = "leader" if position == 1 else ("tied" if m.get("tied_with_leader") == 1.0 else "")
        rows.append([str(position), c.name, _fmt(m.get(metric)), interval, tie, _fmt(m.get("length_confound_index")),
                     _fmt(m.get("coverage")), _fmt(m.get("stability_ari")), _fmt(c.compute_seconds, 1)])
    return rows


LEADERBOARD_HEADER = ["rank", "configuration", "{metric}", "95% CI", "tie", "length index", "coverage", "stability", "seconds"]


def render_html(content: ReportContent) -> str:
    r, e = content.record, html.escape
    header = [h.format(metric=content.metric) for h in LEADERBOARD_HEADER]
    board = "".join("<tr>" + "".join(f"<td>{e(cell)}</td>" for cell in row) + "</tr>" for row in leaderboard_rows(content))
    cards = "".join(
        f"<li><b>{e(name)}</b>: {card.get('rows', '?')} texts, {card.get('n_classes') or 'no'} classes, "
        f"route {e(str(card.get('route', '')))}, fingerprint <code>{e(str(card.get('fingerprint', '')))}</code>, "
        f"median {card.get('token_length_quantiles', {}).get('q50', '?')} tokens, "
        f"&eta;&sup2;(log length | label) = {_fmt(card.get('length_eta2_labels'), 4)}</li>"
        for name, card in r.cards.items())
    spread = ", ".join(f"{axis} ({delta:.3f})" for axis, delta in axis_spread(content.effects))
    clusters = "".join(f"<tr><td>{row['cluster']}</td><td>{row['size']}</td><td>{row['median_tokens']:.0f}</td>"
                       f"<td>{_fmt(row['npmi'], 2)}</td><td>{e(row['top_terms'])}</td></tr>" for row in content.winner_clusters)
    notes = "".join(f"<li>{e(note)}</li>" for note in content.caveats) or "<li>none</li>"

    def image(element: str, alt: str) -> str:
        if element not in content.images:
            return f"<p id='{element}'><i>not available: {e(alt)}</i></p>"
        data = base64.b64encode(content.images[element]).decode()
        return f"<img id='{element}' alt='{e(alt)}' src='data:image/png;base64,{data}'>"

    winner = content.ordered[0].name if content.ordered else "none"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{e(r.name)}: sweep report</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em auto; max-width: 1200px; color: #222; }}
table {{ border-collapse: collapse; font-size: 13px; }} td, th {{ border: 1px solid #ccc; padding: 3px 6px; }}
th {{ background: #f0f0f0; }} img {{ max-width: 100%; }} code {{ font-size: 12px; }}
.caveats li {{ color: #8a3b12; }}
</style></head><body>
<h1 id="title">Sweep report: {e(r.name)}</h1>
<p id="question"><b>Question.</b> {e(r.tags.get("harness.question") or "(none given)")}</p>
<p><b>Winner.</b> <code>{e(winner)}</code>, ranked by {e(content.metric)} (mean over seeds). MLflow run <code>{e(r.run_id)}</code> in <code>{e(r.tracking_uri)}</code>.</p>
<h2>Datasets</h2><ul id="datasets">{cards}</ul>
<h2>Grid</h2><pre id="grid">{e(r.sweep_text)}</pre>
<h2>Leaderboard</h2>
<table id="leaderboard"><tr>{"".join(f"<th>{e(h)}</th>" for h in header)}</tr>{board}</table>
<p>tie: the paired bootstrap interval of the difference to the leader contains 0; no correction for many comparisons.</p>
<h2>Which choice matters</h2>
<p>Mean {e(content.metric)} of each option over the rest of the grid (95 % interval over configurations). Axes by spread: {e(spread)}.</p>
{image("main-effects", "main effects plot")}
<h2>Quality against cost</h2>{image("quality-cost", "score against compute time, Pareto front marked")}
<h2>The length picture</h2>
<p>Token counts per cluster: the winner and the most length-confounded configuration.</p>
{image("length-plot", "token-count distribution per cluster")}
<h2>The winner's clusters</h2>{image("cluster-map", "2-D map of the winner's clusters")}
<table id="winner-clusters"><tr><th>cluster</th><th>size</th><th>median tokens</th><th>NPMI</th><th>distinctive terms</th></tr>{clusters}</table>
<h2>Caveats</h2><ul id="caveats" class="caveats">{notes}</ul>
</body></html>
"""


def render_markdown(content: ReportContent, image_paths: dict[str, str]) -> str:
    r = content.record
    header = [h.format(metric=content.metric) for h in LEADERBOARD_HEADER]
    lines = [f"# Sweep report: {r.name}", "", f"**Question.** {r.tags.get('harness.question') or '(none given)'}", "",
             f"MLflow run `{r.run_id}` in `{r.tracking_uri}`.", "", "## Datasets", ""]
    lines += [f"- **{name}**: {card.get('rows', '?')} texts, {card.get('n_classes') or 'no'} classes, fingerprint "
              f"`{card.get('fingerprint', '')}`, eta2(log length | label) = {_fmt(card.get('length_eta2_labels'), 4)}"
              for name, card in r.cards.items()]
    lines += ["", "## Leaderboard", "", "| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(row) + " |" for row in leaderboard_rows(content)]
    lines += ["", "## Which choice matters", ""]
    for axis, rows in content.effects.items():
        lines.append(f"- **{axis}**: " + "; ".join(f"{x.option} {_fmt(x.mean)} [{_fmt(x.low)}, {_fmt(x.high)}]" for x in rows))
    for element, title in (("main-effects", "Main effects"), ("quality-cost", "Quality against cost"),
                           ("length-plot", "The length picture"), ("cluster-map", "The winner's clusters")):
        if element in image_paths:
            lines += ["", f"## {title}", "", f"![{title}]({image_paths[element]})"]
    lines += ["", "| cluster | size | median tokens | NPMI | distinctive terms |", "|---|---|---|---|---|"]
    lines += [f"| {c['cluster']} | {c['size']} | {c['median_tokens']:.0f} | {_fmt(c['npmi'], 2)} | {c['top_terms']} |"
              for c in content.winner_clusters]
    lines += ["", "## Caveats", ""] + [f"- {note}" for note in content.caveats or ["none"]]
    return "\n".join(lines) + "\n"
