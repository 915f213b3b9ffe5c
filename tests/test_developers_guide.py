"""DEVELOPERS.md stays true: its paths and commands exist, and its pooling recipe works."""

from __future__ import annotations

import re

import pytest

from harness.cli import main, parser
from harness.embed import pooling as pooling_module
from harness.engine.runner import run_sweep_file

from conftest import REPO, write_sweep

GUIDE = (REPO / "DEVELOPERS.md").read_text()
SPANS = re.findall(r"`([^`\n]+)`", GUIDE)
PATHS = sorted({s for s in SPANS if re.fullmatch(r"(harness|tests|benchmarks|experiments)/[\w./-]*", s)})
COMMANDS = sorted({s for s in SPANS if s.startswith("harness ") and "/" not in s.split()[1]})
MAKE_TARGETS = sorted({s.split()[1] for s in SPANS if re.fullmatch(r"make [\w-]+", s)})


def test_the_guide_names_paths_and_commands():
    assert len(PATHS) > 20 and COMMANDS and MAKE_TARGETS


@pytest.mark.parametrize("path", PATHS)
def test_every_path_in_the_guide_exists(path):
    assert (REPO / path).exists(), path


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_in_the_guide_exists(command, capsys):
    words = [w for w in command.split()[1:] if not w.isupper() and not w.startswith("-")]
    with pytest.raises(SystemExit) as done:
        parser().parse_args([*words, "--help"])
    assert done.value.code == 0, command


@pytest.mark.parametrize("target", MAKE_TARGETS)
def test_every_make_target_in_the_guide_exists(target):
    assert re.search(rf"^{re.escape(target)}:", (REPO / "Makefile").read_text(), re.MULTILINE), target


def test_registries_named_in_the_guide_exist():
    import harness.datasets
    import harness.datasets.public
    import harness.embed.layers
    import harness.embed.models
    import harness.engine.plan
    import harness.geometry.cluster
    import harness.geometry.reduce
    import harness.geometry.transforms

    modules = [harness.embed.pooling, harness.embed.layers, harness.geometry.transforms, harness.geometry.reduce, harness.geometry.cluster, harness.engine.plan,
               harness.embed.models, harness.datasets, harness.datasets.public]
    for name in ("POOLINGS", "MEAN_SCALED", "LAYER_SELECTIONS", "TRANSFORMS", "REDUCERS", "CLUSTERERS",
                 "SEEDED_REDUCERS", "SEEDED_CLUSTERERS", "SCALE_INVARIANT_REDUCERS", "STAGE_LIBRARIES",
                 "PACKAGED_MODELS", "LOADERS", "PUBLIC_ROUTES", "MIRROR_FILES"):
        assert name in GUIDE and any(hasattr(m, name) for m in modules), name


def median_pooled(hidden, mask):
    """Per-dimension median over real tokens: the recipe's example, registered only in this test."""
    padded = hidden.masked_fill(mask.unsqueeze(-1) == 0, float("nan"))
    return padded.nanmedian(dim=1).values


def test_a_pooling_added_by_the_recipe_is_planned_and_scored(tmp_path, tiny_model_dir, monkeypatch, capsys):
    monkeypatch.setitem(pooling_module.POOLINGS, "median", median_pooled)
    sweep = write_sweep(tmp_path, f"""
name: recipe
datasets:
  - {{source: synthetic, n_texts: 150, topic_share: 0.5}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean, median]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
""")
    assert main(["plan", str(sweep), "--results-dir", str(tmp_path / "results")]) == 0
    assert "/last/median/none/pca5/kmeanslabels/s0" in capsys.readouterr().out
    result = run_sweep_file(sweep, tmp_path / "results")
    median = [r for r in result.results if r.trial.pooling == "median"]
    assert len(median) == 1 and median[0].status == "FINISHED" and 0.0 <= median[0].scores["ari"] <= 1.0


def test_the_module_map_names_every_module_and_only_modules_that_exist():
    # Each module file has its own row; a folder row (harness/metrics/, harness/datasets/) covers its folder.
    section = GUIDE.split("## A map of the package", 1)[1].split("\n## ", 1)[0]
    rows = re.findall(r"^\| `([^`]+)` \|", section, re.MULTILINE)
    assert rows and [r for r in rows if not (REPO / r).exists()] == []
    files = sorted(str(p.relative_to(REPO)) for p in (REPO / "harness").rglob("*.py") if p.name != "__init__.py")
    assert [f for f in files if f not in rows and not any(r.endswith("/") and f.startswith(r) for r in rows)] == []
    packages = sorted(p.parent.name for p in (REPO / "harness").glob("*/__init__.py"))
    assert [p for p in packages if f"`harness/{p}/`" not in GUIDE] == []
