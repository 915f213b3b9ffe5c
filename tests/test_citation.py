"""A citation's winner.yaml draws the same texts as the sweep it cites, and reproduces its scores.

The case that used to break: a public dataset with ``balance_length``, balanced with the tokenizer of the
sweep's first model, and a winner that is the second model. The one-model winner.yaml then balanced with
the winner's own tokenizer, a different corpus.
"""

from __future__ import annotations

import pytest
import yaml

from harness.cli import main
from harness.engine.runner import run_sweep_file

from conftest import MINILM, configuration_runs, write_sweep


@pytest.fixture(scope="module")
def mirror(tmp_path_factory):
    """A mirror folder whose ag_news.parquet holds a town-requests corpus whose length is partly tied to topic."""
    import pandas as pd

    from harness.datasets.synthetic import SyntheticSource, synthetic_corpus

    folder = tmp_path_factory.mktemp("mirror")
    corpus = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=300, n_topics=4, topic_share=0.5,
                                              length_topic_tie=0.5, seed=5))
    pd.DataFrame({"text": corpus.texts, "label": corpus.labels, "label_name": [corpus.label_names[i] for i in corpus.labels],
                  "split": "test"}).to_parquet(folder / "ag_news.parquet")
    return folder


def _balanced(mirror, count_tokens):
    from harness.datasets.public import AgNewsSource, public_corpus

    return public_corpus(AgNewsSource(source="ag_news", data_dir=mirror, balance_length=True, seed=0), count_tokens)


def test_the_two_tokenizers_balance_to_different_corpora(mirror, char_model_dir):
    """The premise of the next test: balanced by letters or by MiniLM's word pieces, other texts are kept."""
    from harness.datasets.card import tokenizer_counter
    from harness.embed.models import resolve_model

    by_letters = _balanced(mirror, tokenizer_counter(char_model_dir))
    by_pieces = _balanced(mirror, tokenizer_counter(resolve_model(MINILM).folder))
    assert by_letters.fingerprint != by_pieces.fingerprint


def test_length_tokenizer_chooses_what_measures_lengths(mirror, char_model_dir, tmp_path):
    """Every value of the setting: unset (the first model), a model name, 'words'."""
    from harness.datasets.card import tokenizer_counter
    from harness.embed.models import resolve_model
    from harness.engine.runner import loaded_corpora, prepared_sweep

    expected = {
        None: _balanced(mirror, tokenizer_counter(char_model_dir)).fingerprint,  # the sweep's first model
        MINILM: _balanced(mirror, tokenizer_counter(resolve_model(MINILM).folder)).fingerprint,
        str(char_model_dir): _balanced(mirror, tokenizer_counter(char_model_dir)).fingerprint,
        "words": _balanced(mirror, None).fingerprint,
    }
    assert len(set(expected.values())) == 3
    keys = {}
    for setting, fingerprint in expected.items():
        extra = "" if setting is None else f", length_tokenizer: {setting}"
        sweep = write_sweep(tmp_path, f"""
name: measured
datasets:
  - {{source: ag_news, data_dir: {mirror}, balance_length: true{extra}}}
models: [{char_model_dir}, {MINILM}]
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 8}}]
  cluster: [{{method: kmeans, k: labels}}]
""")
        prepared = prepared_sweep(sweep)
        assert loaded_corpora(prepared)["ag_news"].fingerprint == fingerprint, setting
        keys[setting] = prepared.dataset_keys["ag_news"]
    # The key follows the tokenizer (its weights), not how the entry names it: the same texts share one key,
    # so a winner.yaml that names the first model reuses the sweep's stages; different measures never do.
    assert keys[None] == keys[str(char_model_dir)] and len(set(keys.values())) == 3


def test_winner_yaml_reproduces_the_dataset_and_scores_when_the_second_model_wins(mirror, char_model_dir, tmp_path, capsys):
    sweep = write_sweep(tmp_path, f"""
name: balanced
datasets:
  - {{source: ag_news, data_dir: {mirror}, balance_length: true, seed: 0}}
models: [{char_model_dir}, {MINILM}]
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 8}}]
  cluster: [{{method: kmeans, k: labels}}]
  seeds: [0, 1]
evidence: {{resamples: 50, permutations: 19}}
""")
    results = tmp_path / "results"
    result = run_sweep_file(sweep, results)
    assert not result.failed
    winner = result.rankings["ag_news"].winner.configuration
    assert winner.trials[0].model.name == MINILM  # the second model wins: a random tiny BERT finds no topics

    assert main(["cite", "balanced", "--results-dir", str(results)]) == 0
    command = capsys.readouterr().out.split("reproduce: ")[1].strip().split()
    card = yaml.safe_load((results / "reports" / "balanced" / "winner.yaml").read_text())
    assert [m["name"] for m in card["models"]] == [MINILM]
    assert main(command[1:] + ["--no-progress"]) == 0

    tracking = f"sqlite:///{results / 'mlflow.db'}"
    (original,) = [r for r in configuration_runs(tracking, "balanced") if r.info.run_id == winner.run_id]
    (again,) = configuration_runs(tracking, "balanced-winner")
    assert again.data.tags["harness.dataset_fingerprint"] == original.data.tags["harness.dataset_fingerprint"]
    for name in ("ari", "ami", "nmi", "v_measure", "length_confound_index", "coverage"):
        assert again.data.metrics[name] == pytest.approx(original.data.metrics[name], abs=1e-9), name
    assert card["datasets"][0]["length_tokenizer"] == str(char_model_dir)  # named: the sweep balanced with it
