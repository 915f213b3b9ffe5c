"""Help, plan and sweep errors answer without importing the heavy libraries (issue 17, item 5).

Each command runs in a fresh interpreter (a test process has them imported already); the check reads
sys.modules after the CLI's main returns, so it names the libraries that were imported, not a timing.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import write_sweep

# The libraries whose import costs seconds: the model, reduction, tracking and plotting stacks, and the
# scientific stack under scoring and table reading.
HEAVY = ("torch", "transformers", "sentence_transformers", "umap", "pynndescent", "numba", "mlflow", "matplotlib",
         "sklearn", "scipy", "pandas", "hdbscan")

PROBE = """
import contextlib, io, json, sys
from harness.cli import main
with contextlib.redirect_stdout(io.StringIO()) as out, contextlib.redirect_stderr(io.StringIO()) as err:
    try:
        code = main(sys.argv[1:])
    except SystemExit as exit_:
        code = exit_.code
print(json.dumps({"code": code, "out": out.getvalue() + err.getvalue(),
                  "heavy": sorted(m for m in %r if m in sys.modules)}))
""" % (HEAVY,)

ROOT = Path(__file__).resolve().parents[1]


def _imported(*argv: str) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    done = subprocess.run([sys.executable, "-c", PROBE, *argv], capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


SWEEP = """
name: light
datasets:
  - {{source: synthetic, n_texts: 60, seed: 1}}
models: [{model}]
grid:
  pooling: [mean]
  layers: [last]
  normalize: [l2]
  reduce: [{{method: umap, n_components: 2}}]
  cluster: [{{method: hdbscan, min_cluster_size: 5}}]
"""


def test_help_imports_none_of_them():
    found = _imported("--help")
    assert found["code"] == 0 and "plan" in found["out"]
    assert found["heavy"] == []


@pytest.mark.parametrize("model", ["tiny", "{name: tfidf-svd-8, family: lexical, dimensions: 8}"])
def test_plan_imports_none_of_them(tmp_path, tiny_model_dir, model):
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir if model == "tiny" else model))
    found = _imported("plan", str(sweep), "--results-dir", str(tmp_path / "results"))
    assert found["code"] == 0 and "forward passes" in found["out"], found["out"]
    assert found["heavy"] == []


@pytest.mark.parametrize("command", ["run", "plan"])
def test_a_sweep_error_imports_none_of_them(tmp_path, command):
    sweep = write_sweep(tmp_path, "name: broken\ndatasets: 3\n")
    found = _imported(command, str(sweep), "--results-dir", str(tmp_path / "results"))
    assert found["code"] != 0 and "datasets" in found["out"], found["out"]
    assert found["heavy"] == []
