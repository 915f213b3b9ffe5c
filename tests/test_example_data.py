"""The shipped example of the user's own data: a labelled CSV and an unlabelled JSON-lines file, one sweep."""

from __future__ import annotations

import numpy as np

from harness.engine.runner import loaded_corpora, prepared_sweep

from conftest import REPO

SWEEP = REPO / "experiments" / "ferry_messages.yaml"


def test_the_example_sweep_reads_both_files_as_the_readme_says():
    prepared = prepared_sweep(SWEEP)
    corpora = loaded_corpora(prepared)
    labelled, inbox = corpora["ferry_labelled"], corpora["ferry_inbox"]
    assert labelled.n_texts == 150 and labelled.label_names == (
        "accessibility", "bookings", "delays", "lost_property", "onboard_cafe")
    assert np.bincount(labelled.labels).tolist() == [30] * 5
    assert labelled.ids[0].startswith("GF-") and len(set(labelled.ids)) == 150
    assert inbox.n_texts == 60 and inbox.labels is None and len(set(inbox.ids)) == 60
    assert len(prepared.trials) == 72  # the count the README's walk-through gives
    assert len(set(labelled.texts) | set(inbox.texts)) == 210  # no message repeated across the two files


def test_the_readme_walks_through_the_shipped_files():
    readme = (REPO / "README.md").read_text()
    for needed in ("examples/data/", "ferry_messages.csv", "ferry_inbox.jsonl", "experiments/ferry_messages.yaml",
                   "label_column: null", "harness plan experiments/ferry_messages.yaml"):
        assert needed in readme, needed
