"""The report, the citation card and the MLflow UI, looked at in a real headless Chromium."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from harness.cli import main
from harness.report import main_effects, pareto_front
from harness.runner import run_sweep_file

from conftest import MINILM, configuration_runs, free_port, wait_healthy, write_sweep

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
    from harness.readback import ConfigurationRecord

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
    from harness.readback import ConfigurationRecord

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
                assert page.locator(f"#{element}").count() == 1, element
            assert page.locator("#leaderboard tr").count() == 1 + 4  # header + 4 configurations
            assert page.evaluate("document.getElementById('main-effects').naturalWidth") > 100  # the image decoded
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
