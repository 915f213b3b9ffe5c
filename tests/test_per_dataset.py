"""A sweep over two corpora gets two verdicts: the report and the citation rank within each dataset.

One corpus has a clear topic signal, the other a faint one, so the best score on the clear corpus beats
every score on the faint one: a report or a card that ranks across datasets names the clear corpus's
winner for both. The faint corpus is an unnamed file (its name comes from the file), the case in which
a citation's runner-up used to come from any dataset.
"""

from __future__ import annotations

import pytest
import yaml

from harness.cli import main
from harness.engine.runner import run_sweep_file

from conftest import MINILM, report_sections, write_sweep

CLEAR, FAINT = "clear_requests", "faint_requests"

SWEEP = f"""
name: two_corpora
question: Which setup finds the topics of each corpus?
datasets:
  - {{source: synthetic, name: {CLEAR}, n_texts: 160, n_topics: 4, topic_share: 0.6, seed: 1}}
  - {{source: file, path: {FAINT}.csv}}
models: [{MINILM}]
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 4}}
    - {{method: pca, n_components: 12}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 100, permutations: 19}}
"""


@pytest.fixture(scope="module")
def two_corpora(tmp_path_factory):
    import pandas as pd

    from harness.datasets.synthetic import SyntheticSource, synthetic_corpus

    folder = tmp_path_factory.mktemp("two_corpora")
    faint = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=160, n_topics=4, topic_share=0.05, seed=2))
    pd.DataFrame({"text": faint.texts, "label": [faint.label_names[i] for i in faint.labels]}).to_csv(
        folder / f"{FAINT}.csv", index=False)
    results = folder / "results"
    result = run_sweep_file(write_sweep(folder, SWEEP), results)
    assert not result.failed
    clear, faint_ranking = result.rankings[CLEAR], result.rankings[FAINT]
    # The premise: ranked across datasets, the clear corpus's configurations would take every top place.
    assert min(r.value for r in clear.rows) > max(r.value for r in faint_ranking.rows)
    return folder, results, result


def test_the_report_ranks_and_reads_each_dataset_on_its_own(two_corpora):
    folder, results, result = two_corpora
    assert main(["report", "two_corpora", "--results-dir", str(results), "--no-map"]) == 0
    page = (results / "reports" / "two_corpora" / "report.html").read_text()
    sections = report_sections(page)
    assert sorted(sections) == sorted([CLEAR, FAINT])
    for dataset, section in sections.items():
        names = [row[1] for row in section["rows"]]
        expected = [row.configuration.name for row in result.rankings[dataset].rows]
        assert names == expected, dataset  # this dataset's configurations only, in the run's own order
        assert section["rows"][0][6].startswith("leader")
        # Ties are with this dataset's leader, as the run flagged them.
        assert [row[6] for row in section["rows"][1:]] == ["tied" if r.tied else "" for r in result.rankings[dataset].rows[1:]]
        for element in ("main-effects", "quality-cost", "length-plot"):
            assert element in section["images"], (dataset, element)
        assert section["caveats"]
    markdown = (results / "reports" / "two_corpora" / "report.md").read_text()
    assert f"## Dataset {CLEAR}" in markdown and f"## Dataset {FAINT}" in markdown


def test_main_effects_pareto_and_caveats_come_from_each_dataset_alone(two_corpora):
    from harness.review.build import report_content
    from harness.review.page import caveats, main_effects, pareto_front
    from harness.track.readback import sweep_record

    folder, results, result = two_corpora
    record = sweep_record(f"sqlite:///{results / 'mlflow.db'}", "two_corpora")
    content = report_content(record, with_map=False)
    assert [s.dataset for s in content.sections] == [CLEAR, FAINT]
    for section in content.sections:
        mine = [c for c in record.configurations if c.dataset == section.dataset]
        assert sorted(c.name for c in section.ordered) == sorted(c.name for c in mine)
        # Recomputed here from this dataset's configurations only; the other corpus's would move every mean.
        assert section.effects == main_effects(section.ordered, section.metric)
        by_pooling = {e.option: e.mean for e in section.effects["pooling"]}
        for option, mean in by_pooling.items():
            values = [c.metrics["ari"] for c in mine if c.name.split("/")[3] == option]
            assert mean == pytest.approx(sum(values) / len(values))
        scores = [c.metrics["ari"] for c in section.ordered]
        assert section.front == pareto_front([c.compute_seconds for c in section.ordered], scores)
        assert section.caveats == caveats(section.ordered, section.metric)
        assert section.ordered[0].name == result.rankings[section.dataset].winner.configuration.name


def test_cite_writes_one_card_per_dataset_with_its_own_runner_up(two_corpora, capsys):
    folder, results, result = two_corpora
    assert main(["cite", "two_corpora", "--results-dir", str(results)]) == 0
    out = capsys.readouterr().out
    reports = results / "reports" / "two_corpora"
    for dataset in (CLEAR, FAINT):
        ranking = result.rankings[dataset]
        winner, runner_up = ranking.rows[0].configuration, ranking.rows[1].configuration
        card = (reports / f"winner-{dataset}.md").read_text()
        assert f"**Configuration**: `{winner.name}`" in card
        assert f"**Margin to the runner-up** (`{runner_up.name}`, same dataset)" in card
        margin = winner.metrics["ari"] - runner_up.metrics["ari"]
        assert f"ari {margin:.4f}" in card
        assert f"| ari | {ranking.rows[0].value:.4f} |" in card  # this dataset's own best score
        sweep = yaml.safe_load((reports / f"winner-{dataset}.yaml").read_text())
        assert len(sweep["datasets"]) == 1
        assert sweep["datasets"][0].get("name", sweep["datasets"][0].get("path", "")).endswith(
            dataset if dataset == CLEAR else f"{FAINT}.csv")
        assert sweep["grid"]["pooling"] == [winner.trials[0].pooling]
        assert sweep["name"] == f"two_corpora-winner-{dataset}"
        assert f"winner-{dataset}.yaml --results-dir" in out
    assert not (reports / "winner.yaml").exists()


def test_cite_one_dataset_by_name_and_refuse_an_unknown_one(two_corpora, capsys):
    folder, results, result = two_corpora
    reports = results / "reports" / "two_corpora"
    for stale in reports.glob("winner*"):
        stale.unlink()
    assert main(["cite", "two_corpora", "--dataset", FAINT, "--results-dir", str(results)]) == 0
    assert sorted(p.name for p in reports.glob("winner*")) == [f"winner-{FAINT}.md", f"winner-{FAINT}.yaml"]
    capsys.readouterr()
    assert main(["cite", "two_corpora", "--dataset", "nonesuch", "--results-dir", str(results)]) == 2
    err = capsys.readouterr().err
    assert "--dataset nonesuch" in err and CLEAR in err and FAINT in err and len(err.strip().splitlines()) == 1
