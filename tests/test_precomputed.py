"""The user's own vectors (family precomputed): checked at the door, aligned by id, keyed by their bytes."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from harness.cli import main
from harness.embed.precomputed import VectorsSource, aligned_vectors, read_vectors
from harness.embed.static_vectors import tokens
from harness.engine.cache import StageCache
from harness.engine.runner import prepared_sweep, run_sweep_file
from harness.errors import DataError, SweepError
from harness.sweep import load_sweep

from conftest import MINILM, write_sweep

CORPUS = "{source: synthetic, n_texts: 160, topic_share: 0.4, seed: 4}"
GRID = """
grid:
  pooling: [mean]
  reduce: [{method: pca, n_components: 6}]
  cluster: [{method: kmeans, k: labels}, {method: hdbscan, min_cluster_size: 8}]
evidence: {resamples: 50, permutations: 99}
"""
MINILM_ONLY = f"name: pre\ndatasets: [{CORPUS}]\nmodels:\n  - {{name: {MINILM}, max_length: 128}}\n{GRID}"
# Scores that describe the run rather than the clustering: how long stages took, and the truncated share (known only
# for a model the tool ran itself).
NOT_COMPARED = {"encode_seconds", "reduce_seconds", "cluster_seconds", "truncated_fraction"}


@pytest.fixture(scope="module")
def minilm_mean(tmp_path_factory):
    """The MiniLM mean-pooled vectors of the corpus, as the tool computed and cached them, and the cache's folder."""
    folder = tmp_path_factory.mktemp("minilm_mean")
    sweep = write_sweep(folder, MINILM_ONLY)
    cache = folder / "cache"
    run_sweep_file(sweep, folder / "results", cache_dir=cache)
    trial = prepared_sweep(sweep).trials[0]
    vectors, _ = StageCache(cache).get("pool", trial.stages["pool"].key)
    return np.asarray(vectors, dtype=np.float32), cache


def _same_scores(a: dict, b: dict) -> None:
    compared = sorted(set(a) - NOT_COMPARED)
    assert compared == sorted(set(b) - NOT_COMPARED) and len(compared) > 15
    for name in compared:
        same = a[name] == b[name] or (math.isnan(a[name]) and math.isnan(b[name]))
        assert same, (name, a[name], b[name])


def test_minilm_mean_vectors_from_a_file_give_exactly_the_minilm_mean_scores(tmp_path, minilm_mean):
    vectors, cache = minilm_mean
    np.save(tmp_path / "minilm_mean.npy", vectors)
    # The same vectors as Parquet, rows shuffled and one row of another corpus added: aligned by the id column.
    ids = [f"req-{i:06d}" for i in range(len(vectors))]
    order = np.random.default_rng(0).permutation(len(vectors))
    table = pd.DataFrame({"doc": [ids[i] for i in order] + ["not-in-the-dataset"],
                          "emb": [vectors[i].tolist() for i in order] + [[0.0] * vectors.shape[1]]})
    table.to_parquet(tmp_path / "minilm_mean.parquet", index=False)
    sweep = write_sweep(tmp_path, f"""name: pre
datasets: [{CORPUS}]
models:
  - {{name: {MINILM}, max_length: 128}}
  - {{name: mine-npy, family: precomputed, vectors: minilm_mean.npy, length_tokenizer: {MINILM}}}
  - {{name: mine-parquet, family: precomputed, vectors: minilm_mean.parquet, id_column: doc, vector_column: emb,
     length_tokenizer: {MINILM}}}
{GRID}""")
    result = run_sweep_file(sweep, tmp_path / "results", cache_dir=cache)
    assert not result.failed and len(result.results) == 6
    by = {(r.trial.model.name, r.trial.clusterer.method): r.scores for r in result.results}
    for method in ("kmeans", "hdbscan"):
        reference = by[(MINILM, method)]
        _same_scores(reference, by[("mine-npy", method)])
        _same_scores(reference, by[("mine-parquet", method)])
    assert "truncated_fraction" not in by[("mine-npy", "kmeans")]
    assert {r.trial.pooling for r in result.results if r.trial.model.family == "precomputed"} == {"precomputed"}


def test_lengths_are_words_unless_a_tokenizer_is_named(tmp_path, minilm_mean):
    vectors, _ = minilm_mean
    np.save(tmp_path / "v.npy", vectors)
    sweep = write_sweep(tmp_path, f"name: words\ndatasets: [{CORPUS}]\nmodels:\n"
                                  f"  - {{name: mine, family: precomputed, vectors: v.npy}}\n{GRID}")
    results = tmp_path / "results"
    run_sweep_file(sweep, results)
    from conftest import finished_runs

    client, _, trials = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "words")
    table = pd.read_parquet(client.download_artifacts(trials[0].info.run_id, "assignments.parquet", str(tmp_path)))
    from harness.datasets import loaded_corpus

    corpus = loaded_corpus(load_sweep(sweep).datasets[0])
    assert table["token_count"].tolist() == [len(tokens(t)) for t in corpus.texts]


def test_pooling_and_layer_axes_do_not_apply(tmp_path):
    np.save(tmp_path / "v.npy", np.random.default_rng(0).normal(size=(160, 8)).astype(np.float32))
    sweep = write_sweep(tmp_path, f"""name: axes
datasets: [{CORPUS}]
models: [{{name: mine, family: precomputed, vectors: v.npy}}]
grid:
  pooling: [mean, max, cls]
  layers: [last, second_last, 6]
  reduce: [{{method: pca, n_components: 4}}]
  cluster: [{{method: kmeans, k: labels}}]
""")
    prepared = prepared_sweep(sweep)
    assert [(t.layers, t.pooling) for t in prepared.trials] == [("last", "precomputed")]
    from harness.engine.runner import check_against_data, loaded_corpora

    check_against_data(prepared, loaded_corpora(prepared))  # layer 6 does not apply here, so it is no error


def _encode_key(tmp_path, entry: str, name: str) -> str:
    sweep = write_sweep(tmp_path, f"name: k\ndatasets: [{CORPUS}]\nmodels: [{entry}]\n{GRID}", f"{name}.yaml")
    return prepared_sweep(sweep).trials[0].stages["encode"].key


def test_the_bytes_of_the_vectors_and_ids_and_every_setting_enter_the_encode_key(tmp_path):
    rng = np.random.default_rng(1)
    np.save(tmp_path / "v.npy", rng.normal(size=(160, 8)).astype(np.float32))
    (tmp_path / "ids.txt").write_text("\n".join(f"req-{i:06d}" for i in range(160)) + "\n")
    pd.DataFrame({"id": [f"req-{i:06d}" for i in range(160)], "vector": list(rng.normal(size=(160, 8))),
                  "other": list(rng.normal(size=(160, 8)))}).to_parquet(tmp_path / "v.parquet", index=False)
    base = "{name: mine, family: precomputed, vectors: v.npy, ids: ids.txt}"
    keys = {"base": _encode_key(tmp_path, base, "base")}
    keys["tokenizer"] = _encode_key(tmp_path, base.replace("}", f", length_tokenizer: {MINILM}}}"), "tokenizer")
    keys["no_ids"] = _encode_key(tmp_path, base.replace(", ids: ids.txt", ""), "no_ids")
    parquet = "{name: mine, family: precomputed, vectors: v.parquet}"
    keys["parquet"] = _encode_key(tmp_path, parquet, "parquet")
    keys["vector_column"] = _encode_key(tmp_path, parquet.replace("}", ", vector_column: other}"), "vector_column")
    keys["id_column"] = _encode_key(tmp_path, parquet.replace("}", ", id_column: id}"), "id_column")
    # One value changed in the vectors file, then one id in the ids file: the same settings, other bytes.
    changed = np.load(tmp_path / "v.npy")
    changed[7, 3] += 1.0
    np.save(tmp_path / "v.npy", changed)
    keys["vector_bytes"] = _encode_key(tmp_path, base, "vector_bytes")
    (tmp_path / "ids.txt").write_text("\n".join(f"req-{i:06d}" for i in reversed(range(160))) + "\n")
    keys["id_bytes"] = _encode_key(tmp_path, base, "id_bytes")
    # Every variation gives its own key, except id_column: id, the default spelled out (the same file read the same way).
    assert keys["id_column"] == keys["parquet"]
    distinct = {name: key for name, key in keys.items() if name != "id_column"}
    assert len(set(distinct.values())) == len(distinct), keys


BAD_FILES = {
    "rows": lambda d: np.save(d / "v.npy", np.ones((159, 4), dtype=np.float32)),
    "nan": lambda d: np.save(d / "v.npy", np.where(np.arange(160 * 4).reshape(160, 4) == 22, np.nan, 1.0)),
    "one_d": lambda d: np.save(d / "v.npy", np.ones(160)),
    "strings": lambda d: np.save(d / "v.npy", np.array([["a"] * 4] * 160)),
    "objects": lambda d: np.save(d / "v.npy", np.array([[None] * 4] * 160, dtype=object), allow_pickle=True),
}
BAD_MESSAGES = {
    "rows": "v.npy: 159 rows for 160 texts in dataset 'town_requests'; expected one row per text in the dataset's "
            "order, or ids",
    "nan": "v.npy: row 5: value 2 is nan; vectors must be finite",
    "one_d": "v.npy: expected a 2-D array of numbers (one row per text), got shape (160,)",
    "strings": "v.npy: expected numbers, got dtype <U1",
    "objects": "v.npy: not a readable .npy array of numbers (",  # numpy's own reason follows
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_a_bad_npy_is_refused_at_the_door_with_one_line_naming_file_and_row(tmp_path, capsys, case):
    BAD_FILES[case](tmp_path)
    sweep = write_sweep(tmp_path, f"name: bad\ndatasets: [{CORPUS}]\nmodels:\n"
                                  f"  - {{name: mine, family: precomputed, vectors: v.npy}}\n{GRID}")
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and BAD_MESSAGES[case] in err, err
    assert str(tmp_path / "v.npy") in err and "models[0].vectors: " in err
    assert not results.exists()


def _parquet(path, ids, vectors):
    pd.DataFrame({"id": ids, "vector": vectors}).to_parquet(path, index=False)


def test_parquet_and_ids_problems_each_name_file_and_row(tmp_path):
    dataset_ids = np.array([f"t{i}" for i in range(6)])
    good = [[float(i), 1.0, 2.0] for i in range(6)]
    cases = {
        "ragged": (["t0", "t1", "t2", "t3", "t4", "t5"], good[:3] + [[1.0, 2.0]] + good[4:],
                   "row 3: 2 values; expected 3 like row 0 (every vector needs the same width)"),
        "null_vector": (["t0", "t1", "t2", "t3", "t4", "t5"], good[:4] + [None] + good[5:], "row 4: no vector (null)"),
        "inf": (["t0", "t1", "t2", "t3", "t4", "t5"], good[:1] + [[1.0, float("inf"), 0.0]] + good[2:],
                "row 1: value 1 is inf; vectors must be finite"),
        "duplicate": (["t0", "t1", "t2", "t1", "t4", "t5"], good, "row 3: id 't1' appears twice (first at row 1)"),
        "missing_id": (["t0", "t1", "t2", "t3", "t4", "zz"], good, "no row for id 't5' (text 5 of dataset 'd')"),
    }
    for case, (ids, vectors, message) in cases.items():
        path = tmp_path / f"{case}.parquet"
        _parquet(path, ids, vectors)
        with pytest.raises(DataError) as err:
            aligned_vectors(VectorsSource(path), dataset_ids, "d")
        assert str(err.value) == f"{path}: {message}", case
    _parquet(tmp_path / "ok.parquet", ["t0", "t1", "t2", "t3", "t4", "t5"], good)
    with pytest.raises(DataError, match=r"ok.parquet: no column 'emb'; the columns are id, vector$"):
        aligned_vectors(VectorsSource(tmp_path / "ok.parquet", vector_column="emb"), dataset_ids, "d")

    np.save(tmp_path / "v.npy", np.array(good, dtype=np.float32))
    for lines, message in ((["t0", "t1", "t2"], "3 ids for 6 rows in"), (["t0", "t1", "t2", "t3", "t0", "t5"],
                                                                          "line 5: id 't0' appears twice (first at line 1)")):
        (tmp_path / "ids.txt").write_text("\n".join(lines) + "\n")
        with pytest.raises(DataError) as err:
            aligned_vectors(VectorsSource(tmp_path / "v.npy", ids=tmp_path / "ids.txt"), dataset_ids, "d")
        assert str(err.value).startswith(f"{tmp_path / 'ids.txt'}: {message}")


def test_ids_put_rows_in_the_dataset_order(tmp_path):
    vectors = np.arange(12, dtype=np.float32).reshape(4, 3)
    np.save(tmp_path / "v.npy", vectors)
    (tmp_path / "ids.txt").write_text("c\na\nd\nb\n")
    aligned = aligned_vectors(VectorsSource(tmp_path / "v.npy", ids=tmp_path / "ids.txt"), np.array(["a", "b", "c"]), "d")
    assert np.array_equal(aligned, vectors[[1, 3, 0]])
    matrix, ids = read_vectors(VectorsSource(tmp_path / "v.npy"))
    assert ids is None and matrix.dtype == np.float32


@pytest.mark.parametrize("entry, message", [
    ("{name: m, family: precomputed}", "models[0]: family precomputed needs 'vectors:', a .npy or .parquet file"),
    ("{name: m, family: precomputed, vectors: v.csv}", "models[0]: vectors: expected a .npy or .parquet file"),
    ("{name: m, family: precomputed, vectors: v.npy, id_column: doc}",
     "models[0]: id_column and vector_column apply to a Parquet file"),
    ("{name: m, family: precomputed, vectors: v.parquet, ids: ids.txt}",
     "models[0]: 'ids:' applies to a .npy; a Parquet file names its id column with 'id_column:'"),
    (f"{{name: {MINILM}, ids: ids.txt}}", "models[0]: 'ids' applies to family precomputed, not sentence_transformer"),
    ("{name: m, family: precomputed, vectors: v.npy, device: cpu}",
     "models[0]: 'device' applies to family sentence_transformer or transformer, not precomputed"),
])
def test_impossible_precomputed_entries_are_refused(tmp_path, entry, message):
    for name in ("v.csv", "v.npy", "v.parquet", "ids.txt"):
        (tmp_path / name).write_text("x")
    sweep = write_sweep(tmp_path, f"name: b\ndatasets: [{CORPUS}]\nmodels: [{entry}]\n{GRID}")
    with pytest.raises(SweepError) as err:
        load_sweep(sweep)
    assert str(err.value).startswith(f"{sweep}:3: {message}"), str(err.value)
