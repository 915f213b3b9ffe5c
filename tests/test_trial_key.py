"""Keys hold every input that changes a result: the data by content, every setting unless declared neutral."""

from __future__ import annotations

import pandas as pd

from harness.datasets.synthetic import SyntheticSource, synthetic_corpus
from harness.engine.runner import prepared_sweep, run_sweep_file

from conftest import write_sweep


def _mirror(folder, seed: int):
    """An AG News mirror file of 48 texts in 4 classes: the same shape for every seed, other texts."""
    corpus = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=48, n_topics=4, topic_share=0.5, seed=seed))
    folder.mkdir()
    pd.DataFrame({"text": corpus.texts, "label": corpus.labels, "label_name": [f"c{i}" for i in corpus.labels],
                  "split": "test"}).to_parquet(folder / "ag_news.parquet")
    return folder


def test_a_mirror_with_other_texts_gets_its_own_forward_pass_and_reuses_no_trial(tmp_path, tiny_model_dir,
                                                                                 monkeypatch):
    # The sweep names no data_dir: the mirror comes from HARNESS_DATA_DIR, as in the issue.
    sweep = write_sweep(tmp_path, f"""
name: mirrors
datasets:
  - {{source: ag_news}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 20, permutations: 19}}
""")
    first_mirror, second_mirror = _mirror(tmp_path / "mirror_a", seed=1), _mirror(tmp_path / "mirror_b", seed=2)
    results = tmp_path / "results"
    monkeypatch.setenv("HARNESS_DATA_DIR", str(first_mirror))
    first = run_sweep_file(sweep, results)
    assert [r.status for r in first.results] == ["FINISHED"] and first.work["forward_passes"] == 1

    monkeypatch.setenv("HARNESS_DATA_DIR", str(second_mirror))  # same shape, other texts
    second = run_sweep_file(sweep, results)
    assert [r.status for r in second.results] == ["FINISHED"]  # nothing reused from the first mirror's run
    assert second.work["forward_passes"] == 1  # its own token counts and pooled vectors
    assert second.results[0].trial.key != first.results[0].trial.key

    # The same folder, its file rewritten in place: again a new key.
    (second_mirror / "ag_news.parquet").unlink()
    _mirror(tmp_path / "mirror_c", seed=3).joinpath("ag_news.parquet").rename(second_mirror / "ag_news.parquet")
    rewritten = prepared_sweep(sweep).trials[0]
    assert rewritten.key != second.results[0].trial.key
    assert rewritten.stages["encode"].key != second.results[0].trial.stages["encode"].key

    # And back to the first mirror: its trial is found again.
    monkeypatch.setenv("HARNESS_DATA_DIR", str(first_mirror))
    again = run_sweep_file(sweep, results)
    assert [r.status for r in again.results] == ["REUSED"] and again.results[0].trial.key == first.results[0].trial.key


# --- Hermeticity: every field of the typed settings changes the trial key, or is declared result-neutral ----------
#
# The walk is generated from the pydantic models: every settings class reachable from Sweep (through lists,
# unions and Optional) and every field of it. For each field, a changed value is derived from its type (bool,
# int, float, Literal, Optional; a few need a real resource, in CHANGES below) and planted in base sweeps that
# cover every dataset source, model family, reducer, clusterer and transform step. A field added later fails
# here until it changes the key or is listed in harness.engine.plan.RESULT_NEUTRAL with its reason.

import shutil  # noqa: E402
import types  # noqa: E402
import typing  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402
import yaml  # noqa: E402
from pydantic import BaseModel, ValidationError  # noqa: E402

from harness.embed.layers import LAYER_SELECTIONS  # noqa: E402
from harness.embed.pooling import POOLINGS  # noqa: E402
from harness.engine.plan import RESULT_NEUTRAL  # noqa: E402
from harness.errors import HarnessError  # noqa: E402
from harness.geometry.transforms import NORMALIZATIONS  # noqa: E402
from harness.sweep import MODEL_FAMILIES, Sweep  # noqa: E402

# Where a changed setting leaves the trial untouched because the planner maps it away for that family: the
# trial is the same trial, so its key rightly stays.
INAPPLICABLE = {
    ("lexical", "GridSettings.pooling"): "one document vector (tfidf_svd): every pooling maps to it",
    ("lexical", "GridSettings.layers"): "no layers",
    ("static", "GridSettings.layers"): "word vectors have no layers",
    ("precomputed", "GridSettings.pooling"): "the user's vectors are already one per text: every pooling maps to them",
    ("precomputed", "GridSettings.layers"): "no layers",
}


def _settings_classes(annotation, found: dict[str, type]) -> dict[str, type]:
    """Every settings model reachable from an annotation (through Annotated, Optional, Union, list)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        if annotation.__name__ not in found:
            found[annotation.__name__] = annotation
            for field in annotation.model_fields.values():
                _settings_classes(field.annotation, found)
        return found
    for argument in typing.get_args(annotation):
        _settings_classes(argument, found)
    return found


SETTINGS_CLASSES = _settings_classes(Sweep, {})
ALL_FIELDS = sorted(f"{name}.{field}" for name, cls in SETTINGS_CLASSES.items() for field in cls.model_fields)


def _union_members(annotation) -> list[type]:
    """The settings classes of a list-of-union field (datasets, reduce, cluster), in declaration order."""
    found: list[type] = []

    def visit(a):
        if isinstance(a, type) and issubclass(a, BaseModel):
            found.append(a)
        else:
            for argument in typing.get_args(a):
                visit(argument)

    visit(annotation)
    return list(dict.fromkeys(found))


def _discriminator(cls: type) -> str | None:
    """The field fixed to one literal value (method, source): it names the class, it cannot change in place."""
    for name, field in cls.model_fields.items():
        if typing.get_origin(field.annotation) is typing.Literal and len(typing.get_args(field.annotation)) == 1:
            return name
    return None


def _generic_changes(annotation, current) -> list:
    """Values other than ``current`` that a field of this type accepts, simplest first."""
    origin, arguments = typing.get_origin(annotation), typing.get_args(annotation)
    if origin is typing.Annotated:
        return _generic_changes(arguments[0], current)
    if origin in (typing.Union, types.UnionType):
        out = [None] if type(None) in arguments and current is not None else []
        for argument in arguments:
            if argument is not type(None):
                out += _generic_changes(argument, current if _is_instance(current, argument) else None)
        return out
    if origin is typing.Literal:
        return [choice for choice in arguments if choice != current]
    if annotation is bool:
        return [not current]
    if annotation is int:
        return [current + 1, current + 2] if isinstance(current, int) else [3, 7]
    if annotation is float:
        return [current * 1.5, current / 2, current + 0.05] if current else [0.1, 0.5]
    if annotation is str:
        return [f"{current}x" if current else "x"]
    return []


def _is_instance(value, annotation) -> bool:
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _is_instance(value, typing.get_args(annotation)[0])
    if origin is typing.Literal:
        return value in typing.get_args(annotation)
    return isinstance(annotation, type) and isinstance(value, annotation) and not (annotation is int and isinstance(value, bool))


@pytest.fixture(scope="module")
def resources(tmp_path_factory, tiny_model_dir):
    """Files the base sweeps point at, each with a twin of other content (the changed value of a path setting)."""
    import torch
    from transformers import BertConfig, BertModel

    root = tmp_path_factory.mktemp("hermetic")
    other_model = root / "other_bert"
    shutil.copytree(tiny_model_dir, other_model)
    torch.manual_seed(1)
    BertModel(BertConfig.from_pretrained(other_model)).eval().save_pretrained(other_model)

    corpus = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=60, n_topics=3, topic_share=0.5, seed=9))
    other = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=60, n_topics=3, topic_share=0.5, seed=10))
    words = sorted({w.strip(".").lower() for t in corpus.texts + other.texts for w in t.split()})
    rng = np.random.default_rng(0)
    for suffix in ("a", "b"):
        np.save(root / f"vectors_{suffix}.npy", rng.normal(size=(len(words), 8)).astype(np.float32))
        (root / f"vocabulary_{suffix}.txt").write_text("\n".join(words if suffix == "a" else words[::-1]) + "\n")
    for suffix, texts in (("a", corpus.texts), ("b", other.texts)):
        pd.DataFrame({"text": texts, "text2": texts[::-1], "label": corpus.labels, "label2": corpus.labels[::-1],
                      "id": [f"r{i}" for i in range(60)], "id2": [f"q{i}" for i in range(60)]}).to_csv(root / f"file_{suffix}.csv",
                                                                                                           index=False)
        mirror = root / f"mirror_{suffix}"
        mirror.mkdir()
        # Messages with a header block, a quoted line and a signature, so that every removal changes the text.
        messages = [f"From: someone{i}@example.org\nSubject: request {i}\n\nIn article someone wrote:\n> an old line\n"
                    f"{text}\n\n-- \nsigned {i}" for i, text in enumerate(texts)]
        table = pd.DataFrame({"text": messages, "label": corpus.labels, "label_name": [f"c{i}" for i in corpus.labels],
                              "split": ["train", "test"] * 30})
        table.to_parquet(mirror / "twenty_newsgroups.parquet")
        table.to_parquet(mirror / "ag_news.parquet")
    # The user's own vectors for the file source's texts, under both of its id columns (r*, q*), as .npy + ids and as
    # Parquet; each twin holds other vectors, or the same ids in another order.
    ids = [f"r{i}" for i in range(60)] + [f"q{i}" for i in range(60)]
    for suffix in ("a", "b"):
        vectors = rng.normal(size=(len(ids), 8)).astype(np.float32)
        np.save(root / f"own_{suffix}.npy", vectors)
        (root / f"own_ids_{suffix}.txt").write_text("\n".join(ids if suffix == "a" else ids[::-1]) + "\n")
        pd.DataFrame({"id": ids, "id2": ids[::-1], "vector": list(vectors), "vector2": list(vectors[::-1] * 2.0)}) \
            .to_parquet(root / f"own_{suffix}.parquet")
    return {"root": root, "model": tiny_model_dir, "other_model": other_model}


def _dataset_bases(r) -> dict[str, dict]:
    """One entry per dataset source, every setting given a value under which it matters (a seed with a sample)."""
    root = r["root"]
    public = {"split": "all", "data_dir": str(root / "mirror_a"), "per_class": 15, "balance_length": False,
              "sample": 30, "seed": 0}
    return {
        "synthetic": {"source": "synthetic", "name": "town", "n_texts": 40, "n_topics": 3, "topic_share": 0.4,
                      "topic_overlap": 0.1, "min_words": 3, "max_words": 20, "length_topic_tie": 0.2, "seed": 0},
        "file": {"source": "file", "path": str(root / "file_a.csv"), "name": "mine", "text_column": "text",
                 "label_column": "label", "id_column": "id", "sample": 40, "seed": 0},
        "twenty_newsgroups": {"source": "twenty_newsgroups", "name": "news", "remove": ["footers"], **public},
        "ag_news": {"source": "ag_news", "name": "agn", **public},
    }


def _model_bases(r) -> dict[str, dict]:
    root = r["root"]
    return {
        "sentence_transformer": {"name": str(r["model"]), "family": "sentence_transformer", "max_length": 32},
        "transformer": {"name": str(r["model"]), "family": "transformer", "max_length": 32, "long_texts": "chunk_mean"},
        "static": {"name": "tiny_vectors", "family": "static", "vectors": str(root / "vectors_a.npy"),
                   "vocabulary": str(root / "vocabulary_a.txt"), "sif_a": 0.001, "remove_first_component": True},
        "lexical": {"name": "tfidf", "family": "lexical", "dimensions": 5},
        # Two entries: .npy rows named by an ids file, and Parquet id + vector columns (each file kind has its keys).
        "precomputed": [
            {"name": "own", "family": "precomputed", "vectors": str(root / "own_a.npy"), "ids": str(root / "own_ids_a.txt")},
            {"name": "own", "family": "precomputed", "vectors": str(root / "own_a.parquet"), "id_column": "id",
             "vector_column": "vector"},
        ],
    }


# Model families whose vectors are tied to one dataset's ids: their bases use that dataset source.
FAMILY_DATASET = {"precomputed": "file"}


# The few fields whose changed value is a real resource or a registered name: candidates by (class, field).
def _changes(r) -> dict[tuple[str, str], list]:
    root = r["root"]
    return {
        ("FileSource", "path"): [str(root / "file_b.csv")],
        ("FileSource", "text_column"): ["text2"],
        ("FileSource", "label_column"): ["label2", None],
        ("FileSource", "id_column"): ["id2"],
        ("PublicSource", "data_dir"): [str(root / "mirror_b")],
        # Another model's folder: it differs from the default (the sweep's first model, or word counts) in every base.
        # Planted together with COMPANIONS' balance_length: true, and compared with the base under that setting.
        ("PublicSource", "length_tokenizer"): [str(r["other_model"])],
        ("TwentyNewsgroupsSource", "remove"): [["headers", "footers"], ["footers", "quotes"]],
        ("ModelSettings", "name"): [str(r["other_model"])],
        # The first twin serves static vectors; the others the user's own vectors (.npy with ids, then Parquet).
        ("ModelSettings", "vectors"): [str(root / "vectors_b.npy"), str(root / "own_b.npy"), str(root / "own_b.parquet")],
        ("ModelSettings", "ids"): [str(root / "own_ids_b.txt")],
        ("ModelSettings", "id_column"): ["id2"],
        ("ModelSettings", "device"): ["cpu"],  # auto resolves to cpu here: the request itself is a param
        ("AgglomerativeSettings", "k"): [4],  # None is filled in as "labels", the base's own value
        ("ModelSettings", "vector_column"): ["vector2"],
        ("ModelSettings", "length_tokenizer"): [str(r["model"])],
        ("ModelSettings", "vocabulary"): [str(root / "vocabulary_b.txt")],
        ("GridSettings", "pooling"): [[p] for p in sorted(POOLINGS) if p != "mean"],
        ("GridSettings", "layers"): [[name] for name in sorted(LAYER_SELECTIONS) if name != "last"] + [[1]],
        ("GridSettings", "normalize"): [[name] for name in sorted(NORMALIZATIONS) if name != "none"],
        ("GridSettings", "transform"): [[[{"method": "center"}]], [[]]],
        ("GridSettings", "seeds"): [[1]],
    }


# Fields that apply only under another setting: (class, field) -> the sibling settings planted with it, in the
# reference as well as in the change, so that only the field itself differs. (The bases leave balance_length off:
# balancing 60 texts by length leaves too few for the sample setting to matter.)
COMPANIONS = {("PublicSource", "length_tokenizer"): {"balance_length": True}}


def _base_sweeps(r) -> list[dict]:
    """Bases covering every dataset source, model family, reducer and clusterer; one trial each. The transform
    chain holds every step."""
    datasets, models = _dataset_bases(r), _model_bases(r)
    grid_fields = Sweep.model_fields["grid"].annotation.model_fields
    reducers = [c.__name__ for c in _union_members(grid_fields["reduce"].annotation)]
    clusterers = [c.__name__ for c in _union_members(grid_fields["cluster"].annotation)]
    sources = [typing.get_args(c.model_fields["source"].annotation)[0]
               for c in _union_members(Sweep.model_fields["datasets"].annotation)]
    missing = [s for s in sources if s not in datasets] + [f for f in MODEL_FAMILIES if f not in models]
    assert not missing, f"add a base entry (and its resources) for {missing}"
    steps = [c for c in _union_members(grid_fields["transform"].annotation)]
    chain = [{"method": typing.get_args(c.model_fields["method"].annotation)[0]} for c in steps]
    small = {"UmapSettings": {"n_components": 3, "n_neighbors": 5}, "PcaSettings": {"n_components": 4},
             "HdbscanSettings": {"min_cluster_size": 5},
             # average linkage, so that metric can change alone (ward takes euclidean only)
             "AgglomerativeSettings": {"linkage": "average"}, "WhitenStep": {"k": 6}, "AllButTheTopStep": {"d": 2}}
    members = {c.__name__: c for c in _union_members(grid_fields["reduce"].annotation)
               + _union_members(grid_fields["cluster"].annotation) + steps}

    def instance(name: str) -> dict:
        cls = members[name]
        return {"method": typing.get_args(cls.model_fields["method"].annotation)[0], **small.get(name, {})}

    model_entries = [(family, entry) for family in MODEL_FAMILIES
                     for entry in (models[family] if isinstance(models[family], list) else [models[family]])]
    count = max(len(sources), len(model_entries), len(reducers), len(clusterers))
    bases = []
    for i in range(count):
        family, model = model_entries[i % len(model_entries)]
        bases.append({
            "name": "hermetic",
            "datasets": [dict(datasets[FAMILY_DATASET.get(family, sources[i % len(sources)])])],
            "models": [dict(model)],
            "grid": {"pooling": ["mean"], "layers": ["last"], "normalize": ["none"],
                     "transform": [[{**step, **small.get(cls.__name__, {})} for step, cls in zip(chain, steps)]],
                     "reduce": [instance(reducers[i % len(reducers)])], "cluster": [instance(clusterers[i % len(clusterers)])],
                     "seeds": [0]},
            "evidence": {"permutations": 99, "max_points": 500, "top_terms": 5},
            "storage_dtype": "float32",
        })
    return bases


def _settings_at(data: dict, sweep: Sweep) -> list[tuple[list, BaseModel]]:
    """(path into the sweep's data, settings instance) for every settings object in a parsed sweep."""
    found = []

    def visit(value, path):
        if isinstance(value, BaseModel):
            found.append((path, value))
            for name in type(value).model_fields:
                visit(getattr(value, name), path + [name])
        elif isinstance(value, (list, tuple)):
            for index, item in enumerate(value):
                visit(item, path + [index])

    visit(sweep, [])
    return found


def _node(data, path):
    for step in path:
        data = data[step]
    return data


def _planned(data: dict, folder: Path):
    """(trial key, config key) of the sweep's single trial, or None when the sweep does not parse, load or plan one."""
    path = folder / f"s{len(list(folder.iterdir()))}.yaml"
    path.write_text(yaml.safe_dump(data))
    try:
        trials = prepared_sweep(path).trials
    except (HarnessError, ValidationError):
        return None
    return (trials[0].key, trials[0].config_key) if len(trials) == 1 else None


def _field_owner(cls: type, name: str) -> str:
    """The class that declares a field (PublicSource for the fields its sources share)."""
    for base in cls.__mro__:
        if name in getattr(base, "__annotations__", {}):
            return base.__name__
    return cls.__name__


def test_every_settings_field_changes_the_trial_key_unless_declared_result_neutral(tmp_path, resources):
    unknown = sorted(set(RESULT_NEUTRAL) - set(ALL_FIELDS))
    assert not unknown, f"RESULT_NEUTRAL names fields that do not exist: {unknown}"
    changes = _changes(resources)
    outcomes: dict[str, list[tuple[str, bool, bool]]] = {}  # field -> (family, trial key changed, config key changed)
    for base in _base_sweeps(resources):
        base_sweep = Sweep.model_validate(base, context={"base_dir": tmp_path})
        reference = _planned(base, tmp_path)
        assert reference is not None, f"the base sweep does not plan one trial: {base}"
        family = base["models"][0]["family"]
        for path, settings in _settings_at(base, base_sweep):
            cls = type(settings)
            for name, field in cls.model_fields.items():
                qualified = f"{cls.__name__}.{name}"
                if qualified in RESULT_NEUTRAL or name == _discriminator(cls):
                    continue
                current = getattr(settings, name)
                if isinstance(current, list) and current and isinstance(current[0], (BaseModel, list)) \
                        and (cls.__name__, name) not in changes:
                    continue  # a list of settings (datasets, models, reduce, cluster): its items are walked
                candidates = changes.get((cls.__name__, name)) or changes.get((_field_owner(cls, name), name)) \
                    or _generic_changes(field.annotation, current)
                companions = COMPANIONS.get((cls.__name__, name)) or COMPANIONS.get((_field_owner(cls, name), name)) or {}
                compared = reference
                if companions:
                    data = yaml.safe_load(yaml.safe_dump(base))
                    _node(data, path).update(companions)
                    compared = _planned(data, tmp_path)
                    assert compared is not None, f"{qualified}: the base with {companions} does not plan one trial"
                for candidate in candidates:
                    data = yaml.safe_load(yaml.safe_dump(base))  # a deep copy
                    node = _node(data, path)
                    node.update(companions)
                    node[name] = candidate.as_params() if isinstance(candidate, BaseModel) else candidate
                    planned = _planned(data, tmp_path)
                    if planned is None:
                        continue
                    outcomes.setdefault(qualified, []).append(
                        (family, planned[0] != compared[0], planned[1] != compared[1]))
                    break
    # Swapping one settings class of a list for another (a reducer, clusterer, source) changes the key too.
    for base in _base_sweeps(resources):
        reference = _planned(base, tmp_path)
        for other in _base_sweeps(resources):
            for path in (["grid", "reduce"], ["grid", "cluster"], ["datasets"]):
                if _node(other, path) != _node(base, path):
                    data = yaml.safe_load(yaml.safe_dump(base))
                    _node(data, path[:-1])[path[-1]] = _node(other, path)
                    planned = _planned(data, tmp_path)
                    if planned is not None:
                        assert planned[0] != reference[0], f"swapping {path} left the trial key unchanged"

    problems = []
    for qualified in ALL_FIELDS:
        cls_name, name = qualified.split(".")
        if qualified in RESULT_NEUTRAL or name == _discriminator(SETTINGS_CLASSES[cls_name]):
            continue
        seen = outcomes.get(qualified)
        if not seen and _union_members(SETTINGS_CLASSES[cls_name].model_fields[name].annotation):
            continue  # settings inside settings (datasets, models, grid, reduce, ...): their own fields are walked
        if not seen:
            problems.append(f"{qualified}: no changed value could be planted; add one to _changes()")
            continue
        for family, trial_changed, config_changed in seen:
            if (family, qualified) in INAPPLICABLE:
                continue
            if not trial_changed:
                problems.append(f"{qualified} ({family}): changing it leaves the trial key unchanged; put it in the key "
                                "or, if it cannot change any result, in harness.engine.plan.RESULT_NEUTRAL with the reason")
            elif not config_changed and qualified != "GridSettings.seeds":
                problems.append(f"{qualified} ({family}): changes the trial key but not the configuration key")
    assert not problems, "\n".join(problems)


def test_the_settings_that_change_results_are_mlflow_params(tmp_path, resources):
    # What MLflow shows: static sif_a / remove_first_component, lexical dimensions, storage dtype and the evidence
    # settings that change a seed's figures are params of the trial's run (n/a where they do not apply).
    from harness.engine.plan import aligned_params

    bases = _base_sweeps(resources)
    trials = []
    for base in bases:
        path = tmp_path / f"{len(trials)}.yaml"
        path.write_text(yaml.safe_dump(base))
        trials += prepared_sweep(path).trials
    params = aligned_params(trials)
    by_family = {t.model.family: params[t.key] for t in trials}
    assert by_family["static"]["sif_a"] == 0.001 and by_family["static"]["remove_first_component"] is True
    assert by_family["lexical"]["dimensions"] == 5 and by_family["sentence_transformer"]["dimensions"] == "n/a"
    assert by_family["transformer"]["long_texts"] == "chunk_mean"
    for row in by_family.values():
        assert row["storage_dtype"] == "float32" and row["evidence.permutations"] == 99
        assert row["evidence.max_points"] == 500 and row["evidence.top_terms"] == 5
        assert "batch_size" not in row and "evidence.resamples" not in row  # result-neutral: not in the key


def test_the_encode_key_covers_model_files_remote_code_and_the_onnx_export(tmp_path, tiny_model_dir, monkeypatch):
    # Same weights, other tokenizer or config files: another encode key (max_seq_length lives in
    # sentence_bert_config.json); so do trust_remote_code and, for an exported model, the opset and the versions of
    # onnx / onnxruntime.
    import json

    import harness.embed.onnx_backend

    folder = tmp_path / "model"
    shutil.copytree(tiny_model_dir, folder)

    def encode_key(extra: str = "") -> str:
        sweep = write_sweep(tmp_path, f"""
name: files
datasets:
  - {{source: synthetic, n_texts: 30}}
models:
  - {{name: {folder}{extra}}}
grid:
  pooling: [mean]
  cluster:
    - {{method: kmeans, k: labels}}
""")
        return prepared_sweep(sweep).trials[0].stages["encode"].key

    keys = [encode_key()]
    config = json.loads((folder / "tokenizer_config.json").read_text())
    config["model_max_length"] = 24
    (folder / "tokenizer_config.json").write_text(json.dumps(config))
    keys.append(encode_key())
    (folder / "sentence_bert_config.json").write_text(json.dumps({"max_seq_length": 16}))
    keys.append(encode_key())
    keys.append(encode_key(", trust_remote_code: true"))
    keys.append(encode_key(", backend: onnx"))
    monkeypatch.setattr(harness.embed.onnx_backend, "OPSET", harness.embed.onnx_backend.OPSET + 1)
    keys.append(encode_key(", backend: onnx"))
    assert len(set(keys)) == len(keys), keys
    monkeypatch.setattr(harness.embed.onnx_backend, "OPSET", harness.embed.onnx_backend.OPSET - 1)
    assert encode_key(", backend: onnx") == keys[-2]  # and the same inputs give the same key


def test_the_scores_version_enters_every_trial_and_configuration_key(tmp_path, monkeypatch):
    # A formula change bumps harness.engine.plan.SCORES_VERSION; the same sweep then plans no trial key or configuration
    # key it planned before, so resuming reuses no metric logged under the old formulas.
    import harness.engine.plan

    sweep = write_sweep(tmp_path, """name: versioned
datasets: [{source: synthetic, n_texts: 80, seed: 1}]
models: [{name: tfidf, family: lexical, dimensions: 5}]
grid:
  pooling: [mean]
  reduce: [{method: pca, n_components: 3}]
  cluster: [{method: kmeans, k: labels}]
  seeds: [0, 1]
""")
    before = prepared_sweep(sweep).trials
    monkeypatch.setattr(harness.engine.plan, "SCORES_VERSION", harness.engine.plan.SCORES_VERSION + 1)
    after = prepared_sweep(sweep).trials
    assert len(before) == len(after) == 2
    assert not {t.key for t in before} & {t.key for t in after}
    assert not {t.config_key for t in before} & {t.config_key for t in after}


def test_the_cited_winner_sweep_plans_the_winner_for_every_model_family(tmp_path, resources):
    # For every base sweep (together they hold every family of MODEL_FAMILIES, both precomputed file kinds), the
    # settings a configuration run logs (configuration.json, from which `harness cite` writes its one-configuration
    # sweep) must parse and plan exactly that trial: the same trial key and configuration key.
    from harness.engine.runner import configuration_settings

    covered = set()
    for i, data in enumerate(_base_sweeps(resources)):
        path = tmp_path / f"base{i}.yaml"
        path.write_text(yaml.safe_dump(data))
        prepared = prepared_sweep(path)
        (trial,) = prepared.trials
        settings = configuration_settings(prepared, [trial])
        cited_sweep = {"name": "hermetic-winner", **settings, "rank_by": settings["rank_by"] or "ari"}
        cited = tmp_path / f"winner{i}.yaml"
        cited.write_text(yaml.safe_dump(cited_sweep, sort_keys=False))
        try:
            (planned,) = prepared_sweep(cited).trials
        except (HarnessError, ValidationError) as err:
            pytest.fail(f"family {trial.model.family}: the cited winner sweep does not parse or plan: {err}")
        assert (planned.key, planned.config_key) == (trial.key, trial.config_key), trial.model.family
        covered.add(trial.model.family)
    assert covered == set(MODEL_FAMILIES)


def test_the_neighbour_graph_method_enters_the_trial_key(tmp_path, monkeypatch):
    # No param names the neighbour graph's method (exact up to harness.geometry.reduce.EXACT_NEIGHBOURS_UP_TO texts,
    # NN-descent above), yet the UMAP layout depends on it: a resumed sweep must not reuse a seed run fitted on the
    # other graph. Every trial of a UMAP sweep gets a new trial and configuration key when the method changes;
    # a PCA trial (no graph) keeps its keys.
    import harness.geometry.reduce

    sweep = write_sweep(tmp_path, """name: graphs
datasets: [{source: synthetic, n_texts: 120, seed: 1}]
models: [{name: tfidf, family: lexical, dimensions: 8}]
grid:
  pooling: [mean]
  reduce: [{method: umap, n_components: 2, n_neighbors: 5}, {method: pca, n_components: 3}]
  cluster: [{method: kmeans, k: labels}]
  seeds: [0, 1]
""")
    before = prepared_sweep(sweep).trials
    assert {t.stages["graph"].settings["method"] for t in before if "graph" in t.stages} == {"exact"}
    monkeypatch.setattr(harness.geometry.reduce, "EXACT_NEIGHBOURS_UP_TO", 100)
    after = prepared_sweep(sweep).trials
    assert {t.stages["graph"].settings["method"] for t in after if "graph" in t.stages} == {"nndescent"}
    for old, new in zip(before, after, strict=True):
        changed = (old.key != new.key, old.config_key != new.config_key)
        assert changed == ((True, True) if old.reducer.method == "umap" else (False, False)), old.name


def test_batch_size_enters_the_key_only_where_the_batch_changes_the_vectors(tmp_path, tiny_model_dir):
    # batch_size is result-neutral (plan.RESULT_NEUTRAL) except under backends that quantise per batch; there it
    # must change the trial key (tests/test_halving.py shows which backends depend on their batch-mates).
    import typing

    from harness.engine.plan import ROW_INDEPENDENT_BACKENDS
    from harness.sweep import ModelSettings

    for backend in typing.get_args(ModelSettings.model_fields["backend"].annotation):
        keys = []
        for batch_size in (8, 16):
            sweep = write_sweep(tmp_path, f"""name: batches
datasets: [{{source: synthetic, n_texts: 60, seed: 1}}]
models: [{{name: {tiny_model_dir}, backend: {backend}, batch_size: {batch_size}}}]
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 3}}]
  cluster: [{{method: kmeans, k: labels}}]
  seeds: [0]
""", f"{backend}-{batch_size}.yaml")
            (trial,) = prepared_sweep(sweep).trials
            keys.append(trial.key)
        assert (keys[0] == keys[1]) == (backend in ROW_INDEPENDENT_BACKENDS), backend
