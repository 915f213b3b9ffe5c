"""The report, the citation card and the MLflow UI, looked at in a real headless Chromium."""

from __future__ import annotations

import html
import os
import re
import shutil
import signal
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest
import yaml

from harness.cli import main
from harness.engine.runner import run_sweep_file
from harness.review.page import main_effects, pareto_front

from conftest import MINILM, configuration_runs, free_port, report_sections, wait_healthy, write_sweep

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (make test installs it)")
CHROMIUM_FLAGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                  "--disable-sync", "--no-first-run", "--disable-quic"]

SWEEP = f"""
name: reviewed
question: Does pooling or reduction matter more for town requests?
datasets:
  - {{source: synthetic, n_texts: 400, topic_share: 0.3, seed: 4}}
models: [{MINILM}]
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 8}}
    - {{method: umap, n_components: 5, n_neighbors: 15}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 200}}
"""


@pytest.fixture(scope="module")
def reviewed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reviewed")
    sweep = write_sweep(folder, SWEEP)
    results = folder / "results"
    result = run_sweep_file(sweep, results)
    assert not result.failed
    return folder, results, result


def _browser(playwright):
    return playwright.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_FLAGS)


def test_main_effects_group_by_settings_not_by_name_segments():
    # Two UMAP metrics and two normalisations under names that read alike (as names once did): "which choice
    # matters" must still see two options on each axis, because it groups by the configuration's params.
    from harness.track.readback import ConfigurationRecord

    def config(metric, transform, normalize, ari):
        params = {"dataset": "d", "model": "m", "layers": "last", "pooling": "mean", "transform": transform,
                  "normalize": normalize, "reduce.method": "umap", "reduce.n_components": "5", "reduce.metric": metric,
                  "cluster.method": "kmeans", "cluster.k": "labels"}
        return ConfigurationRecord("id", "d/m/last/mean/l2/umap5/kmeanslabels", params, {"ari": ari}, {})

    records = [config("cosine", "l2", "none", 0.8), config("euclidean", "l2", "none", 0.4),
               config("cosine", "none", "l2", 0.7), config("euclidean", "none", "l2", 0.3)]
    effects = main_effects(records, "ari")
    assert {e.option: round(e.mean, 6) for e in effects["reduce"]} == {"cosine": 0.75, "euclidean": 0.35}
    assert {e.option: round(e.mean, 6) for e in effects["transform"]} == {
        "transform=l2, normalize=none": 0.6, "transform=none, normalize=l2": 0.5}
    assert "pooling" not in effects and "model" not in effects  # one option each


def test_main_effects_and_pareto_front_on_hand_made_numbers():
    from harness.track.readback import ConfigurationRecord

    def config(name, ari):
        params = {"dataset": "d", "model": "m", "layers": "last", "pooling": name, "transform": "none", "normalize": "none",
                  "reduce.method": "pca", "reduce.n_components": "8", "cluster.method": "kmeans", "cluster.k": "labels"}
        return ConfigurationRecord("id", f"d/m/last/{name}/none/pca8/kmeanslabels", params, {"ari": ari}, {})

    effects = main_effects([config("mean", 0.6), config("mean", 0.8), config("max", 0.2), config("max", 0.4)], "ari")
    (mean, maximum) = effects["pooling"]
    assert (mean.option, mean.mean, maximum.option, maximum.mean) == ("mean", pytest.approx(0.7), "max", pytest.approx(0.3))
    # 1.96 standard errors of [0.6, 0.8]: sd 0.1414, se 0.1 -> 0.7 +- 0.196
    assert mean.low == pytest.approx(0.7 - 0.196, abs=1e-3)
    assert pareto_front([1.0, 2.0, 3.0, 2.5], [0.5, 0.7, 0.6, 0.9]) == [0, 1, 3]


@needs_chromium
def test_report_renders_offline_with_its_parts(reviewed, tmp_path):
    from playwright.sync_api import sync_playwright

    folder, results, _ = reviewed
    assert main(["report", "reviewed", "--results-dir", str(results)]) == 0
    page_path = results / "reports" / "reviewed" / "report.html"
    assert (results / "reports" / "reviewed" / "report.md").is_file()
    server = subprocess.Popen([sys.executable, "-m", "http.server", "0", "--bind", "127.0.0.1", "--directory",
                               str(page_path.parent)], stdout=subprocess.PIPE, text=True)
    try:
        port = int(server.stdout.readline().split("port ")[1].split()[0])
        requested = []
        with sync_playwright() as playwright:
            browser = _browser(playwright)
            page = browser.new_page(viewport={"width": 1300, "height": 1000})
            page.on("request", lambda request: requested.append(request.url))
            page.goto(f"http://127.0.0.1:{port}/report.html", wait_until="networkidle")
            for element in ("leaderboard", "main-effects", "length-plot", "quality-cost", "cluster-map", "caveats"):
                assert page.locator(f"section.dataset .{element}").count() == 1, element
            assert page.locator(".leaderboard tr").count() == 1 + 4  # header + 4 configurations
            assert page.evaluate("document.querySelector('.main-effects').naturalWidth") > 100  # the image decoded
            page.screenshot(path=str(tmp_path / "report.png"), full_page=True)
            browser.close()
        assert (tmp_path / "report.png").stat().st_size > 10_000
        outside = [url for url in requested if not url.startswith((f"http://127.0.0.1:{port}/", "data:"))]
        assert outside == [], outside  # nothing left 127.0.0.1
    finally:
        server.terminate()
        server.wait(10)


def test_citation_card_reproduces_the_winner(reviewed, capsys):
    folder, results, result = reviewed
    assert main(["cite", "reviewed", "--results-dir", str(results)]) == 0
    out = capsys.readouterr().out
    card = yaml.safe_load((results / "reports" / "reviewed" / "winner.yaml").read_text())
    markdown = (results / "reports" / "reviewed" / "winner.md").read_text()
    ranking = result.rankings["town_requests"]
    winner = ranking.winner.configuration
    assert card["grid"]["pooling"] == [winner.trials[0].pooling] and card["grid"]["seeds"] == [0, 1]
    for needed in ("weights SHA-256", "fingerprint", "Tool commit", "Margin to the runner-up", winner.run_id, "harness run "):
        assert needed in markdown, needed

    command = out.split("reproduce: ")[1].strip().split()
    assert command[:2] == ["harness", "run"]
    assert main(command[1:] + ["--no-progress"]) == 0  # the exact command the card prints
    (again,) = configuration_runs(f"sqlite:///{results / 'mlflow.db'}", "reviewed-winner")
    spread = max(winner.metrics["ari_std"], 1e-9)
    assert abs(again.data.metrics["ari"] - winner.metrics["ari"]) <= spread


@needs_chromium
def test_the_mlflow_ui_lists_the_sweep_runs(reviewed):
    from playwright.sync_api import sync_playwright

    folder, results, result = reviewed
    port = free_port()
    server = subprocess.Popen([sys.executable, "-m", "harness.cli", "ui", "--results-dir", str(results), "--port", str(port)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        wait_healthy(f"http://127.0.0.1:{port}")
        experiment = _experiment_id(results, "reviewed")
        with sync_playwright() as playwright:
            browser = _browser(playwright)
            page = browser.new_page(viewport={"width": 1500, "height": 1000})
            page.goto(f"http://127.0.0.1:{port}/#/experiments/{experiment}/runs")
            page.get_by_text("reviewed", exact=True).first.wait_for(timeout=60_000)
            sweep_cell = page.locator("[role='gridcell']", has_text="reviewed").first
            sweep_cell.locator("button[data-component-id*='runnamecellrenderer']").click(timeout=20_000)  # expand
            names = [c.name for c in result.configurations]
            page.get_by_text(names[0], exact=True).first.wait_for(timeout=30_000)
            shown = [name for name in names if page.get_by_text(name, exact=True).count() > 0]
            browser.close()
        assert shown == names  # every configuration run is listed under the sweep run
    finally:
        os.killpg(server.pid, signal.SIGTERM)  # stops the server and its workers by the PID we started
        server.wait(30)


def _experiment_id(results: Path, name: str) -> str:
    from mlflow.tracking import MlflowClient

    return MlflowClient(tracking_uri=f"sqlite:///{results / 'mlflow.db'}").get_experiment_by_name(name).experiment_id


# -- what the report says about the run it describes ---------------------------------------------------

def _tiny_sweep(name: str, models: list, poolings: str = "[mean]") -> str:
    return f"""
name: {name}
datasets:
  - {{source: synthetic, n_texts: 60, n_topics: 3, topic_share: 0.5, seed: 3}}
models: [{", ".join(str(m) for m in models)}]
grid:
  pooling: {poolings}
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
storage_dtype: float16
evidence: {{resamples: 50, permutations: 19}}
"""


@pytest.fixture(scope="module")
def rerun_with_a_failure(tmp_path_factory, tiny_model_dir, overflowing_model_dir):
    """The sweep 'rerun' run twice: first all trials finish; then, with a second model added whose float16
    vectors overflow, its two seed runs fail (PCA refuses infinite input) and the sweep run ends FAILED."""
    folder = tmp_path_factory.mktemp("rerun")
    results = folder / "results"
    first = run_sweep_file(write_sweep(folder, _tiny_sweep("rerun", [tiny_model_dir]), "first.yaml"), results)
    second = run_sweep_file(write_sweep(folder, _tiny_sweep("rerun", [tiny_model_dir, overflowing_model_dir]), "second.yaml"),
                            results)
    assert not first.failed and len(second.failed) == 2
    return results, first, second


def test_report_and_cite_describe_the_newest_run_and_say_that_trials_failed(rerun_with_a_failure, capsys):
    results, first, second = rerun_with_a_failure
    assert main(["report", "rerun", "--results-dir", str(results), "--no-map"]) == 0
    out, err = capsys.readouterr()
    assert f"sweep run {second.parent_run_id} of 'rerun' (status FAILED)" in out
    assert "warning: 2 of 4 trials of this run FAILED" in err
    page = (results / "reports" / "rerun" / "report.html").read_text()
    assert second.parent_run_id in page and first.parent_run_id not in page
    status = page[page.index("id='run-status'"):page.index("id=\"winners\"")]
    assert "This run is not complete" in status and "2 of 4 trials of this run FAILED" in status
    for failed in second.failed:
        assert html.escape(failed.trial.name) in status
    assert "ValueError: Input X contains infinity" in status
    (rows,) = [s["rows"] for s in report_sections(page).values()]
    assert [row[2] for row in rows].count("failed") == 1 and rows[-1][2] == "failed"  # ranked last, no score
    assert "2 of 4 trials of this run FAILED" in (results / "reports" / "rerun" / "report.md").read_text()

    assert main(["cite", "rerun", "--results-dir", str(results)]) == 0
    out, err = capsys.readouterr()
    assert "warning: 2 of 4 trials of this run FAILED" in err
    card = (results / "reports" / "rerun" / "winner.md").read_text()
    assert "**This run is not complete.**" in card and "2 of 4 trials of this run FAILED" in card
    assert f"sweep run `{second.parent_run_id}` (status FAILED)" in card


def test_report_cite_and_export_describe_the_same_run_when_the_newest_failed(rerun_with_a_failure, capsys):
    # The three readers of a sweep choose its run one way: the newest, whatever its status, with the failed-trial
    # note on stderr; the exported rows name that run and its status, and hold its failed configuration.
    results, first, second = rerun_with_a_failure
    described = {}
    for command in (["report", "rerun", "--no-map"], ["cite", "rerun"], ["export", "rerun", "--to", str(results / "rerun.csv")]):
        assert main(command + ["--results-dir", str(results)]) == 0, command
        out, err = capsys.readouterr()
        assert "warning: 2 of 4 trials of this run FAILED" in err, command
        described[command[0]] = re.findall(r"sweep run (\w+) of 'rerun' \(status (\w+)\)", out)
    assert described["report"] == described["cite"] == described["export"] == [(second.parent_run_id, "FAILED")]
    table = pd.read_csv(results / "rerun.csv")
    assert set(table["sweep_run_id"]) == {second.parent_run_id} and set(table["sweep_status"]) == {"FAILED"}
    assert set(table["run_id"]) == {c.run_id for c in second.configurations}
    # --run-id alone, as report takes it: the older, finished run.
    assert main(["export", "--run-id", first.parent_run_id, "--to", str(results / "first.csv"),
                 "--results-dir", str(results)]) == 0
    assert f"sweep run {first.parent_run_id} of 'rerun' (status FINISHED)" in capsys.readouterr().out
    assert set(pd.read_csv(results / "first.csv")["sweep_status"]) == {"FINISHED"}


def test_run_id_picks_an_older_run_and_bad_ids_are_one_line_errors(rerun_with_a_failure, capsys):
    results, first, second = rerun_with_a_failure
    assert main(["report", "--run-id", first.parent_run_id, "--results-dir", str(results), "--no-map"]) == 0
    out, err = capsys.readouterr()
    assert f"sweep run {first.parent_run_id} of 'rerun' (status FINISHED)" in out and "warning" not in err
    page = (results / "reports" / "rerun" / "report.html").read_text()
    assert first.parent_run_id in page and "not complete" not in page
    assert main(["cite", "rerun", "--run-id", first.parent_run_id, "--results-dir", str(results)]) == 0
    assert f"sweep run `{first.parent_run_id}` (status FINISHED)" in (results / "reports" / "rerun" / "winner.md").read_text()
    capsys.readouterr()

    configuration_run = second.configurations[0].run_id
    for argv, expected in ((["report", "--run-id", "0" * 32], "--run-id 00000000000000000000000000000000: no such run"),
                           (["report", "--run-id", configuration_run], "is a configuration run, not a sweep run"),
                           (["cite", "other", "--run-id", first.parent_run_id], "belongs to sweep 'rerun', not 'other'"),
                           (["report"], "name a sweep")):
        assert main(argv + ["--results-dir", str(results)]) == 2, argv
        err = capsys.readouterr().err
        assert expected in err and len(err.strip().splitlines()) == 1, err


# -- the evidence flags (valid seeds, stability not applicable, interval scope, provisional verdicts) ----

@pytest.fixture(scope="module")
def flagged(tmp_path_factory, tiny_model_dir):
    """A sweep whose configuration runs then get the flags the evidence step sets: the winner is provisional,
    its interval covers texts only, its ari is finite on 1 of 2 seeds and its pipeline is seed-free; the
    runner-up's interval covers seeds and texts; the third configuration has no flags at all."""
    from mlflow.tracking import MlflowClient

    folder = tmp_path_factory.mktemp("flagged")
    results = folder / "results"
    result = run_sweep_file(write_sweep(folder, _tiny_sweep("flagged", [tiny_model_dir], "[mean, max, cls]")), results)
    client = MlflowClient(tracking_uri=result.tracking_uri)
    winner, runner_up, third = (row.configuration for row in result.rankings["town_requests"].rows)
    client.set_tag(winner.run_id, "harness.verdict", "provisional")
    client.set_tag(winner.run_id, "harness.interval_scope", "texts_only")
    client.set_tag(winner.run_id, "harness.stability", "not_applicable")
    client.log_metric(winner.run_id, "ari_valid_seeds", 1.0)
    client.set_tag(runner_up.run_id, "harness.interval_scope", "seeds_and_texts")
    client.log_metric(runner_up.run_id, "ari_valid_seeds", 2.0)
    # The run itself tags every configuration with what its interval resamples; the third stands for a run logged
    # before those tags existed.
    if "harness.interval_scope" in client.get_run(third.run_id).data.tags:
        client.delete_tag(third.run_id, "harness.interval_scope")
    return results, (winner, runner_up, third)


def test_the_report_shows_the_evidence_flags(flagged):
    results, (winner, runner_up, third) = flagged
    assert main(["report", "flagged", "--results-dir", str(results), "--no-map"]) == 0
    (section,) = report_sections((results / "reports" / "flagged" / "report.html").read_text()).values()
    cells = {row[1]: row for row in section["rows"]}
    # columns: rank, configuration, ari, seeds, 95% CI, interval covers, tie, length index, coverage, stability
    assert cells[winner.name][3] == "1 of 2 valid" and cells[winner.name][5] == "texts only"
    assert cells[winner.name][6] == "leader (provisional)" and cells[winner.name][9] == "n/a (seed-free)"
    assert cells[runner_up.name][3] == "2" and cells[runner_up.name][5] == "seeds and texts"
    assert cells[runner_up.name][9] != "n/a (seed-free)"
    assert cells[third.name][3] == "2" and cells[third.name][5] == "-"  # nothing logged: nothing special shown
    assert cells[third.name][9] == f"{third.metrics['stability_ari']:.3f}"
    notes = " ".join(section["caveats"])
    assert "Provisional verdict: 2 seed(s) per configuration" in notes and "cover texts only" in notes
    assert f"{winner.name} (1 of 2)" in notes and "The winner is one of them." in notes
    assert "Only 2 seed(s)" not in notes  # the provisional note replaces the older few-seeds one


def test_the_citation_card_shows_the_evidence_flags(flagged):
    results, (winner, runner_up, third) = flagged
    assert main(["cite", "flagged", "--results-dir", str(results)]) == 0
    card = (results / "reports" / "flagged" / "winner.md").read_text()
    assert "**Verdict: provisional.** Fewer than 3 seeds: the intervals and the tie flag cover texts only" in card
    assert "**Ranked on 1 of 2 seeds**: the other seeds gave no finite ari." in card
    assert "| stability_ari | n/a: seed-free pipeline" in card
    ari_row = next(line for line in card.splitlines() if line.startswith("| ari |"))
    assert ari_row.endswith("| 1 of 2 |")


# -- nothing read from the store becomes markup or a path -------------------------------------------------

def _payload(field: str) -> str:
    return f"\"'><script>alert('{field}')</script><img src=x onerror=alert('{field}')>"


class _Markup(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.attributes, self.text = set(), [], []

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        self.attributes += [name for name, _ in attrs]

    def handle_data(self, data):
        self.text.append(data)


PAGE_TAGS = {"html", "head", "meta", "title", "style", "body", "h1", "h2", "h3", "p", "b", "i", "code", "pre", "ul",
             "li", "div", "section", "table", "tr", "th", "td", "img"}


def test_every_field_written_into_the_page_is_escaped():
    """Each text the page shows comes from the store (names, tags, artifacts a person or another tool may have
    written): each gets its own payload, and none may turn into markup, in HTML or Markdown."""
    from harness.review.page import (DatasetRanking, DatasetSection, Effect, ReportContent, md_text, render_html,
                                render_markdown, run_notes)
    from harness.track.readback import ConfigurationRecord, SweepRecord, UnfinishedTrial

    p = _payload
    finished = ConfigurationRecord(
        "id1", p("configuration.name"), {"dataset": p("dataset")},
        {p("metric"): 0.5, "n_seeds": 1.0, "tied_with_leader": 0.0},
        {"harness.interval_scope": p("tags.interval_scope"), "harness.verdict": "provisional"}, ["seed"])
    failed = ConfigurationRecord("id2", p("failed.name"), {"dataset": p("dataset")}, {}, {}, status=p("status"))
    record = SweepRecord(
        tracking_uri=p("tracking_uri"), experiment=p("experiment"), run_id=p("run_id"),
        tags={"harness.question": p("question")}, params={"n_trials": p("params.n_trials")}, sweep_text=p("sweep_text"),
        cards={p("cards.name"): {key: p(f"cards.{key}") for key in
                                 ("rows", "n_classes", "route", "fingerprint", "length_eta2_labels")}
               | {"token_length_quantiles": {"q50": p("cards.q50")}}},
        configurations=[finished, failed], status=p("record.status"),
        unfinished_trials=[UnfinishedTrial(p("trial.name"), "FAILED", p("trial.error"))])
    section = DatasetSection(
        ranking=DatasetRanking(p("dataset"), p("metric"), [finished, failed]), slug=p("slug"),
        effects={p("axis"): [Effect(p("effect.option"), 0.5, 0.4, 0.6, 2), Effect("other", 0.1, 0.0, 0.2, 2)]},
        caveats=[p("caveat")], images={"main-effects": b"\x89PNG"}, missing={"cluster-map": p("missing")},
        winner_clusters=[{key: p(f"clusters.{key}") for key in ("cluster", "size", "median_tokens", "npmi", "top_terms")}])
    content = ReportContent(record=record, sections=[section], run_notes=run_notes(record))
    fields = ["configuration.name", "dataset", "metric", "tags.interval_scope", "failed.name", "status", "tracking_uri",
              "experiment", "run_id", "question", "sweep_text", "params.n_trials", "trial.name", "trial.error",
              "cards.name", "cards.rows", "cards.n_classes", "cards.route", "cards.fingerprint",
              "cards.length_eta2_labels", "cards.q50", "record.status", "axis", "effect.option", "caveat",
              "clusters.cluster", "clusters.size", "clusters.median_tokens", "clusters.npmi", "clusters.top_terms",
              "missing"]

    page = render_html(content)
    markup = _Markup()
    markup.feed(page)
    assert markup.tags <= PAGE_TAGS, markup.tags - PAGE_TAGS
    assert not [a for a in markup.attributes if a.startswith("on")]
    text = "".join(markup.text)
    for field in fields:
        assert p(field) in text, field  # shown, as text
    markdown = render_markdown(content, {})
    assert "<script" not in markdown and "<img" not in markdown
    for field in fields:
        if field != "sweep_text":  # the Markdown twin does not repeat the grid
            assert md_text(p(field)) in markdown, field


@pytest.fixture(scope="module")
def hostile(tmp_path_factory, tiny_model_dir):
    """A finished sweep whose question, dataset name and (rewritten) cluster terms and dataset card hold markup."""
    import json

    import pandas as pd

    from conftest import finished_runs

    folder = tmp_path_factory.mktemp("hostile")
    requests = [("Pothole on the high street", "roads"), ("Streetlight flickering all night", "lighting"),
                ("Bins not collected this week", "waste")]
    rows = [(f"{text}, report {i}", label) for i in range(12) for text, label in requests]  # no duplicate texts
    pd.DataFrame(rows, columns=["text", "label"]).to_csv(folder / "requests.csv", index=False)
    sweep = write_sweep(folder, f"""
name: hostile
question: "</p><script>alert('question')</script>"
datasets:
  - {{source: file, path: requests.csv, name: "<img src=x onerror=alert('dataset')>"}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean, max]
  reduce: [{{method: pca, n_components: 3}}]
  cluster: [{{method: kmeans, k: labels}}]
evidence: {{resamples: 20, permutations: 19}}
""")
    results = folder / "results"
    result = run_sweep_file(sweep, results)
    assert not result.failed
    client, (parent,), seeds = finished_runs(result.tracking_uri, "hostile")
    for seed in seeds:
        table = pd.DataFrame({"cluster": ["<script>alert('cluster')</script>"], "size": ["<b>size</b>"],
                              "median_tokens": [5.0], "top_terms": ["<script>alert('terms')</script>"], "npmi": [0.1]})
        path = folder / "clusters.parquet"
        table.to_parquet(path)
        client.log_artifact(seed.info.run_id, str(path))
    cards_file = folder / "dataset_cards.json"
    cards = json.loads(Path(client.download_artifacts(parent.info.run_id, "dataset_cards.json", str(folder))).read_text())
    for card in cards.values():
        card["rows"] = "<script>alert('rows')</script>"
    cards_file.write_text(json.dumps(cards))
    client.log_artifact(parent.info.run_id, str(cards_file))
    return results, result


@needs_chromium
def test_a_report_of_hostile_names_runs_no_script_in_the_browser(hostile):
    from playwright.sync_api import sync_playwright

    results, result = hostile
    assert main(["report", "hostile", "--results-dir", str(results), "--no-map"]) == 0
    page_path = results / "reports" / "hostile" / "report.html"
    dialogs = []
    with sync_playwright() as playwright:
        browser = _browser(playwright)
        page = browser.new_page()
        page.on("dialog", lambda dialog: (dialogs.append(dialog.message), dialog.dismiss()))
        page.goto(page_path.as_uri(), wait_until="load")
        scripts = page.evaluate("document.querySelectorAll('script').length")
        handlers = page.evaluate("document.querySelectorAll('[onerror]').length")
        assert dialogs == [] and scripts == 0 and handlers == 0, (dialogs, scripts, handlers)
        question = page.locator("#question").inner_text()
        datasets = page.locator("section.dataset").evaluate_all("nodes => nodes.map(n => n.dataset.dataset)")
        terms = page.locator(".winner-clusters").inner_text()
        browser.close()
    assert "<script>alert('question')</script>" in question
    assert datasets == ["<img src=x onerror=alert('dataset')>"]
    assert "<script>alert('terms')</script>" in terms and "<script>alert('cluster')</script>" in terms
    markdown = (results / "reports" / "hostile" / "report.md").read_text()
    assert "<script" not in markdown and "<img" not in markdown


def test_a_name_made_safe_is_a_plain_child_of_the_folder_it_is_joined_to(tmp_path):
    from harness.review.page import distinct_safe_names, safe_name

    for name in ("..", ".", "", "../x", "../../etc/passwd", "/abs/path", "a/../../b", "~", "..\\..\\win", "a\x00b",
                 "...", " ", "-", "ok-name_1.2", "<img src=x>", "é", "a" * 300):
        made = safe_name(name)
        joined = (tmp_path / made).resolve()
        assert joined.parent == tmp_path.resolve() and made not in ("", ".", ".."), name
        assert set(made) <= set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_.-"), name
    assert safe_name("ok-name_1.2") == "ok-name_1.2"  # a name that is already safe stays as it is
    names = ["a/b", "a?b", "../a_b", "c"]
    made = distinct_safe_names(names)
    assert len(set(made.values())) == len(names) and made["c"] == "c"  # one file per dataset, never shared


def test_the_report_folder_never_leaves_the_reports_folder(hostile):
    from mlflow.tracking import MlflowClient

    results, result = hostile
    client = MlflowClient(tracking_uri=result.tracking_uri)
    experiment = client.get_experiment_by_name("hostile")
    client.rename_experiment(experiment.experiment_id, "../../escaped")  # as another tool might name it
    try:
        assert main(["report", result.parent_run_id, "--results-dir", str(results), "--no-map"]) == 0
        assert main(["cite", result.parent_run_id, "--results-dir", str(results)]) == 0
    finally:
        client.rename_experiment(experiment.experiment_id, "hostile")
    assert not (results.parent / "escaped").exists() and not (results / "escaped").exists()
    assert (results / "reports" / "escaped" / "report.html").is_file()
    assert (results / "reports" / "escaped" / "winner.yaml").is_file()
