"""The report's across-corpus section: laid out from the verdict payload the run logged (across_corpora.json)
and its critical-difference diagram. Rendering only; every value is escaped."""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass
from typing import Any, Optional

SECTION_ID = "across-corpora"
DIAGRAM_NAME = "across-corpora-cd"
INDEPENDENCE_NOTE = ("The procedure (Demšar 2006) treats the datasets as independent samples of the corpora the verdict "
                     "is meant to cover; it ranks configurations within each dataset and compares average ranks.")


@dataclass(frozen=True)
class AcrossSection:
    payload: dict[str, Any]
    diagram: Optional[bytes] = None


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _md(value) -> str:
    return html.escape(str(value), quote=False).replace("|", "\\|").replace("\n", " ")


def _p(value: float) -> str:
    return "< 0.001" if value < 0.001 else f"{value:.3f}"


def rank_rows(payload: dict[str, Any]) -> list[list[str]]:
    """Per configuration, best first: average rank, then its score on each dataset."""
    return [[name, f"{rank:.2f}", *(f"{payload['scores'][d][name]:.3f}" for d in payload["datasets"])]
            for name, rank in payload["average_ranks"].items()]


def holm_rows(payload: dict[str, Any]) -> list[list[str]]:
    return [[c["configuration"], f"{c['z']:.2f}", _p(c["p_value"]), _p(c["p_holm"]),
             "significantly worse" if c["significant"] else "not significantly different"] for c in payload["against_best"]]


def caveat_lines(payload: dict[str, Any]) -> list[str]:
    return [*payload["caveats"], *(f"Left out: {d}" for d in payload.get("dropped", []))]


def bayes_line(payload: dict[str, Any]) -> str:
    if payload.get("bayesian"):
        return payload["bayesian"]["sentence"]
    return f"Bayesian comparison of the two finalists not made: {payload.get('bayes_note') or 'not asked for'}."


def across_html(section: Optional[AcrossSection]) -> str:
    if section is None:
        return ""
    p = section.payload
    image = (f"<img id='{DIAGRAM_NAME}' class='cd-diagram' alt='critical-difference diagram' "
             f"src='data:image/png;base64,{base64.b64encode(section.diagram).decode('ascii')}'>"
             if section.diagram else f"<p id='{DIAGRAM_NAME}'><i>not available: critical-difference diagram</i></p>")
    header = "".join(f"<th>{_e(h)}</th>" for h in ["configuration", "average rank", *p["datasets"]])
    ranks = "".join("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in row) + "</tr>" for row in rank_rows(p))
    holm = "".join("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in row) + "</tr>" for row in holm_rows(p))
    groups = "; ".join("{" + ", ".join(g) + "}" for g in p["groups"]) or "none: every pair differs"
    caveats = "".join(f"<li>{_e(c)}</li>" for c in caveat_lines(p)) or "<li>none</li>"
    return f"""<section class="across" id="{SECTION_ID}">
<h2>Across corpora</h2>
<p class="across-headline"><b>Verdict.</b> {_e(p['headline'])}</p>
<p class="across-test" id="across-test">{_e(p['test'])}</p>
{image}
<p>Average ranks by {_e(p['metric'])} (1 = best; ties share the average rank), and each configuration's score per dataset:</p>
<table id="across-ranks" class="across-ranks"><tr>{header}</tr>{ranks}</table>
<p id="across-cd">Nemenyi critical difference at alpha = {_e(p['alpha'])}: q = {p['q_alpha']:.3f}, CD = {p['critical_difference']:.3f}.
Not significantly different (joined by a bar in the diagram): {_e(groups)}.</p>
<h3>Against the best ({_e(p['best'])}), Holm-corrected</h3>
<table id="across-holm" class="across-holm"><tr><th>configuration</th><th>z</th><th>p</th><th>Holm-adjusted p</th><th>finding</th></tr>{holm}</table>
<p id="across-bayes">{_e(bayes_line(p))}</p>
<p>{_e(INDEPENDENCE_NOTE)}</p>
<h3>Caveats</h3><ul id="across-caveats" class="caveats">{caveats}</ul>
</section>
"""


def across_markdown(section: Optional[AcrossSection], image_path: Optional[str]) -> list[str]:
    if section is None:
        return []
    p = section.payload
    header = ["configuration", "average rank", *p["datasets"]]
    lines = ["", "## Across corpora", "", f"**Verdict.** {_md(p['headline'])}", "", _md(p["test"]), ""]
    if image_path:
        lines += [f"![Critical-difference diagram]({image_path})", ""]
    lines += ["| " + " | ".join(_md(h) for h in header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(_md(c) for c in row) + " |" for row in rank_rows(p)]
    lines += ["", _md(f"Nemenyi critical difference at alpha = {p['alpha']}: q = {p['q_alpha']:.3f}, "
                      f"CD = {p['critical_difference']:.3f}."), "",
              f"### Against the best ({_md(p['best'])}), Holm-corrected", "",
              "| configuration | z | p | Holm-adjusted p | finding |", "|---|---|---|---|---|"]
    lines += ["| " + " | ".join(_md(c) for c in row) + " |" for row in holm_rows(p)]
    lines += ["", _md(bayes_line(p)), "", _md(INDEPENDENCE_NOTE), "", "### Caveats (across corpora)", ""]
    lines += [f"- {_md(c)}" for c in caveat_lines(p) or ["none"]]
    return lines
