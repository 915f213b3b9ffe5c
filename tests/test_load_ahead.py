"""Loading the first model ahead of the trial loop (while the MLflow writer starts) changes nothing but when."""

from __future__ import annotations

import shutil
from dataclasses import replace

import numpy as np
import pytest

from harness.engine import stages as stages_module
from harness.engine.cache import StageCache
from harness.engine.runner import loaded_corpora, prepared_sweep, run_sweep_file
from harness.engine.stages import StageExecutor

from conftest import finished_runs, write_sweep

SWEEP = """
name: ahead
datasets:
  - {{source: synthetic, n_texts: 120, topic_share: 0.4, seed: 3}}
models:
  - name: {model}
grid:
  pooling: [mean, cls]
  layers: [last, second_last]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
"""
CHAIN = ("encode", "pool", "transform", "reduce", "cluster")


def _loader(failing, real):
    """loaded_encoder that fails on the calls ``failing(n)`` says (n counts from 1)."""
    calls = []

    def load(*args, **kwargs):
        calls.append(1)
        if failing(len(calls)):
            raise OSError("injected load failure")
        return real(*args, **kwargs)

    return load, calls


def _outcome(tmp_path, name, model, monkeypatch, failing, ahead):
    """Every trial's status, error and traceback tags, the sweep's status, the load attempts, the loads and the
    forward passes."""
    load, calls = _loader(failing, stages_module.loaded_encoder)
    with monkeypatch.context() as patch:
        patch.setattr(stages_module, "loaded_encoder", load)
        if not ahead:
            patch.setattr(StageExecutor, "load_ahead", lambda self, trials: None)
        results = tmp_path / name
        result = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=model), f"{name}.yaml"), results)
    _, parents, children = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "ahead")
    trials = sorted((c.data.tags["harness.trial_key"], c.info.status, c.data.tags.get("harness.error", ""),
                     c.data.tags.get("harness.traceback", "")) for c in children)
    return {"trials": trials, "sweep": parents[0].info.status, "attempts": len(calls),
            "loads": result.work.get("model_loads", 0), "passes": result.work.get("forward_passes", 0)}


TRIAL_LOADS = {"all work": lambda n: False, "the first fails": lambda n: n == 1, "all fail": lambda n: True}


@pytest.mark.parametrize("ahead_load, trial_loads", [("works", "all work"), ("fails", "all work"),
                                                     ("fails", "the first fails"), ("fails", "all fail")])
def test_a_sweep_ends_as_if_only_its_trials_loads_had_happened(tmp_path, tiny_model_dir, monkeypatch, ahead_load,
                                                               trial_loads):
    """The rule: a load ahead that works is the first trial's own load, done earlier; one that fails is forgotten,
    and the trials' own loads decide. So for each outcome of the load ahead and of the trials' loads after it,
    every trial's status, error and traceback, the sweep's status, loads and forward passes are those of the same
    sweep without loading ahead whose loads go as the trials' loads go (a failed load ahead is one attempt more)."""
    trial_failing = TRIAL_LOADS[trial_loads]
    if ahead_load == "works":
        ahead = _outcome(tmp_path, "ahead", tiny_model_dir, monkeypatch, trial_failing, ahead=True)
        behind = _outcome(tmp_path, "behind", tiny_model_dir, monkeypatch, trial_failing, ahead=False)
        extra = 0
    else:
        ahead = _outcome(tmp_path, "ahead", tiny_model_dir, monkeypatch, lambda n: n == 1 or trial_failing(n - 1),
                         ahead=True)
        behind = _outcome(tmp_path, "behind", tiny_model_dir, monkeypatch, trial_failing, ahead=False)
        extra = 1
    assert ahead["attempts"] == behind["attempts"] + extra
    del ahead["attempts"], behind["attempts"]
    assert ahead == behind
    statuses = [t[1] for t in ahead["trials"]]
    assert len(statuses) == 4
    assert statuses.count("FAILED") == {"all work": 0, "the first fails": 1, "all fail": 4}[trial_loads]
    assert all("injected load failure" in t[3] for t in ahead["trials"] if t[1] == "FAILED")


def _executor(tmp_path, model, cache):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=model)))
    return StageExecutor(loaded_corpora(prepared), prepared.trials, cache), prepared.trials


def test_the_load_ahead_is_the_first_trials_first_load(tmp_path, tiny_model_dir, monkeypatch):
    """With none of the first trial's stages held, its clusters and token counts need exactly the model loaded
    ahead: no other load, one forward pass."""
    load, calls = _loader(lambda n: False, stages_module.loaded_encoder)
    monkeypatch.setattr(stages_module, "loaded_encoder", load)
    executor, trials = _executor(tmp_path, tiny_model_dir, StageCache(tmp_path / "cache"))
    executor.load_ahead(trials)
    assert len(calls) == 1 and executor.work["model_loads"] == 1
    executor.clustered(trials[0])
    executor.token_counts(trials[0])
    assert len(calls) == 1 and executor.work["model_loads"] == 1 and executor.work["forward_passes"] == 1


@pytest.mark.parametrize("kind", CHAIN)
def test_nothing_is_loaded_ahead_when_any_stage_of_the_first_trial_is_held(tmp_path, tiny_model_dir, kind):
    """Any one of the first trial's encode, pool, transform, reduce and cluster stages held, alone, in memory or
    in the cache: its clusters may then be computed without a forward pass first, so the load is not certain to
    come first, and nothing is loaded (or read)."""
    full = StageCache(tmp_path / "full")
    filler, trials = _executor(tmp_path, tiny_model_dir, full)
    filler.clustered(trials[0])
    filler.token_counts(trials[0])
    stage = trials[0].stages[kind]
    # In the cache alone: a cache holding that one entry.
    only = tmp_path / f"only-{kind}"
    entry = next((tmp_path / "full" / kind).glob(f"*/{stage.key}"))
    shutil.copytree(entry, only / kind / entry.parent.name / entry.name)
    cached, trials = _executor(tmp_path, tiny_model_dir, StageCache(only))
    cached.load_ahead(trials)
    assert cached.work.get("model_loads", 0) == 0 and not cached._outputs
    # In memory alone.
    held, trials = _executor(tmp_path, tiny_model_dir, None)
    held._outputs[stage.key] = np.zeros(1)
    held.load_ahead(trials)
    assert held.work.get("model_loads", 0) == 0
    # And the control: none held, loaded.
    bare, trials = _executor(tmp_path, tiny_model_dir, StageCache(tmp_path / f"empty-{kind}"))
    bare.load_ahead(trials)
    assert bare.work["model_loads"] == 1


def test_only_a_pytorch_transformer_without_remote_code_is_loaded_ahead(tmp_path, tiny_model_dir):
    """Families without a transformer have nothing to load; an ONNX backend's load exports into the cache, and
    remote code would run, before the sweep knows its store works; no trials, nothing to load."""
    executor, trials = _executor(tmp_path, tiny_model_dir, None)
    for change in ({"family": "static"}, {"family": "lexical"}, {"family": "precomputed"},
                   {"backend": "onnx"}, {"backend": "onnx_int8"}, {"trust_remote_code": True}):
        model = trials[0].model.model_copy(update=change)
        executor.load_ahead([replace(trials[0], model=model)])
        assert executor.work.get("model_loads", 0) == 0, change
    executor.load_ahead([])
    assert executor.work.get("model_loads", 0) == 0
    executor.load_ahead(trials)
    assert executor.work["model_loads"] == 1  # the control
