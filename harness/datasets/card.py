"""Dataset cards: what a corpus holds, and how much its labels are tied to length."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Optional

import numpy as np
import pandas as pd

from harness.metrics import length_eta_squared

QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
TokenCounter = Callable[[list[str]], np.ndarray]


def split_card(texts: list[str], labels: np.ndarray | None, label_names, count_tokens: TokenCounter) -> dict[str, Any]:
    """Rows, class counts, token-length quantiles and eta^2(log length | label) of one split."""
    counts = np.maximum(count_tokens(texts), 1)
    card: dict[str, Any] = {
        "rows": len(texts),
        "token_length_quantiles": {f"q{int(q * 100):02d}": float(np.quantile(counts, q)) for q in QUANTILES},
        "token_length_mean": float(counts.mean()),
    }
    if labels is not None:
        names = [label_names[i] if label_names else str(i) for i in labels]
        card["classes"] = {str(k): int(v) for k, v in pd.Series(names).value_counts().sort_index().items()}
        card["length_eta2_labels"] = length_eta_squared(counts, labels)
    return card


def table_card(name: str, table: pd.DataFrame, count_tokens: TokenCounter, all_splits: tuple[str, ...]) -> dict[str, Any]:
    """Card of a whole public dataset table (columns text, label, label_name, split)."""
    names = table.drop_duplicates("label").sort_values("label").label_name.tolist()
    present = [s for s in all_splits if s in set(table.split)]
    return {
        "name": name,
        "route": table.attrs.get("route", ""),
        "splits": {s: split_card(table[table.split == s].text.tolist(), table[table.split == s].label.to_numpy(),
                                 names, count_tokens) for s in present},
        "missing_splits": [s for s in all_splits if s not in present],
        "n_classes": len(names),
    }


def corpus_card(corpus, count_tokens: TokenCounter) -> dict[str, Any]:
    """Card of a loaded corpus (after splitting, stripping and sampling)."""
    return {"name": corpus.name, "route": corpus.source, "fingerprint": corpus.fingerprint, "notes": corpus.notes,
            "n_classes": corpus.n_classes, **split_card(corpus.texts, corpus.labels, corpus.label_names, count_tokens)}


def tokenizer_counter(model_folder) -> TokenCounter:
    """Token counts under a model's tokenizer (special tokens excluded, not truncated)."""
    from transformers import AutoTokenizer

    tokenizer = AutoTokenizer.from_pretrained(str(model_folder))

    def count(texts: list[str]) -> np.ndarray:
        ids = tokenizer(texts, add_special_tokens=False, truncation=False, verbose=False)["input_ids"]
        return np.fromiter((len(i) for i in ids), dtype=np.int64, count=len(texts))

    return count


def reachable_cards(data_dir: Optional[Path], count_tokens: TokenCounter) -> list[dict[str, Any]]:
    """Cards of every built-in public dataset reachable now (mirror or public route), with why others are not."""
    from harness.datasets.public import SPLITS, AgNewsSource, TwentyNewsgroupsSource, source_table
    from harness.errors import DataError

    cards = []
    for spec in (TwentyNewsgroupsSource(source="twenty_newsgroups", data_dir=data_dir),
                 AgNewsSource(source="ag_news", data_dir=data_dir)):
        try:
            table = source_table(spec)
        except DataError as err:
            cards.append({"name": spec.source, "reachable": False, "reason": str(err)})
            continue
        cards.append({**table_card(spec.source, table, count_tokens, SPLITS), "reachable": True})
    return cards
