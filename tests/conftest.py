"""Shared fixtures. Tests never touch the network: HF_HUB_OFFLINE is forced here."""

from __future__ import annotations

import os
from html.parser import HTMLParser
from pathlib import Path

import pytest

os.environ["HF_HUB_OFFLINE"] = "1"
os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("MLFLOW_LOGGING_LEVEL", "WARNING")

REPO = Path(__file__).resolve().parents[1]
# The offline mirror of the public datasets, when the environment names one (.ci/run sets it where a local
# mirror exists; `harness datasets mirror --out DIR` builds one). Tests that read it skip, with this reason, without it.
MIRROR_DIR = Path(os.environ["HARNESS_DATA_DIR"]).expanduser().resolve() if os.environ.get("HARNESS_DATA_DIR") else None
MINILM = "sentence-transformers/all-MiniLM-L6-v2"


def needs_mirror(*files: str):
    """Skip a test that reads these mirror files when HARNESS_DATA_DIR does not hold them, saying which is missing."""
    if MIRROR_DIR is None:
        return pytest.mark.skipif(True, reason=f"needs the dataset mirror ({', '.join(files)}): HARNESS_DATA_DIR is not set")
    missing = [f for f in files if not (MIRROR_DIR / f).is_file()]
    return pytest.mark.skipif(bool(missing), reason=f"needs {', '.join(missing)} in HARNESS_DATA_DIR={MIRROR_DIR}")


def _tiny_bert(folder: Path, tokenizer, output_scale: float | None = None, layers: int = 2) -> Path:
    """A randomly initialised BERT (hidden 32, 2 layers unless told) with this tokenizer, saved as a model folder."""
    import torch
    from transformers import BertConfig, BertModel

    torch.manual_seed(0)
    config = BertConfig(
        vocab_size=tokenizer.vocab_size, hidden_size=32, num_hidden_layers=layers, num_attention_heads=2,
        intermediate_size=64, max_position_embeddings=128,
    )
    model = BertModel(config).eval()
    if output_scale is not None:
        with torch.no_grad():
            model.encoder.layer[-1].output.LayerNorm.weight.fill_(output_scale)
    model.save_pretrained(folder)
    tokenizer.save_pretrained(folder)
    return folder


def _minilm_tokenizer():
    from transformers import AutoTokenizer

    from harness.embed.models import resolve_model

    return AutoTokenizer.from_pretrained(str(resolve_model(MINILM).folder))


@pytest.fixture(scope="session")
def tiny_model_dir(tmp_path_factory) -> Path:
    """A randomly initialised 2-layer BERT (hidden 32) with the MiniLM tokenizer, saved as a model folder."""
    return _tiny_bert(tmp_path_factory.mktemp("tiny_bert"), _minilm_tokenizer())


@pytest.fixture(scope="session")
def overflowing_model_dir(tmp_path_factory) -> Path:
    """The tiny BERT with its last layer's output scaled to about 1e6: stored as float16 (largest finite value
    65504) its vectors are infinite, and every reducer refuses them. A trial that fails on its data."""
    return _tiny_bert(tmp_path_factory.mktemp("overflowing_bert"), _minilm_tokenizer(), output_scale=1e6)


@pytest.fixture(scope="session")
def char_model_dir(tmp_path_factory) -> Path:
    """The tiny BERT with a character-level WordPiece tokenizer: it counts a text's length in letters, not in
    MiniLM's word pieces."""
    from transformers import BertTokenizer

    characters = "abcdefghijklmnopqrstuvwxyz0123456789"
    vocabulary = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]", *characters, *(f"##{c}" for c in characters), *".,-'!?"]
    tokenizer = BertTokenizer(vocab={word: i for i, word in enumerate(vocabulary)})
    return _tiny_bert(tmp_path_factory.mktemp("char_bert"), tokenizer)


def free_port() -> int:
    import socket

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def wait_healthy(url: str, seconds: float = 90) -> None:
    """Poll an MLflow server's /health until it answers 200 (bounded: fails after ``seconds``)."""
    import time
    import urllib.request

    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            if urllib.request.urlopen(f"{url}/health", timeout=2).status == 200:
                return
        except OSError:
            time.sleep(0.5)
    raise AssertionError(f"{url} did not become healthy in {seconds} s")


def write_sweep(folder: Path, text: str, name: str = "sweep.yaml") -> Path:
    path = folder / name
    path.write_text(text)
    return path


_MEASUREMENTS: list[str] = []


@pytest.fixture
def record_measurement():
    """Tests that measure something (without asserting a direction) report it in the session summary."""
    return _MEASUREMENTS.append


def pytest_terminal_summary(terminalreporter):
    if _MEASUREMENTS:
        terminalreporter.section("measurements")
        for line in _MEASUREMENTS:
            terminalreporter.write_line(line)


def finished_runs(tracking_uri: str, experiment: str):
    """(client, sweep runs, seed runs) of an experiment, read back through MLflow's client.

    Seed runs are the trials; the configuration runs between them and the sweep run come from configuration_runs.
    """
    client, runs = _runs(tracking_uri, experiment)
    return client, runs["sweep"], runs["trial"]


def configuration_runs(tracking_uri: str, experiment: str):
    return _runs(tracking_uri, experiment)[1]["configuration"]


def _runs(tracking_uri: str, experiment: str):
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=tracking_uri)
    experiment_id = client.get_experiment_by_name(experiment).experiment_id
    by_kind = {"sweep": [], "configuration": [], "trial": []}
    for run in client.search_runs([experiment_id], max_results=5000):
        by_kind[run.data.tags["harness.kind"]].append(run)
    return client, by_kind


class _ReportSections(HTMLParser):
    """Per dataset section of a report page: its leaderboard rows (cells as text), image classes, caveats."""

    def __init__(self):
        super().__init__()
        self.sections: dict[str, dict] = {}
        self._current = None
        self._in_board = self._in_caveats = False
        self._row = self._cell = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "section" and "data-dataset" in attrs:
            self._current = self.sections.setdefault(attrs["data-dataset"], {"rows": [], "images": [], "caveats": []})
        elif self._current is not None:
            classes = (attrs.get("class") or "").split()
            if tag == "table" and "leaderboard" in classes:
                self._in_board = True
            elif tag == "tr" and self._in_board:
                self._row = []
            elif tag == "td" and self._row is not None:
                self._cell = ""
            elif tag == "img":
                self._current["images"].append(attrs.get("class"))
            elif tag == "li" and self._in_caveats:
                self._cell = ""
            if tag == "ul" and "caveats" in classes:
                self._in_caveats = True

    def handle_endtag(self, tag):
        if tag == "li" and self._in_caveats and self._cell is not None:
            self._current["caveats"].append(self._cell)
            self._cell = None
        elif tag == "td" and self._cell is not None:
            self._row.append(self._cell)
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if self._row:
                self._current["rows"].append(self._row)
            self._row = None
        elif tag == "table":
            self._in_board = False
        elif tag == "ul":
            self._in_caveats = False
        elif tag == "section":
            self._current = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data


def report_sections(page: str) -> dict[str, dict]:
    """Per dataset section of a report page, by dataset name: leaderboard rows, image classes, caveats."""
    parsed = _ReportSections()
    parsed.feed(page)
    return parsed.sections
