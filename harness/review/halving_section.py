"""The report's halving section: which configurations each round of a successive-halving search cut, on how
many texts, with the score they were cut on; laid out from the halving.json the run logged. Every value escaped."""

from __future__ import annotations

import html
import json
import tempfile
from pathlib import Path
from typing import Any, Optional

SURVIVORS_NOTE = ("The leaderboards and the across-corpus verdict are on the survivors only: a configuration cut in an "
                  "early round was scored on a subsample, never on the whole corpus.")


def logged_halving(record) -> Optional[dict[str, Any]]:
    """The halving log a sweep run wrote, or None (a grid search)."""
    from harness.engine.runner import HALVING_ARTIFACT

    with tempfile.TemporaryDirectory() as folder:
        try:
            return json.loads(Path(record.client.download_artifacts(record.run_id, HALVING_ARTIFACT, folder)).read_text())
        except Exception:  # absent: not a halving search
            return None


def cut_rows(log: dict[str, Any]) -> list[list[str]]:
    """Per dataset and configuration: the round it was cut in (or 'survived'), the texts of that round, its score."""
    rows = []
    for dataset, entry in log.items():
        for step in entry["rounds"]:
            for c in step["configurations"]:
                last = step["round"] == len(entry["rounds"]) - 1
                if not c["kept"] or last:
                    value = "-" if c["value"] is None else f"{c['value']:.3f}"
                    rows.append([dataset, c["configuration"], "survived" if last else f"round {step['round']}",
                                 str(step["texts"]), f"{step['metric']} {value}"])
    return rows


def summary(log: dict[str, Any]) -> list[str]:
    return [f"{dataset}: rounds of {', '.join(str(s) for s in entry['sizes'])} texts (factor {entry['factor']}, seed "
            f"{entry['seed']}); {len(entry['rounds'][0]['configurations'])} configurations, "
            f"{len(entry['rounds'][-1]['configurations'])} survived to the whole corpus" for dataset, entry in log.items()]


def halving_html(log: Optional[dict[str, Any]]) -> str:
    if not log:
        return ""
    e = lambda v: html.escape(str(v), quote=True)  # noqa: E731
    rows = "".join("<tr>" + "".join(f"<td>{e(c)}</td>" for c in row) + "</tr>" for row in cut_rows(log))
    lines = "".join(f"<li>{e(s)}</li>" for s in summary(log))
    return f"""<section class="halving" id="halving">
<h2>Successive halving</h2>
<p><b>{e(SURVIVORS_NOTE)}</b></p><ul id="halving-rounds">{lines}</ul>
<table id="halving-cuts" class="halving-cuts"><tr><th>dataset</th><th>configuration</th><th>cut in</th><th>texts then</th><th>score then</th></tr>{rows}</table>
</section>
"""


def halving_markdown(log: Optional[dict[str, Any]]) -> list[str]:
    if not log:
        return []
    md = lambda v: html.escape(str(v), quote=False).replace("|", "\\|").replace("\n", " ")  # noqa: E731
    lines = ["", "## Successive halving", "", f"**{md(SURVIVORS_NOTE)}**", ""] + [f"- {md(s)}" for s in summary(log)]
    lines += ["", "| dataset | configuration | cut in | texts then | score then |", "|---|---|---|---|---|"]
    return lines + ["| " + " | ".join(md(c) for c in row) + " |" for row in cut_rows(log)]
