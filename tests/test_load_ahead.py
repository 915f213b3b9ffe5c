"""Loading the first model ahead of the trial loop (while the MLflow writer starts) changes nothing but when."""

from __future__ import annotations

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


def _loader(pattern: str, real):
    """loaded_encoder that fails on every call, on the first call only, or never."""
    calls = []

    def load(*args, **kwargs):
        calls.append(1)
        if pattern == "always" or (pattern == "first call" and len(calls) == 1):
            raise OSError(f"injected load failure {len(calls)}")
        return real(*args, **kwargs)

    return load, calls


def _outcome(tmp_path, name, model, monkeypatch, pattern, ahead):
    """Each trial's status and error tag, the sweep's status, and the model loads and forward passes."""
    load, calls = _loader(pattern, stages_module.loaded_encoder)
    with monkeypatch.context() as patch:
        patch.setattr(stages_module, "loaded_encoder", load)
        if not ahead:
            patch.setattr(StageExecutor, "load_ahead", lambda self, trials: None)
        results = tmp_path / name
        result = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=model), f"{name}.yaml"), results)
    _, parents, children = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "ahead")
    trials = sorted((c.data.tags["harness.trial_key"], c.info.status, c.data.tags.get("harness.error", ""))
                    for c in children)
    return trials, parents[0].info.status, len(calls), result.work.get("model_loads", 0), result.work.get("forward_passes", 0)


@pytest.mark.parametrize("pattern", ["never", "first call", "always"])
def test_a_sweep_ends_the_same_with_and_without_loading_ahead(tmp_path, tiny_model_dir, monkeypatch, pattern):
    """For each way a model load can go (it works, it fails once, it always fails): every trial's status and error,
    the sweep's status, the number of load attempts, loads and forward passes are those of the same sweep without
    loading ahead."""
    ahead = _outcome(tmp_path, "ahead", tiny_model_dir, monkeypatch, pattern, ahead=True)
    behind = _outcome(tmp_path, "behind", tiny_model_dir, monkeypatch, pattern, ahead=False)
    assert ahead == behind
    trials, sweep_status, attempts, loads, passes = ahead
    assert len(trials) == 4
    if pattern == "never":
        assert {t[1] for t in trials} == {"FINISHED"} and attempts == loads == passes == 1
    elif pattern == "first call":  # the first trial fails with the first attempt's error, the next ones load
        assert [t[2] for t in trials].count("OSError: injected load failure 1") == 1 and sweep_status == "FAILED"
        assert attempts == 2 and loads == passes == 1
    else:
        assert {t[1] for t in trials} == {"FAILED"} and loads == passes == 0
        assert all(t[2].startswith("OSError: injected load failure") for t in trials)


def _executor(tmp_path, model, cache):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=model)))
    return StageExecutor(loaded_corpora(prepared), prepared.trials, cache), prepared.trials


def test_the_model_is_loaded_ahead_only_when_a_forward_pass_is_to_come(tmp_path, tiny_model_dir):
    cache = StageCache(tmp_path / "cache")
    executor, trials = _executor(tmp_path, tiny_model_dir, cache)
    executor.load_ahead(trials)
    assert executor.work["model_loads"] == 1
    executor.pooled(trials[0])  # the forward pass uses the model loaded ahead
    assert executor.work["model_loads"] == 1 and executor.work["forward_passes"] == 1

    # Every variant of the first trial's encode in the cache: nothing loaded, nothing read.
    cached, trials = _executor(tmp_path, tiny_model_dir, cache)
    cached.load_ahead(trials)
    assert cached.work.get("model_loads", 0) == 0 and not cached._outputs

    # One variant missing: loaded (its forward pass will run).
    missing = next(p for p in (tmp_path / "cache" / "pool").glob("*/*"))
    for file in missing.iterdir():
        file.unlink()
    partial, trials = _executor(tmp_path, tiny_model_dir, cache)
    partial.load_ahead(trials)
    assert partial.work["model_loads"] == 1

    # No cache at all: loaded; no trials: nothing.
    uncached, trials = _executor(tmp_path, tiny_model_dir, None)
    uncached.load_ahead(trials)
    assert uncached.work["model_loads"] == 1
    empty, _ = _executor(tmp_path, tiny_model_dir, None)
    empty.load_ahead([])
    assert empty.work.get("model_loads", 0) == 0


def test_a_model_without_a_transformer_or_on_onnx_is_not_loaded_ahead(tmp_path, tiny_model_dir):
    """Families without a transformer have nothing to load; an ONNX backend's load exports into the cache, which a
    sweep must not write before its store is known to work."""
    from dataclasses import replace

    executor, trials = _executor(tmp_path, tiny_model_dir, None)
    for change in ({"family": "static"}, {"family": "lexical"}, {"family": "precomputed"},
                   {"backend": "onnx"}, {"backend": "onnx_int8"}):
        model = trials[0].model.model_copy(update=change)
        executor.load_ahead([replace(trials[0], model=model)])
        assert executor.work.get("model_loads", 0) == 0, change
