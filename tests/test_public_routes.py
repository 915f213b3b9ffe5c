"""The public routes say why they failed (with the real libraries), and `harness datasets mirror` builds a mirror.

No test reaches the network: the "hub" and the download server are local HTTP servers or closed local ports
(HF_ENDPOINT, scikit-learn's archive URL), and the libraries' retry pauses are skipped in the child process.
"""

from __future__ import annotations

import hashlib
import http.server
import json
import os
import subprocess
import sys
import threading

import numpy as np
import pandas as pd
import pytest

from harness.cli import main
from harness.datasets import AgNewsSource, TwentyNewsgroupsSource, loaded_corpus
from harness.datasets import public
from harness.datasets.public import RouteFailure, hub_table

from conftest import REPO, free_port, write_sweep

AG_NAMES = ["World", "Sports", "Business", "Sci/Tech"]


def _route_reason(route: str, setup: str, env: dict[str, str]) -> str:
    """Run one public route in a fresh process (the libraries read their settings at import) and return its reason."""
    script = f"""
import sys, time
time.sleep = lambda seconds: None  # the libraries' retry pauses; the failures themselves are real
{setup}
from harness.datasets.public import PUBLIC_ROUTES, RouteFailure
try:
    PUBLIC_ROUTES[{route!r}]()
    print("REASON: none")
except RouteFailure as failure:
    print("REASON:", failure)
"""
    environment = {k: v for k, v in os.environ.items() if k not in ("HF_HUB_OFFLINE", "HF_DATASETS_OFFLINE")}
    environment.update({"PYTHONPATH": str(REPO), **env})
    done = subprocess.run([sys.executable, "-c", script], env=environment, capture_output=True, text=True, timeout=300)
    lines = [line for line in done.stdout.splitlines() if line.startswith("REASON: ")]
    assert lines, done.stderr[-2000:]
    return lines[-1].removeprefix("REASON: ")


class _Answering(http.server.BaseHTTPRequestHandler):
    status = 500

    def _answer(self):
        self.send_response(self.status)
        self.send_header("Content-Length", "2")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(b"{}")

    do_GET = do_HEAD = _answer

    def log_message(self, *args):
        pass


@pytest.fixture
def answering_server():
    """A local HTTP server that answers every request with one status code."""
    servers = []

    def start(status: int) -> str:
        handler = type("Handler", (_Answering,), {"status": status})
        server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
        threading.Thread(target=server.serve_forever, daemon=True).start()
        servers.append(server)
        return f"http://127.0.0.1:{server.server_address[1]}"

    yield start
    for server in servers:
        server.shutdown()
        server.server_close()


# ---- AG News through the datasets library -------------------------------------------------------------------


def test_offline_mode_is_reported_as_offline_mode():
    # conftest sets HF_HUB_OFFLINE=1; the datasets library itself refuses, and the reason names the setting.
    with pytest.raises(RouteFailure, match=r"offline mode is on \(HF_HUB_OFFLINE"):
        public.PUBLIC_ROUTES["ag_news"]()


def test_a_missing_datasets_package_is_named():
    # An import that fails the way it does where the package is not installed.
    reason = _route_reason("ag_news", "sys.modules['datasets'] = None", {})
    assert reason.startswith("the 'datasets' package is not installed") and "pip install" in reason


def test_an_unreachable_hub_is_reported_as_unreachable_not_offline():
    reason = _route_reason("ag_news", "", {"HF_ENDPOINT": f"http://127.0.0.1:{free_port()}"})  # nothing listens there
    assert reason.startswith("cannot reach the Hugging Face hub") and "offline mode" not in reason


def test_a_run_without_network_or_mirror_fails_with_one_line_naming_both(tmp_path):
    # What a user on a fresh clone without a network sees: nothing of the library's retry chatter, one line.
    sweep = write_sweep(tmp_path, """
name: no_network
datasets:
  - {source: ag_news}
models: [sentence-transformers/all-MiniLM-L6-v2]
grid:
  pooling: [mean]
  cluster:
    - {method: kmeans, k: labels}
""")
    script = ("import sys, time\ntime.sleep = lambda seconds: None\nfrom harness.cli import main\n"
              f"sys.exit(main(['run', {str(sweep)!r}, '--results-dir', {str(tmp_path / 'results')!r}]))")
    environment = {k: v for k, v in os.environ.items() if k not in ("HF_HUB_OFFLINE", "HF_DATASETS_OFFLINE", "HARNESS_DATA_DIR")}
    environment.update({"PYTHONPATH": str(REPO), "HF_ENDPOINT": f"http://127.0.0.1:{free_port()}"})
    done = subprocess.run([sys.executable, "-c", script], env=environment, capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    (line,) = done.stderr.strip().splitlines()
    assert "no mirror (HARNESS_DATA_DIR is not set" in line and "cannot reach the Hugging Face hub" in line
    assert "harness datasets mirror --out DIR ag_news" in line and not (tmp_path / "results").exists()


@pytest.mark.parametrize("status", [401, 404, 500])
def test_an_http_error_names_its_status(answering_server, status):
    reason = _route_reason("ag_news", "", {"HF_ENDPOINT": answering_server(status)})
    assert reason.startswith(f"HTTP {status} from the Hugging Face hub"), reason


def test_an_unexpected_schema_is_named_and_the_expected_one_is_read(monkeypatch):
    import datasets

    def dataset_dict(columns: dict, label_feature=None):
        features = datasets.Features({k: label_feature if k == "label" and label_feature else datasets.Value(
            "string" if isinstance(v[0], str) else "int64") for k, v in columns.items()})
        split = datasets.Dataset.from_dict(columns, features=features)
        return datasets.DatasetDict({"train": split, "test": split})

    renamed = dataset_dict({"content": ["a", "b"], "label": [0, 1]})
    monkeypatch.setattr(datasets, "load_dataset", lambda *a, **k: renamed)
    with pytest.raises(RouteFailure, match=r"unexpected schema from huggingface:ag_news: .*got .*'content', 'label'"):
        public.PUBLIC_ROUTES["ag_news"]()
    unnamed_labels = dataset_dict({"text": ["a", "b"], "label": [0, 1]})  # plain integers, no class names
    monkeypatch.setattr(datasets, "load_dataset", lambda *a, **k: unnamed_labels)
    with pytest.raises(RouteFailure, match="unexpected schema"):
        public.PUBLIC_ROUTES["ag_news"]()

    expected = dataset_dict({"text": ["w", "s", "b", "t"], "label": [0, 1, 2, 3]}, datasets.ClassLabel(names=AG_NAMES))
    table = hub_table(expected, "ag_news")
    assert table.columns.tolist() == ["text", "label", "split", "label_name"]
    assert table.label_name.tolist() == AG_NAMES * 2 and table.split.tolist() == ["train"] * 4 + ["test"] * 4


# ---- 20 Newsgroups through scikit-learn's fetcher ---------------------------------------------------------------


def test_newsgroups_with_downloads_off_names_the_setting_and_the_data_folder(tmp_path, monkeypatch):
    monkeypatch.setenv("SCIKIT_LEARN_DATA", str(tmp_path))  # an empty data folder
    with pytest.raises(RouteFailure, match=f"downloads are off .* data folder {tmp_path} does not hold it"):
        public.PUBLIC_ROUTES["twenty_newsgroups"]()


@pytest.mark.parametrize("answer", ["closed port", 404])
def test_newsgroups_download_failures_name_the_cause(tmp_path, answering_server, answer):
    url = f"http://127.0.0.1:{free_port()}/archive" if answer == "closed port" else answering_server(answer) + "/archive"
    setup = ("import sklearn.datasets._twenty_newsgroups as fetcher\n"
             f"fetcher.ARCHIVE = fetcher.ARCHIVE._replace(url={url!r})")
    reason = _route_reason("twenty_newsgroups", setup, {"SCIKIT_LEARN_DATA": str(tmp_path)})
    if answer == "closed port":
        assert reason.startswith("cannot reach the download server"), reason
    else:
        assert reason.startswith(f"HTTP 404 from {url}"), reason


# ---- the mirror ------------------------------------------------------------------------------------------------


def _fake_ag_news() -> pd.DataFrame:
    rng = np.random.default_rng(0)
    topics = {0: "election minister treaty", 1: "match goal league", 2: "shares profit market", 3: "software chip science"}
    rows = []
    for split, n in (("test", 20), ("train", 40)):  # test first: the mirror must put train rows first
        for i in range(n):
            label = i % 4
            words = topics[label].split() * int(rng.integers(1, 4))
            rows.append({"text": f"{' '.join(words)} report {i}", "label": label, "split": split})
    table = pd.DataFrame(rows)
    table["label_name"] = [AG_NAMES[i] for i in table.label]
    table.attrs["route"] = "huggingface:ag_news"
    return table


def _fake_newsgroups() -> pd.DataFrame:
    table = pd.DataFrame({"text": [f"From: a@b\n\npost {i}" for i in range(30)], "label": [i % 3 for i in range(30)],
                          "split": ["train"] * 18 + ["test"] * 12})
    table["label_name"] = [("alt.atheism", "comp.graphics", "sci.space")[i] for i in table.label]
    table.attrs["route"] = "scikit-learn:fetch_20newsgroups"
    return table


def _failing_route() -> pd.DataFrame:
    raise RouteFailure("HTTP 503 from the Hugging Face hub: try later")


@pytest.fixture
def fake_routes(monkeypatch):
    monkeypatch.setitem(public.PUBLIC_ROUTES, "ag_news", _fake_ag_news)
    monkeypatch.setitem(public.PUBLIC_ROUTES, "twenty_newsgroups", _fake_newsgroups)


def _tree(folder) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())} if folder.exists() else {}


def test_mirror_writes_the_loader_files_and_a_manifest_that_matches_them(tmp_path, fake_routes, capsys):
    out = tmp_path / "mirror"
    assert main(["datasets", "mirror", "--out", str(out)]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["ag_news.parquet", "manifest.json", "twenty_newsgroups.parquet"]
    manifest = json.loads((out / "manifest.json").read_text())
    for name, fake in (("ag_news", _fake_ag_news()), ("twenty_newsgroups", _fake_newsgroups())):
        entry = manifest["datasets"][name]
        path = out / entry["file"]
        assert entry["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest() and entry["bytes"] == path.stat().st_size
        assert entry["rows"] == len(fake) and entry["classes"] == fake.label.nunique()
        assert entry["rows_per_split"] == {s: int((fake.split == s).sum()) for s in ("train", "test")}
        assert entry["route"] == fake.attrs["route"]
        written = pd.read_parquet(path)
        assert written.columns.tolist() == ["text", "label", "label_name", "split"] and written.label.dtype == np.int64
        assert written.split.tolist() == sorted(fake.split.tolist(), key=["train", "test"].index)  # train rows first
        expected = pd.concat([fake[fake.split == "train"], fake[fake.split == "test"]])
        assert written.text.tolist() == expected.text.tolist() and written.label_name.tolist() == expected.label_name.tolist()
    out_text = capsys.readouterr().out
    assert f"HARNESS_DATA_DIR={out}" in out_text and "ag_news: 60 rows (train 40, test 20)" in out_text

    # The loaders read the mirror as written: every split, class names in label order.
    corpus = loaded_corpus(AgNewsSource(source="ag_news", split="all", data_dir=out))
    assert corpus.n_texts == 60 and corpus.label_names == tuple(AG_NAMES) and corpus.source.startswith("mirror:")
    assert loaded_corpus(TwentyNewsgroupsSource(source="twenty_newsgroups", split="test", data_dir=out)).n_texts == 12


def test_a_sweep_runs_on_the_mirror_named_by_the_environment(tmp_path, fake_routes, tiny_model_dir, monkeypatch):
    out = tmp_path / "mirror"
    assert main(["datasets", "mirror", "--out", str(out), "ag_news"]) == 0
    monkeypatch.setenv("HARNESS_DATA_DIR", str(out))
    sweep = write_sweep(tmp_path, f"""
name: on_the_mirror
datasets:
  - {{source: ag_news, split: train}}
models:
  - {{name: {tiny_model_dir}, max_length: 32}}
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 0}}
""")
    assert main(["run", str(sweep), "--results-dir", str(tmp_path / "results"), "--no-progress"]) == 0


def test_a_failing_route_writes_nothing(tmp_path, fake_routes, monkeypatch, capsys):
    monkeypatch.setitem(public.PUBLIC_ROUTES, "twenty_newsgroups", _failing_route)
    out = tmp_path / "new"
    assert main(["datasets", "mirror", "--out", str(out), "ag_news", "twenty_newsgroups"]) == 2  # the second fails
    err = capsys.readouterr().err.strip().splitlines()
    assert err[:-1] == ["fetching ag_news through its public route", "fetching twenty_newsgroups through its public route"]
    assert err[-1].startswith("harness: error: dataset 'twenty_newsgroups': the public route failed: HTTP 503")
    assert err[-1].endswith("nothing was written") and not out.exists()


def test_an_existing_mirror_is_updated_whole_or_not_at_all(tmp_path, fake_routes, monkeypatch):
    out = tmp_path / "mirror"
    assert main(["datasets", "mirror", "--out", str(out), "twenty_newsgroups"]) == 0
    before = _tree(out)
    # A write that fails half-way (disk full on the second file): the old mirror stays byte for byte, no temporaries.
    real_to_parquet, calls = pd.DataFrame.to_parquet, []

    def failing_second_write(self, *args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise OSError(28, "No space left on device")
        return real_to_parquet(self, *args, **kwargs)

    monkeypatch.setattr(pd.DataFrame, "to_parquet", failing_second_write)
    assert main(["datasets", "mirror", "--out", str(out)]) == 2
    assert _tree(out) == before
    monkeypatch.setattr(pd.DataFrame, "to_parquet", real_to_parquet)
    # Adding one dataset keeps the other's file and manifest entry.
    assert main(["datasets", "mirror", "--out", str(out), "ag_news"]) == 0
    manifest = json.loads((out / "manifest.json").read_text())["datasets"]
    assert sorted(manifest) == ["ag_news", "twenty_newsgroups"]
    assert (out / "twenty_newsgroups.parquet").read_bytes() == before["twenty_newsgroups.parquet"]
    assert manifest["twenty_newsgroups"] == json.loads(before["manifest.json"])["datasets"]["twenty_newsgroups"]


def test_an_unknown_dataset_name_is_refused_with_the_known_ones(tmp_path, capsys):
    assert main(["datasets", "mirror", "--out", str(tmp_path / "m"), "ag-news"]) == 2
    assert "no public dataset named 'ag-news'; expected one of twenty_newsgroups, ag_news" in capsys.readouterr().err
    assert not (tmp_path / "m").exists()
