"""`harness schema`: the JSON Schema and the README's key reference are generated from the typed settings,
accept every shipped sweep, and refuse what the tool refuses (checked with the jsonschema package)."""

from __future__ import annotations

import json

import jsonschema
import pytest
import yaml

from harness.cli import main
from harness.embed import pooling as pooling_module
from harness.errors import SweepError
from harness.schema import (README_END, README_START, SCHEMA_FILE, key_reference, key_reference_markdown,
                            missing_descriptions, settings_models, sweep_schema)
from harness.sweep import sweep_from_text

from conftest import REPO

EXPERIMENTS = sorted((REPO / "experiments").glob("*.yaml"))
MODELINE = "# yaml-language-server: $schema=../schemas/sweep.schema.json"


@pytest.fixture(scope="module")
def validator():
    schema = sweep_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def test_harness_schema_prints_the_schema_file_the_sweeps_point_at(capsys):
    assert main(["schema"]) == 0
    printed = capsys.readouterr().out
    assert json.loads(printed) == sweep_schema()
    assert (REPO / SCHEMA_FILE).read_text() == printed, "schemas/sweep.schema.json is stale: run make docs"


@pytest.mark.parametrize("path", EXPERIMENTS, ids=[p.stem for p in EXPERIMENTS])
def test_every_shipped_sweep_validates_and_names_the_schema(validator, path):
    text = path.read_text()
    assert text.splitlines()[0] == MODELINE
    assert (path.parent / MODELINE.split("$schema=")[1]).resolve() == (REPO / SCHEMA_FILE).resolve()
    errors = [e.message for e in validator.iter_errors(yaml.safe_load(text))]
    assert errors == []


DEMO = (REPO / "experiments" / "demo.yaml").read_text()


@pytest.mark.parametrize("where", ["top", "dataset", "model", "grid", "reducer", "clusterer", "evidence"])
def test_an_unknown_key_is_refused_by_the_schema_as_by_the_tool(validator, where):
    data = yaml.safe_load(DEMO)
    target = {"top": data, "dataset": data["datasets"][0], "model": data["models"][0], "grid": data["grid"],
              "reducer": data["grid"]["reduce"][0], "clusterer": data["grid"]["cluster"][0],
              "evidence": data.setdefault("evidence", {})}[where]
    target["n_neighbours"] = 3  # a misspelt key
    assert list(validator.iter_errors(data)), where
    with pytest.raises(SweepError, match="unknown key"):
        sweep_from_text(yaml.safe_dump(data), "sweep.yaml", REPO)


def test_the_shorthands_the_tool_accepts_are_valid_under_the_schema(validator, tmp_path):
    text = """
name: shorthands
datasets:
  - {source: synthetic}
  - {source: ag_news, split: test, sample: 100}
models: [sentence-transformers/all-MiniLM-L6-v2, {name: tfidf, family: lexical, dimensions: 20}]
grid:
  pooling: [mean, max]
  layers: [last, -2]
  transform: [none, l2, [center, remove_length, l2], {method: whiten, k: 8}]
  reduce: [{method: none}]
  cluster: [{method: kmeans, k: labels}, {method: kmeans, k: 3}]
rank_by: ami
"""
    sweep_from_text(text, "shorthands.yaml", tmp_path)  # the tool accepts it
    assert [e.message for e in validator.iter_errors(yaml.safe_load(text))] == []


@pytest.mark.parametrize("change, expected", [
    ({"grid": {"pooling": ["maxx"], "cluster": [{"method": "kmeans"}]}}, "'maxx' is not one of"),
    ({"rank_by": "accuracy"}, "'accuracy' is not"),
    ({"datasets": [{"source": "wikipedia"}]}, "is not valid under any of the given schemas"),
])
def test_wrong_names_are_refused_by_the_schema(validator, change, expected):
    data = {**yaml.safe_load(DEMO), **change}
    messages = [e.message for e in validator.iter_errors(data)]
    assert any(expected in m for m in messages), messages


def test_the_schema_follows_the_registries(monkeypatch):
    # A pooling registered in code (DEVELOPERS.md's recipe) appears in the schema without editing it.
    monkeypatch.setitem(pooling_module.POOLINGS, "median", pooling_module.POOLINGS["mean"])
    pooling = sweep_schema()["$defs"]["GridSettings"]["properties"]["pooling"]
    assert "median" in pooling["items"]["enum"]


def test_every_key_of_every_settings_model_is_in_the_schema_with_its_default_and_meaning():
    assert missing_descriptions() == [], "add a line to harness/schema.py DESCRIPTIONS for each"
    schema = sweep_schema()
    definitions = {"Sweep": schema, **schema["$defs"]}
    for model in settings_models():
        properties = definitions[model.__name__]["properties"]
        assert set(properties) == set(model.model_fields), model.__name__
        for name, field in model.model_fields.items():
            assert properties[name]["description"], (model.__name__, name)
            if not field.is_required() and field.default_factory is None:
                assert properties[name]["default"] == json.loads(json.dumps(field.default, default=str)), (model.__name__, name)


def test_the_readme_key_reference_is_the_generated_one(capsys):
    readme = (REPO / "README.md").read_text()
    block = readme[readme.index(README_START):readme.index(README_END) + len(README_END)] + "\n"
    assert main(["schema", "--markdown"]) == 0
    assert capsys.readouterr().out == key_reference_markdown()
    missing = [row.key for row in key_reference() if f"| `{row.key}` |" not in block]
    assert missing == [], f"keys missing from the README's reference (run make docs): {missing}"
    assert block == key_reference_markdown(), "the README's key reference is stale: run make docs"
    for key in ("n_topics", "batch_size", "revision", "format", "max_chars", "n_init", "top_terms"):
        assert any(row.key.endswith(key) for row in key_reference()), key  # once undocumented, now generated
