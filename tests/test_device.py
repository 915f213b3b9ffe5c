"""The device option of transformer models: resolved at the door, a run tag, part of the encode key.

These run on the CPU; the ones that need a machine without a GPU say so and skip where torch sees one.
"""

from __future__ import annotations

import subprocess
import sys
from dataclasses import replace
from importlib import metadata

import pytest

from harness.cli import main
from harness.embed.devices import CPU, Device, resolved_device
from harness.engine.plan import trial_stages
from harness.engine.runner import prepared_sweep
from harness.errors import SweepError
from harness.sweep import load_sweep

from conftest import MINILM, REPO, finished_runs, write_sweep


def _cuda_visible() -> bool:
    import torch

    return torch.cuda.is_available()


without_gpu = pytest.mark.skipif(_cuda_visible(), reason="this check is for machines where torch sees no GPU")

SWEEP = """
name: devices
datasets:
  - {{source: synthetic, n_texts: 120, topic_share: 0.5, seed: 1}}
models:
  - {{name: {model}{extra}}}
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 4}}]
  cluster: [{{method: kmeans, k: labels}}]
"""


@without_gpu
def test_auto_and_cpu_resolve_to_the_cpu_here():
    assert resolved_device("auto") == CPU == resolved_device("cpu")
    assert CPU.key == "cpu" and CPU.label == "cpu"


@pytest.mark.skipif(not metadata.version("torch").endswith("+cpu"), reason="needs a CPU-only build of torch")
def test_auto_on_a_cpu_only_torch_is_decided_without_importing_torch():
    # Plans and sweep errors must answer fast: importing torch costs over a second.
    code = ("import sys; from harness.embed.devices import resolved_device; d = resolved_device('auto'); "
            "print(d.name, 'torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={"PYTHONPATH": str(REPO), "PATH": ""}).stdout.split()
    assert out == ["cpu", "False"]


@without_gpu
@pytest.mark.parametrize("asked", ["cuda", "cuda:0", "cuda:3"])
def test_cuda_without_a_gpu_stops_at_the_door_with_one_line(tmp_path, capsys, asked):
    sweep = write_sweep(tmp_path, SWEEP.format(model=MINILM, extra=f", device: '{asked}'"))
    assert main(["plan", str(sweep)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert f"sweep.yaml:6: models[0].device: device '{asked}' was asked for, but torch" in err
    assert "sees no CUDA GPU on this machine; use device: auto (CUDA when there is one, else the CPU) or cpu" in err


@pytest.mark.parametrize("entry, message", [
    (", device: gpu", "models[0].device: 'gpu' is not a device; expected auto, cpu, cuda or cuda:N"),
    (", device: 'cuda:x'", "models[0].device: 'cuda:x' is not a device; expected auto, cpu, cuda or cuda:N"),
    (", device: cuda, backend: onnx", "models[0]: device 'cuda' needs backend torch; the onnx backend runs on the CPU"),
    (", family: lexical, device: cpu", "models[0]: 'device' applies to family sentence_transformer or transformer, "
                                       "not lexical"),
])
def test_impossible_device_settings_are_refused_with_the_key(tmp_path, entry, message):
    sweep = write_sweep(tmp_path, SWEEP.format(model=MINILM, extra=entry))
    with pytest.raises(SweepError) as err:
        load_sweep(sweep)
    assert str(err.value) == f"{sweep}:6: {message}"


def test_the_encode_key_holds_the_hardware_that_ran_the_forward_pass(tmp_path):
    # The rule: vectors are shared between runs on the same kind of hardware (the device index does not matter),
    # never between a CPU and a GPU, nor between two GPU models. Checked over each pair of these devices.
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=MINILM, extra="")))
    trial = prepared.trials[0]
    devices = [CPU, Device("cuda:0", "NVIDIA H200"), Device("cuda:1", "NVIDIA H200"), Device("cuda:0", "NVIDIA A100")]
    keys = []
    for device in devices:
        resolved = replace(trial.resolved_model, device=device)
        keys.append(trial_stages(prepared.dataset_keys[trial.dataset], trial.model, resolved, trial.layers,
                                 trial.pooling, trial.steps, trial.reducer, trial.clusterer, trial.seed)["encode"].key)
    same_hardware = {(i, j) for i in range(4) for j in range(4) if devices[i].key == devices[j].key}
    assert {(i, j) for i in range(4) for j in range(4) if keys[i] == keys[j]} == same_hardware
    assert same_hardware == {(i, i) for i in range(4)} | {(1, 2), (2, 1)}


@without_gpu
def test_auto_and_cpu_share_vectors_here_but_are_distinct_trials(tmp_path):
    auto = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=MINILM, extra=""), "auto.yaml")).trials[0]
    cpu = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=MINILM, extra=", device: cpu"), "cpu.yaml")).trials[0]
    assert auto.stages["cluster"].key == cpu.stages["cluster"].key  # the same computation on this machine
    assert auto.key != cpu.key and auto.params["device"] == "auto" and cpu.params["device"] == "cpu"


@without_gpu
def test_a_run_records_the_device_as_a_tag_and_the_request_as_a_param(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, extra=""))
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 0
    _, _, trials = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "devices")
    assert [(t.data.tags["harness.device"], t.data.params["device"]) for t in trials] == [("cpu", "auto")]
