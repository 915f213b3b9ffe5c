"""The MLflow UI opens a sweep on its runs: the experiment kind, the saved ranking view, and the link `harness ui` prints,
looked at in a real headless Chromium."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys

import pytest

from harness.engine.runner import run_sweep_file
from harness.track.runs_view import EXPERIMENT_KIND_TAG, MODEL_DEVELOPMENT, RANKING_VIEW_TAG
from harness.track.tracking import sweep_experiments

from conftest import configuration_runs, free_port, wait_healthy, write_sweep

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (make test installs it)")


@pytest.fixture(scope="module")
def ranked(tmp_path_factory, tiny_model_dir):
    folder = tmp_path_factory.mktemp("ranked")
    sweep = write_sweep(folder, f"""
name: ranked
datasets:
  - {{source: synthetic, n_texts: 240, topic_share: 0.4, seed: 2}}
models:
  - {{name: {tiny_model_dir}, max_length: 64}}
grid:
  pooling: [mean, max, cls]
  reduce:
    - {{method: pca, n_components: 8}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 50}}
""")
    results = folder / "results"
    result = run_sweep_file(sweep, results)
    assert not result.failed
    return results, result


def _first_lines(process: subprocess.Popen, count: int, seconds: float = 120) -> list[str]:
    """The first lines a process prints, waiting at most ``seconds`` (a server that never prints them fails the test)."""
    import selectors
    import time

    lines, selector = [], selectors.DefaultSelector()
    selector.register(process.stdout, selectors.EVENT_READ)
    deadline = time.monotonic() + seconds
    while len(lines) < count and time.monotonic() < deadline:
        if selector.select(timeout=max(0.0, deadline - time.monotonic())):
            line = process.stdout.readline()
            if not line:
                break
            lines.append(line)
    return lines


def _experiment(results, name):
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{results / 'mlflow.db'}")
    return client, client.get_experiment_by_name(name)


def test_the_experiment_opens_on_model_development_with_a_ranking_view_mlflow_can_run(ranked):
    results, result = ranked
    client, experiment = _experiment(results, "ranked")
    assert experiment.tags[EXPERIMENT_KIND_TAG] == MODEL_DEVELOPMENT
    view = json.loads(experiment.tags[RANKING_VIEW_TAG])
    assert result.parent_run_id in view["searchFilter"]
    assert {"metrics.`ari`", "metrics.`length_confound_index`", "metrics.`rank`"} <= set(view["selectedColumns"])
    # The view's filter and sort, run by MLflow's own search: exactly this sweep run's configurations, best first.
    found = client.search_runs([experiment.experiment_id], view["searchFilter"], order_by=["metrics.`rank` ASC"])
    (ranking,) = result.rankings.values()
    assert [r.info.run_name for r in found] == [row.configuration.name for row in ranking.rows]


def test_ui_marks_stores_written_before_the_view_existed(ranked):
    results, result = ranked
    client, experiment = _experiment(results, "ranked")
    client.delete_experiment_tag(experiment.experiment_id, RANKING_VIEW_TAG)
    client.set_experiment_tag(experiment.experiment_id, EXPERIMENT_KIND_TAG, "genai_development")
    assert sweep_experiments(f"sqlite:///{results / 'mlflow.db'}") == [("ranked", experiment.experiment_id)]
    _, again = _experiment(results, "ranked")
    assert again.tags[EXPERIMENT_KIND_TAG] == MODEL_DEVELOPMENT
    assert result.parent_run_id in json.loads(again.tags[RANKING_VIEW_TAG])["searchFilter"]


@needs_chromium
def test_the_link_harness_ui_prints_shows_the_configurations_and_their_ari_on_the_first_screen(ranked, record_measurement):
    from playwright.sync_api import sync_playwright

    results, result = ranked
    port = free_port()
    server = subprocess.Popen([sys.executable, "-m", "harness.cli", "ui", "--results-dir", str(results), "--port", str(port)],
                              stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, start_new_session=True)
    try:
        printed = _first_lines(server, 2)
        assert len(printed) == 2, printed
        assert printed[0].startswith(f"MLflow UI on http://127.0.0.1:{port}")
        name, link = printed[1].strip().split(": ", 1)
        assert name == "ranked" and link.startswith(f"http://127.0.0.1:{port}/#/experiments/")
        wait_healthy(f"http://127.0.0.1:{port}")
        runs = configuration_runs(f"sqlite:///{results / 'mlflow.db'}", "ranked")
        names = {c.info.run_name: c.data.metrics["ari"] for c in runs}
        with sync_playwright() as playwright:
            browser = playwright.chromium.launch(executable_path=CHROMIUM, headless=True,
                                                 args=["--no-sandbox", "--disable-gpu", "--disable-background-networking"])
            page = browser.new_page(viewport={"width": 1500, "height": 1000})
            page.goto(link)
            page.locator("[role='gridcell'][col-id='metrics.`ari`']").first.wait_for(timeout=90_000)
            page.get_by_text(next(iter(names)), exact=True).first.wait_for(timeout=60_000)
            # Each grid row (the pinned name part and the scrolling metrics part share a row index): its run name,
            # its ari as rendered, and whether it lies inside the window without scrolling.
            rows = page.evaluate("""() => {
                const byIndex = {};
                for (const cell of document.querySelectorAll("[role='gridcell'][col-id]")) {
                    const row = cell.closest("[role='row']");
                    const index = row && row.getAttribute('row-index');
                    if (index === null) continue;
                    const entry = byIndex[index] = byIndex[index] || {};
                    const rect = cell.getBoundingClientRect();
                    const inside = rect.bottom <= window.innerHeight && rect.right <= window.innerWidth && rect.top >= 0;
                    if (cell.getAttribute('col-id') === 'attributes.`Run Name`') { entry.name = cell.innerText; entry.nameShown = inside; }
                    if (cell.getAttribute('col-id') === 'metrics.`ari`') { entry.ari = cell.innerText; entry.ariShown = inside; }
                    if (cell.getAttribute('col-id') === 'metrics.`length_confound_index`') { entry.lengthShown = inside; }
                }
                return Object.keys(byIndex).sort((a, b) => a - b).map(k => byIndex[k]);
            }""")
            screenshot = results / "screenshots" / "mlflow_runs_first_screen.png"
            screenshot.parent.mkdir(exist_ok=True)
            page.screenshot(path=str(screenshot))
            browser.close()
        record_measurement(f"MLflow UI first screen (harness ui link): {screenshot}")
        shown = {row["name"].splitlines()[-1].strip(): row for row in rows if row.get("name")}
        assert set(shown) == set(names)  # the configuration runs, and nothing else
        for run_name, ari in names.items():
            row = shown[run_name]
            assert row["nameShown"] and row["ariShown"] and row["lengthShown"], row  # on the first screen
            assert float(row["ari"]) == pytest.approx(ari, abs=1e-6), run_name
        (ranking,) = result.rankings.values()
        assert [r["name"].splitlines()[-1].strip() for r in rows] == [row.configuration.name for row in ranking.rows]
        assert screenshot.stat().st_size > 10_000
    finally:
        os.killpg(server.pid, signal.SIGTERM)  # stops the server and its workers by the PID we started
        server.wait(30)
